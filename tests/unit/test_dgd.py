"""DGD (node/_dgd.py): fixed point, stability bound and missing-message rules."""

from __future__ import annotations

import numpy as np
import pytest

from node._algorithm import Received
from node._dgd import DGD
from node._memory import run_in_memory
from tests.references._specs import (
    build,
    make_specs,
    metropolis,
    ring_adjacency,
    unit_quadratics,
)

N = 12


def _ring_problem(step: float, seed: int = 4) -> tuple[np.ndarray, np.ndarray, list[DGD]]:
    w = metropolis(ring_adjacency(N))
    b = np.random.default_rng(seed).normal(scale=3.0, size=(N, 2))
    specs = make_specs(w, unit_quadratics(b), np.zeros((N, 2)), step=step)
    return w, b, build(DGD, specs)  # type: ignore[return-value]


@pytest.mark.parametrize("step", [0.3, 0.1, 0.02])
def test_fixed_point_matches_closed_form(step: float) -> None:
    # [derived] in methods.md: (I - W) x + alpha grad f(x) = 0 with f_i = 1/2 (x - b_i)^2
    # gives x* = alpha ((1 + alpha) I - W)^-1 b, and 1^T(I - W) = 0 gives mean(x*) = mean(b).
    # DGD itself: Nedić & Ozdaglar, IEEE TAC 54(1) (2009); Yuan, Ling, Yin, SIAM J. Optim. 26 (2016).
    w, b, agents = _ring_problem(step)
    x_star = step * np.linalg.solve((1.0 + step) * np.eye(N) - w, b)
    # the slowest mode contracts by max(|lambda_i(W) - alpha|) < 1 per step
    rate = float(np.max(np.abs(np.linalg.eigvalsh(w)[:-1] - step)))
    rate = max(rate, 1.0 - step)
    iterations = int(np.ceil(np.log(1e-13) / np.log(rate)))
    states = run_in_memory(agents, iterations)
    x = np.array([s.x for s in states])
    assert np.max(np.abs(x - x_star)) < 1e-10
    assert np.max(np.abs(x.mean(axis=0) - b.mean(axis=0))) < 1e-10
    # a constant step does not reach consensus: agents sit O(alpha) apart
    assert np.max(np.abs(x - x.mean(axis=0))) > 1e-3


def test_stability_bound_is_one_plus_lambda_min() -> None:
    # [derived] in methods.md: stable iff alpha < 1 + lambda_min(W); here lambda_min(W) = -1/3
    # (Metropolis on an even ring is (I + P + P^T)/3), so alpha_max = 2/3.
    w = metropolis(ring_adjacency(N))
    alpha_max = 1.0 + float(np.linalg.eigvalsh(w)[0])
    assert alpha_max == pytest.approx(2.0 / 3.0, abs=1e-12)
    results = {}
    for factor in (0.9, 1.1):
        step = factor * alpha_max
        _, b, agents = _ring_problem(step)
        x_star = step * np.linalg.solve((1.0 + step) * np.eye(N) - w, b)
        states = run_in_memory(agents, 400)
        results[factor] = float(np.max(np.abs(np.array([s.x for s in states]) - x_star)))
    assert results[0.9] < 1e-8
    assert results[1.1] > 1e3


def _one_step(missing: str, fresh: bool) -> tuple[np.ndarray, dict[int, float]]:
    # agent 0 of a 3-ring, hearing agents 1 and 2 with weight 1/3 each
    w = metropolis(ring_adjacency(3))
    b = np.array([[1.0], [2.0], [3.0]])
    specs = make_specs(
        w,
        unit_quadratics(b),
        np.array([[0.0], [10.0], [20.0]]),
        step=0.1,
        params={"missing": missing},
    )
    agent = DGD(specs[0])
    state, _ = agent.init()
    inbox = {
        1: Received(0, {"x": np.array([10.0])}, fresh),
        2: Received(1, {"x": np.array([20.0])}, True),
    }
    new, payload = agent.step(state, inbox, 1)
    assert np.array_equal(payload["x"], new.x)
    return new.x, dict(specs[0].weights)


def test_missing_reuse_mixes_the_latest_value() -> None:
    # hand computation: x0 = 0, neighbours 10 (stale) and 20; gradient (0 - 1) with step 0.1
    x, row = _one_step("reuse", fresh=False)
    expected = row[0] * 0.0 + row[1] * 10.0 + row[2] * 20.0 - 0.1 * (0.0 - 1.0)
    assert x[0] == pytest.approx(expected, abs=1e-15)


def test_missing_self_gives_the_weight_to_self() -> None:
    x, row = _one_step("self", fresh=False)
    expected = (row[0] + row[1]) * 0.0 + row[2] * 20.0 - 0.1 * (0.0 - 1.0)
    assert x[0] == pytest.approx(expected, abs=1e-15)
    x_fresh, _ = _one_step("self", fresh=True)
    assert x_fresh[0] == pytest.approx(row[1] * 10.0 + row[2] * 20.0 + 0.1, abs=1e-15)


def test_never_heard_neighbour_gives_its_weight_to_self() -> None:
    w = metropolis(ring_adjacency(3))
    specs = make_specs(
        w, unit_quadratics(np.zeros((3, 1))), np.array([[5.0], [1.0], [1.0]]), step=0.0
    )
    agent = DGD(specs[0])
    state, _ = agent.init()
    new, _ = agent.step(state, {}, 0)
    assert new.x[0] == 5.0
