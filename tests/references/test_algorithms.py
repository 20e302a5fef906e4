"""Gradient tracking, push-sum / subgradient-push and ratio consensus against published
results and numpy recomputations of the [derived] values of methods.md."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from coordinator._reference import reference_optimum, total_objective
from node._algorithm import Received, algorithm_class
from node._dgd import DGD
from node._gradient_tracking import GradientTracking
from node._memory import run_in_memory
from node._objectives import Quadratic
from node._priority import PriorityWeighted
from node._pushsum import PushSum
from node._ratio import RatioConsensus
from tests.references._specs import (
    bernoulli_loss,
    build,
    connected_geometric_graph,
    digraph_in_matrix,
    in_neighbour_average,
    make_specs,
    metropolis,
    ring_adjacency,
    unit_quadratics,
)
from topologies._errors import ScenarioError

# ---------------------------------------------------------------------------------------------
# Gradient tracking (DIGing): Nedić, Olshevsky, Shi, SIAM J. Optim. 27 (2017)

N_RGG = 20


def _rgg_problem() -> tuple[np.ndarray, list[Quadratic]]:
    adjacency, _ = connected_geometric_graph(N_RGG, 0.4, first_seed=1)
    rng = np.random.default_rng(7)
    objectives = []
    for _ in range(N_RGG):
        m = rng.normal(size=(2, 2))
        q = m @ m.T + 0.5 * np.eye(2)
        q *= rng.uniform(0.5, 2.0) / np.linalg.norm(q, 2)
        objectives.append(Quadratic(target=rng.normal(scale=5.0, size=2), curvature=q))
    return metropolis(adjacency), objectives


def _relative_gap(objectives: list[Quadratic], x: np.ndarray) -> float:
    w = np.full(len(objectives), 1.0 / len(objectives))
    ref = reference_optimum(objectives, w)
    return (total_objective(objectives, w, x) - ref.F_star) / max(abs(ref.F_star), 1.0)


def test_gradient_tracking_is_exact_where_dgd_stalls() -> None:
    # Nedić, Olshevsky, Shi (2017): exact convergence with a constant step under strong
    # convexity; DGD with the same constant step stops in an O(alpha) neighbourhood
    # (Yuan, Ling, Yin, SIAM J. Optim. 26 (2016)).
    w, objectives = _rgg_problem()
    assert np.allclose(w, w.T) and np.allclose(w.sum(axis=1), 1.0)
    step, iterations = 0.1, 800
    x0 = np.zeros((N_RGG, 2))
    gaps = {}
    for cls in (GradientTracking, DGD):
        states = run_in_memory(build(cls, make_specs(w, objectives, x0, step=step)), iterations)
        x_hat = np.mean([s.x for s in states], axis=0)
        gaps[cls.name] = _relative_gap(objectives, x_hat)
    # measured: gradient tracking ~2e-16, DGD ~1.9e-4
    assert gaps["gradient-tracking"] < 1e-8
    assert gaps["dgd"] > 1e-5
    assert gaps["dgd"] > 1e4 * max(gaps["gradient-tracking"], 1e-16)


def test_gradient_tracking_agents_reach_the_optimum_itself() -> None:
    w, objectives = _rgg_problem()
    x_star = reference_optimum(objectives, np.full(N_RGG, 1.0 / N_RGG)).x_star
    states = run_in_memory(
        build(GradientTracking, make_specs(w, objectives, np.zeros((N_RGG, 2)), step=0.1)), 800
    )
    assert np.max(np.abs(np.array([s.x for s in states]) - x_star)) < 1e-8


def test_tracking_invariant_holds_without_faults() -> None:
    # [derived] methods.md: sum_i y_i(k) = sum_i grad f_i(x_i(k)) when 1^T W = 1^T
    w, objectives = _rgg_problem()
    worst = [0.0]

    def check(k: int, states: list) -> None:
        y_sum = np.sum([s.y for s in states], axis=0)
        g_sum = np.sum(
            [f.curvature @ (s.x - f.target) for f, s in zip(objectives, states, strict=True)],
            axis=0,
        )
        worst[0] = max(worst[0], float(np.max(np.abs(y_sum - g_sum))))

    run_in_memory(
        build(GradientTracking, make_specs(w, objectives, np.zeros((N_RGG, 2)), step=0.1)),
        300,
        on_step=check,
    )
    assert worst[0] < 1e-10


@pytest.mark.parametrize("missing", ["self", "reuse"])
def test_dropped_messages_break_the_tracking_invariant(missing: str) -> None:
    # [derived] methods.md: a dropped message breaks the invariant (a diagnostic)
    w, objectives = _rgg_problem()
    worst = [0.0]

    def check(k: int, states: list) -> None:
        y_sum = np.sum([s.y for s in states], axis=0)
        g_sum = np.sum([s.g for s in states], axis=0)
        worst[0] = max(worst[0], float(np.max(np.abs(y_sum - g_sum))))

    specs = make_specs(w, objectives, np.zeros((N_RGG, 2)), step=0.1, params={"missing": missing})
    run_in_memory(build(GradientTracking, specs), 50, deliver=bernoulli_loss(3, 0.1), on_step=check)
    assert worst[0] > 1e-3


def test_gradient_tracking_missing_neighbour_gives_weight_to_self() -> None:
    w = metropolis(ring_adjacency(3))
    b = np.array([[1.0], [2.0], [3.0]])
    specs = make_specs(w, unit_quadratics(b), np.array([[0.0], [4.0], [8.0]]), step=0.5)
    agent = GradientTracking(specs[0])
    state, _ = agent.init()  # x = 0, y = grad = -1
    inbox = {2: Received(0, {"x": np.array([8.0]), "y": np.array([5.0])}, True)}
    new, payload = agent.step(state, inbox, 0)
    third = w[0, 1]
    x = (w[0, 0] + third) * 0.0 + third * 8.0 - 0.5 * (-1.0)
    y = (w[0, 0] + third) * (-1.0) + third * 5.0 + (x - 1.0) - (-1.0)
    assert new.x[0] == pytest.approx(x, abs=1e-15)
    assert new.y[0] == pytest.approx(y, abs=1e-15)
    assert np.array_equal(payload["y"], new.y)
    with pytest.raises(ScenarioError, match="agent 0: gradient-tracking 'missing'"):
        GradientTracking(make_specs(w, unit_quadratics(b), b, params={"missing": "drop"})[0])


def _tracking_rate(w: np.ndarray, alpha: float, curvature: float) -> float:
    """Spectral radius of the DIGing error map for f_i = (L/2)||x - b_i||^2, per mode of W.

    Mode lambda of W: (x, y) -> (lambda x - alpha y, L(lambda - 1) x + (lambda - alpha L) y);
    the consensus mode contributes 1 - alpha L (its other eigenvalue, 1, is the conserved
    sum y - L sum x and is not an error).
    """
    lam = np.linalg.eigvalsh(w)
    radii = [abs(1.0 - alpha * curvature)]
    for mu in lam[:-1]:
        m = np.array([[mu, -alpha], [curvature * (mu - 1.0), mu - alpha * curvature]])
        radii.append(float(np.max(np.abs(np.linalg.eigvals(m)))))
    return max(radii)


def test_gradient_tracking_step_bound_on_a_ring() -> None:
    # [derived] methods.md: stable iff alpha L < (1 + lambda_min(W))^2 / 2; ring n = 10 with
    # Metropolis weights and L = 1 gives alpha_max = 2/9 (DGD would allow alpha < 2/3).
    n = 10
    w = metropolis(ring_adjacency(n))
    alpha_max = (1.0 + float(np.linalg.eigvalsh(w)[0])) ** 2 / 2.0
    assert alpha_max == pytest.approx(2.0 / 9.0, abs=1e-12)
    b = np.random.default_rng(3).normal(scale=3.0, size=(n, 2))
    errors = {}
    for factor in (0.95, 1.05):
        alpha = factor * alpha_max
        rho = _tracking_rate(w, alpha, 1.0)
        assert (rho < 1.0) == (factor < 1.0)
        states = run_in_memory(
            build(
                GradientTracking, make_specs(w, unit_quadratics(b), np.zeros((n, 2)), step=alpha)
            ),
            1500,
        )
        errors[factor] = float(np.max(np.abs(np.array([s.x for s in states]) - b.mean(axis=0))))
    # measured: ~9e-15 below the bound, ~9e11 above it
    assert errors[0.95] < 1e-8
    assert errors[1.05] > 1e6


# ---------------------------------------------------------------------------------------------
# Push-sum: Kempe, Dobra, Gehrke, FOCS 2003; subgradient-push: Nedić & Olshevsky, IEEE TAC 60 (2015)

EDGES = [(0, 1), (1, 2), (2, 0), (0, 2), (2, 3), (3, 0)]
X0 = np.array([[4.0], [0.0], [2.0], [10.0]])


def _digraph() -> np.ndarray:
    return in_neighbour_average(digraph_in_matrix(EDGES, 4))


def _left_perron(a: np.ndarray) -> np.ndarray:
    values, vectors = np.linalg.eig(a.T)
    pi = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return pi / pi.sum()


def test_push_sum_reaches_the_average_on_a_digraph() -> None:
    # methods.md example [derived]: push-sum ratios reach 4.0 = mean(x0)
    a = _digraph()
    zero = unit_quadratics(np.zeros((4, 1)), curvature=0.0)
    sums: list[tuple[float, float]] = []

    def record(k: int, states: list) -> None:
        sums.append((sum(float(s.s[0]) for s in states), sum(s.w for s in states)))

    specs = make_specs(a, zero, X0, params={"mode": "average"})
    states = run_in_memory(build(PushSum, specs), 200, on_step=record)
    assert np.max(np.abs(np.array([s.x[0] for s in states]) - 4.0)) < 1e-12
    # Kempe, Dobra, Gehrke (2003): sum s and sum w are invariant
    s_sums, w_sums = np.array(sums).T
    assert np.max(np.abs(s_sums - 16.0)) < 1e-12
    assert np.max(np.abs(w_sums - 4.0)) < 1e-12


def test_row_stochastic_averaging_reaches_the_perron_weighted_value() -> None:
    # methods.md example [derived]: in-neighbour averaging reaches pi^T x0 = 3.8 with
    # pi = (0.3, 0.2, 0.3, 0.2), not the average 4.0; DGD with step 0 is exactly that mix
    a = _digraph()
    pi = _left_perron(a)
    assert np.allclose(pi, [0.3, 0.2, 0.3, 0.2], atol=1e-12)
    zero = unit_quadratics(np.zeros((4, 1)), curvature=0.0)
    states = run_in_memory(build(DGD, make_specs(a, zero, X0, step=0.0)), 200)
    x = np.array([s.x[0] for s in states])
    assert np.max(np.abs(x - float(pi @ X0[:, 0]))) < 1e-12
    assert float(pi @ X0[:, 0]) == pytest.approx(3.8, abs=1e-12)


def test_subgradient_push_approaches_the_uniform_optimum() -> None:
    # Nedić & Olshevsky (2015): z_i -> argmin sum_i f_i at rate O(ln t / sqrt(t)) on a
    # strongly connected digraph; in-neighbour averaging with gradients (row-stochastic DGD)
    # aims at the pi-weighted point instead ([derived], methods.md priority section).
    a = _digraph()
    pi = _left_perron(a)
    b = np.array([[10.0], [-5.0], [10.0], [-5.0]])
    target = float(b.mean())  # 2.5
    biased = float(pi @ b[:, 0])  # 4.0
    assert abs(target - biased) == pytest.approx(1.5, abs=1e-12)
    errors = {}
    for t in (1000, 4000):
        specs = make_specs(a, unit_quadratics(b), X0, params={"mode": "optimize", "scale": 1.0})
        states = run_in_memory(build(PushSum, specs), t)
        errors[t] = float(np.max(np.abs(np.array([s.x[0] for s in states]) - target)))
    # measured: 0.049 at t = 1000, 0.025 at t = 4000 (the 1/sqrt(t) shape: ratio ~ 1/2)
    assert errors[4000] < 0.6 * errors[1000]
    assert errors[4000] < 0.05
    diminishing = {"rule": "diminishing", "scale": 1.0, "power": 0.5}
    row = run_in_memory(build(DGD, make_specs(a, unit_quadratics(b), X0, step=diminishing)), 4000)
    # measured: row-stochastic DGD's agents between 3.83 and 4.11
    row_mean = float(np.mean([s.x[0] for s in row]))
    assert abs(row_mean - biased) < 0.2 < 1.0 < abs(row_mean - target)


def test_push_sum_step_rules() -> None:
    a = _digraph()
    objectives = unit_quadratics(np.zeros((4, 1)))
    default = PushSum(make_specs(a, objectives, X0, params={"scale": 2.0})[0])
    assert default.step_size(3) == pytest.approx(2.0 / np.sqrt(4.0))
    planned = PushSum(make_specs(a, objectives, X0, step=0.07, params={"step_rule": "plan"})[0])
    assert planned.step_size(50) == 0.07
    given = PushSum(make_specs(a, objectives, X0, params={"step_rule": 0.03})[0])
    assert given.step_size(0) == 0.03
    with pytest.raises(ScenarioError, match="agent 0: push-sum 'mode'"):
        PushSum(make_specs(a, objectives, X0, params={"mode": "sum"})[0])
    with pytest.raises(ScenarioError, match="agent 0: push-sum 'step_rule'"):
        PushSum(make_specs(a, objectives, X0, params={"step_rule": "fast"})[0])


def test_push_sum_is_biased_by_drops_and_ratio_consensus_is_not() -> None:
    # Gerencsér & Hendrickx (2015): naive push-sum under drops converges to a biased value;
    # Vaidya, Hadjicostis, Domínguez-García (2011): running sums recover the exact average.
    a = _digraph()
    zero = unit_quadratics(np.zeros((4, 1)), curvature=0.0)
    deliver = bernoulli_loss(5, 0.3)
    push = run_in_memory(
        build(PushSum, make_specs(a, zero, X0, params={"mode": "average"})), 400, deliver=deliver
    )
    ratio = run_in_memory(build(RatioConsensus, make_specs(a, zero, X0)), 400, deliver=deliver)
    push_x = np.array([s.x[0] for s in push])
    ratio_x = np.array([s.x[0] for s in ratio])
    # both agree among themselves; measured: push-sum at 4.634, ratio consensus within 1e-13
    assert np.ptp(push_x) < 1e-9
    assert abs(push_x[0] - 4.0) > 0.05
    assert np.max(np.abs(ratio_x - 4.0)) < 1e-9


# ---------------------------------------------------------------------------------------------
# Running-sum ratio consensus: Vaidya, Hadjicostis, Domínguez-García (2011);
# Domínguez-García, Hadjicostis, Vaidya, IEEE TAC (2016)


def _mass(states: list, in_neighbours: list[tuple[int, ...]]) -> np.ndarray:
    """sum_i held_i + sum_(j->i) (sigma_j - rho_ji): the invariant of methods.md [derived]."""
    total = np.sum([s.held for s in states], axis=0)
    for i, ins in enumerate(in_neighbours):
        for link, j in enumerate(ins):  # rho: one row per in-link, in in-neighbour order
            rho = states[i].rho[link]
            total = total + states[j].sent - rho
    return total


@pytest.mark.parametrize("loss", [0.0, 0.3, 0.6])
def test_ratio_consensus_mass_invariant_and_exact_average(loss: float) -> None:
    a = _digraph()
    zero = unit_quadratics(np.zeros((4, 1)), curvature=0.0)
    specs = make_specs(a, zero, X0)
    ins = [s.in_neighbours for s in specs]
    expected = np.array([16.0, 4.0])
    worst = [0.0]

    def check(k: int, states: list) -> None:
        worst[0] = max(worst[0], float(np.max(np.abs(_mass(states, ins) - expected))))

    deliver = bernoulli_loss(17, loss) if loss else None
    states = run_in_memory(build(RatioConsensus, specs), 600, deliver=deliver, on_step=check)
    assert worst[0] < 1e-9
    assert np.max(np.abs(np.array([s.x[0] for s in states]) - 4.0)) < 1e-9


def test_ratio_consensus_averages_priorities_on_request() -> None:
    w = metropolis(ring_adjacency(6))
    rng = np.random.default_rng(2)
    priorities = rng.dirichlet(np.ones(6), size=6)
    x0 = rng.normal(size=(6, 3))
    zero = unit_quadratics(np.zeros((6, 3)), curvature=0.0)
    specs = make_specs(w, zero, x0, priorities=priorities, params={"average_priorities": True})
    states = run_in_memory(build(RatioConsensus, specs), 500, deliver=bernoulli_loss(8, 0.3))
    for s in states:
        assert np.max(np.abs(s.x - x0.mean(axis=0))) < 1e-9
        assert np.max(np.abs(s.priorities - priorities.mean(axis=0))) < 1e-9
        assert s.priorities.sum() == pytest.approx(1.0, abs=1e-12)
    plain = run_in_memory(build(RatioConsensus, make_specs(w, zero, x0, priorities=priorities)), 5)
    assert all(np.array_equal(s.priorities, p) for s, p in zip(plain, priorities, strict=True))
    with pytest.raises(ScenarioError, match="agent 0: ratio-consensus 'average_priorities'"):
        RatioConsensus(make_specs(w, zero, x0, params={"average_priorities": "yes"})[0])


# ---------------------------------------------------------------------------------------------
# The sans-IO contract of node/_algorithm.py, for every algorithm of this library

CONTRACT_CASES = {
    "gradient-tracking": (GradientTracking, {}),
    "push-sum/average": (PushSum, {"mode": "average"}),
    "push-sum/optimize": (PushSum, {"mode": "optimize"}),
    "ratio-consensus": (RatioConsensus, {"average_priorities": True}),
    "priority-weighted/laplacian": (PriorityWeighted, {"gain": 0.2}),
    "priority-weighted/ratio": (PriorityWeighted, {"priority_averaging": "ratio"}),
}


@pytest.mark.parametrize("case", sorted(CONTRACT_CASES))
def test_algorithm_contract(case: str) -> None:
    cls, params = CONTRACT_CASES[case]
    assert algorithm_class(cls.name) is cls  # importing the module registered it
    n, d = 5, 3
    rng = np.random.default_rng(0)
    specs = make_specs(
        metropolis(ring_adjacency(n)),
        unit_quadratics(rng.normal(size=(n, d))),
        rng.normal(size=(n, d)),
        priorities=rng.dirichlet(np.ones(n), size=n),
        step=0.1,
        params=params,
    )
    agents = build(cls, specs)
    sizes = agents[0].payload_sizes()
    states, payloads = zip(*(a.init() for a in agents), strict=True)
    for k in range(3):
        inbox = {j: Received(k, payloads[j], fresh=(k != 1)) for j in specs[0].in_neighbours}
        for p in payloads:
            assert set(p) == set(sizes)
            for key, arr in p.items():
                assert isinstance(arr, np.ndarray) and arr.dtype == np.float64
                assert arr.shape == (sizes[key],)
        before = {f: np.copy(getattr(states[0], f)) for f in ("x",)}
        first = agents[0].step(states[0], inbox, k)
        again = agents[0].step(states[0], inbox, k)
        # pure: same inputs, same outputs; the input state is left as it was
        assert np.array_equal(first[0].x, again[0].x)
        assert all(np.array_equal(first[1][key], again[1][key]) for key in sizes)
        assert np.array_equal(states[0].x, before["x"])
        assert first[0].x.shape == (d,)
        assert first[0].priorities is None or first[0].priorities.shape == (n,)
        with pytest.raises(dataclasses.FrozenInstanceError):
            first[0].x = np.zeros(d)
        stepped = [first] + [a.step(s, {}, k) for a, s in zip(agents[1:], states[1:], strict=True)]
        states = tuple(s for s, _ in stepped)
        payloads = tuple(p for _, p in stepped)
