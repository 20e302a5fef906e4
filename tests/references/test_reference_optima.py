"""The centralized reference (coordinator/_reference.py) against numpy linear algebra, an
independent scipy solve, the Pareto facts of methods.md, and gradient tracking in memory."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.special import expit

from coordinator._reference import (
    GTOL,
    reference_optimum,
    total_gradient,
    total_objective,
    weighted_quadratic_point,
)
from node._errors import ObjectiveError
from node._gradient_tracking import GradientTracking
from node._memory import run_in_memory
from node._objectives import Huber, Logistic, Objective, Quadratic, objective_from_spec
from tests.references._specs import build, make_specs, metropolis, ring_adjacency
from topologies._errors import ScenarioError

HERE = "tests.references.test_reference_optima"
_Parts = tuple[float, np.ndarray, np.ndarray]
N = 8
D = 3


def shifted_bowl(x: np.ndarray) -> tuple[float, np.ndarray]:
    """A custom objective: ||x - (1, 2, 3)||^2."""
    e = x - np.array([1.0, 2.0, 3.0])
    return float(e @ e), 2.0 * e


def exploding(x: np.ndarray) -> tuple[float, np.ndarray]:
    raise FloatingPointError("overflow in the motor model")


def _random_quadratics(seed: int, n: int, d: int) -> list[Objective]:
    rng = np.random.default_rng(seed)
    out: list[Objective] = []
    for _ in range(n):
        m = rng.normal(size=(d, d))
        out.append(
            Quadratic(target=rng.normal(scale=4.0, size=d), curvature=m @ m.T + 0.1 * np.eye(d))
        )
    return out


def _logistic_agents(seed: int = 21) -> list[Logistic]:
    return [
        objective_from_spec(
            {
                "kind": "logistic",
                "seed": seed,
                "agent": i,
                "samples": 40,
                "dimension": D,
                "reg": 0.05,
            }
        )
        for i in range(N)
    ]  # type: ignore[misc]


def _huber_agents(seed: int = 21) -> list[Huber]:
    return [
        objective_from_spec(
            {
                "kind": "huber",
                "seed": seed,
                "agent": i,
                "samples": 40,
                "dimension": D,
                "delta": 0.5,
                "reg": 1e-3,
            }
        )
        for i in range(N)
    ]  # type: ignore[misc]


# Independent formulations: written from the raw data with numpy only, value, gradient and
# Hessian, solved by scipy's trust-region Newton method (not L-BFGS-B) from another start,
# then finished with plain Newton steps, which rounding in F cannot stall.
def _newton(parts: Callable[[np.ndarray], _Parts], start: np.ndarray) -> np.ndarray:
    res = minimize(
        lambda x: parts(x)[0],
        start,
        jac=lambda x: parts(x)[1],
        hess=lambda x: parts(x)[2],
        method="trust-exact",
        options={"gtol": 1e-8},
    )
    assert res.success, res.message
    x = res.x
    for _ in range(4):
        _, g, h = parts(x)
        x = x - np.linalg.solve(h, g)
    assert np.max(np.abs(parts(x)[1])) < 1e-13
    return x


def _independent_logistic(agents: list[Logistic], weights: np.ndarray) -> np.ndarray:
    def parts(x: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        value, grad, hess = 0.0, np.zeros(D), np.zeros((D, D))
        for w, f in zip(weights, agents, strict=True):
            a, y, m = f.features, f.labels, f.features.shape[0]
            z = y * (a @ x)
            value += w * (np.sum(np.logaddexp(0.0, -z)) / m + 0.5 * f.reg * x @ x)
            grad += w * (-(a.T @ (y * expit(-z))) / m + f.reg * x)
            s = expit(z) * expit(-z)
            hess += w * ((a.T * s) @ a / m + f.reg * np.eye(D))
        return value, grad, hess

    return _newton(parts, np.full(D, 0.7))


def _independent_huber(agents: list[Huber], weights: np.ndarray) -> np.ndarray:
    def parts(x: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        value, grad, hess = 0.0, np.zeros(D), np.zeros((D, D))
        for w, f in zip(weights, agents, strict=True):
            a, b, m, d = f.features, f.responses, f.features.shape[0], f.delta
            r = a @ x - b
            inside = np.abs(r) <= d
            h = np.where(inside, 0.5 * r**2, d * np.abs(r) - 0.5 * d**2)
            value += w * (h.sum() / m + 0.5 * f.reg * x @ x)
            grad += w * (a.T @ np.where(inside, r, d * np.sign(r)) / m + f.reg * x)
            hess += w * ((a[inside].T @ a[inside]) / m + f.reg * np.eye(D))
        return value, grad, hess

    return _newton(parts, np.full(D, -0.5))


WEIGHTINGS = {
    "uniform": np.full(N, 1.0 / N),
    "skewed": np.array([0.3, 0.0, 0.1, 0.05, 0.2, 0.15, 0.0, 0.2]),
}


# ---------------------------------------------------------------------------------------------
def test_quadratic_closed_form_matches_numpy() -> None:
    objectives = _random_quadratics(1, 6, D)
    weights = np.array([0.2, 0.0, 0.4, 0.1, 0.25, 0.05])
    ref = reference_optimum(objectives, weights)
    h = sum(w * f.curvature for w, f in zip(weights, objectives, strict=True))
    g = sum(w * f.curvature @ f.target for w, f in zip(weights, objectives, strict=True))
    assert np.allclose(ref.x_star, np.linalg.solve(h, g), rtol=1e-12, atol=1e-12)
    assert ref.method == "closed-form" and ref.tolerance == 0.0
    assert ref.F_star == pytest.approx(total_objective(objectives, weights, ref.x_star), rel=1e-14)
    assert np.max(np.abs(total_gradient(objectives, weights, ref.x_star))) < 1e-12


def test_weighted_sum_of_two_bowls_walks_the_pareto_segment() -> None:
    # methods.md [derived] (Miettinen 1999): ||x - a||^2, ||x - b||^2: the weighted sum gives
    # x = lambda a + (1 - lambda) b, and the front is sqrt(f1) + sqrt(f2) = ||a - b||
    a, b = np.array([1.0, -2.0]), np.array([4.0, 2.0])
    bowls = [
        Quadratic(target=a, curvature=2 * np.eye(2)),
        Quadratic(target=b, curvature=2 * np.eye(2)),
    ]
    for lam in (0.0, 0.25, 0.5, 0.9, 1.0):
        x = weighted_quadratic_point(bowls, np.array([lam, 1.0 - lam]))
        assert np.allclose(x, lam * a + (1 - lam) * b, atol=1e-14)
        f1, f2 = bowls[0].value(x), bowls[1].value(x)
        # Quadratic is 1/2 (x-t)^T Q (x-t) with Q = 2I: exactly ||x - t||^2
        assert np.sqrt(f1) + np.sqrt(f2) == pytest.approx(np.linalg.norm(a - b), rel=1e-12)


def test_weighted_quadratic_point_general_curvatures() -> None:
    # methods.md: x(lambda) = (sum lambda_i Q_i)^-1 sum lambda_i Q_i a_i; check grad F = 0
    objectives = _random_quadratics(4, 3, 4)
    lam = np.array([0.6, 0.3, 0.1])
    x = weighted_quadratic_point(objectives, lam)
    assert np.max(np.abs(total_gradient(objectives, lam, x))) < 1e-11
    with pytest.raises(ScenarioError, match="agent 1 has a 'logistic' objective"):
        weighted_quadratic_point([objectives[0], _logistic_agents()[0]], np.array([0.5, 0.5]))


@pytest.mark.parametrize("weighting", sorted(WEIGHTINGS))
def test_logistic_optimum_matches_an_independent_newton_solve(weighting: str) -> None:
    agents = _logistic_agents()
    weights = WEIGHTINGS[weighting]
    ref = reference_optimum(agents, weights)
    x_ind = _independent_logistic(agents, weights)
    # asked: 1e-6 relative; measured: below 3e-17
    assert np.linalg.norm(ref.x_star - x_ind) <= 1e-10 * np.linalg.norm(x_ind)
    assert ref.method.startswith("L-BFGS-B") and ref.tolerance == GTOL
    assert ref.grad_norm <= GTOL
    assert ref.F_star == pytest.approx(total_objective(agents, weights, x_ind), rel=1e-12)


@pytest.mark.parametrize("weighting", sorted(WEIGHTINGS))
def test_huber_optimum_matches_an_independent_newton_solve(weighting: str) -> None:
    agents = _huber_agents()
    weights = WEIGHTINGS[weighting]
    ref = reference_optimum(agents, weights)
    x_ind = _independent_huber(agents, weights)
    # asked: 1e-6 relative; measured: below 3e-17
    assert np.linalg.norm(ref.x_star - x_ind) <= 1e-10 * np.linalg.norm(x_ind)
    # at the optimum some residuals sit beyond delta: both pieces of h are in play
    r = np.concatenate([f.features @ ref.x_star - f.responses for f in agents])
    assert np.any(np.abs(r) > 0.5) and np.any(np.abs(r) <= 0.5)
    assert ref.F_star == pytest.approx(total_objective(agents, weights, x_ind), rel=1e-12)


@pytest.mark.parametrize("kind", ["logistic", "huber"])
def test_gradient_tracking_reaches_the_reference(kind: str) -> None:
    # Nedić, Olshevsky, Shi (2017): exact convergence with a constant step; the step
    # 0.3 / max L_i is common practice, no source
    agents: list[Objective] = _logistic_agents() if kind == "logistic" else _huber_agents()
    ref = reference_optimum(agents, np.full(N, 1.0 / N))
    step = 0.3 / max(float(f.smoothness()) for f in agents)
    w = metropolis(ring_adjacency(N))
    states = run_in_memory(
        build(GradientTracking, make_specs(w, agents, np.zeros((N, D)), step=step)), 1000
    )
    x = np.array([s.x for s in states])
    # asked: 1e-6 relative; measured: 4.6e-15 (logistic), 1.6e-15 (Huber)
    assert np.max(np.linalg.norm(x - ref.x_star, axis=1)) <= 1e-10 * np.linalg.norm(ref.x_star)


def test_mixed_kinds_and_custom_objectives_use_scipy() -> None:
    custom = objective_from_spec(
        {"kind": "custom", "function": f"{HERE}:shifted_bowl", "agent": 1, "dimension": 3}
    )
    quad = Quadratic(target=np.array([-1.0, 0.0, 1.0]), curvature=2.0 * np.eye(3))
    ref = reference_optimum([quad, custom], np.array([0.25, 0.75]))
    # both are ||x - t||^2: the optimum is the weighted mean of the targets
    assert np.allclose(
        ref.x_star, 0.25 * np.array([-1.0, 0.0, 1.0]) + 0.75 * np.array([1.0, 2.0, 3.0]), atol=1e-9
    )
    assert ref.method.startswith("L-BFGS-B")


def test_reference_errors() -> None:
    quads = _random_quadratics(2, 3, 2)
    with pytest.raises(ScenarioError, match="one weight per agent"):
        reference_optimum(quads, np.ones(2))
    with pytest.raises(ScenarioError, match=">= 0 and not all zero"):
        reference_optimum(quads, np.array([0.5, -0.1, 0.6]))
    with pytest.raises(ScenarioError, match=">= 0 and not all zero"):
        reference_optimum(quads, np.zeros(3))
    boom = objective_from_spec({"kind": "custom", "function": f"{HERE}:exploding", "agent": 4})
    with pytest.raises(
        ObjectiveError, match=f"agent 4: custom objective '{HERE}:exploding' raised"
    ):
        reference_optimum([boom], np.ones(1), x0=np.zeros(2))
    with pytest.raises(ScenarioError, match="no objective states its dimension; pass x0"):
        reference_optimum([boom], np.ones(1))
