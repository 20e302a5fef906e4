"""Objectives (node/_objectives.py): values and gradients against independent formulas,
spec round trips, seeded data, and the checks on custom objectives."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import approx_fprime, minimize
from scipy.special import expit, huber

from node._algorithm import AgentSpec, StepRule
from node._dgd import DGD
from node._errors import ObjectiveError
from node._objectives import (
    Custom,
    Huber,
    Logistic,
    Quadratic,
    huber_data,
    logistic_data,
    objective_from_spec,
    objective_kinds,
)

HERE = "tests.unit.test_objectives"


# Custom objective functions, imported by path in the tests below ---------------------------
def bowl(x: np.ndarray) -> tuple[float, np.ndarray]:
    return float(np.sum((x - 1.0) ** 2)), 2.0 * (x - 1.0)


def broken_sensor(x: np.ndarray) -> tuple[float, np.ndarray]:
    raise RuntimeError("sensor bus timed out")


def short_gradient(x: np.ndarray) -> tuple[float, np.ndarray]:
    return 0.0, np.zeros(x.shape[0] + 1)


def nan_value(x: np.ndarray) -> tuple[float, np.ndarray]:
    return math.nan, np.zeros_like(x)


def inf_gradient(x: np.ndarray) -> tuple[float, np.ndarray]:
    g = np.zeros_like(x)
    g[0] = math.inf
    return 1.0, g


def value_only(x: np.ndarray) -> float:
    return 1.0


NOT_CALLABLE = 3.0


def _points(d: int, count: int = 5, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(scale=2.0, size=(count, d))


def test_registry_lists_every_kind() -> None:
    assert objective_kinds() == ["custom", "huber", "logistic", "quadratic"]
    with pytest.raises(ObjectiveError, match="'cubic' is not known"):
        objective_from_spec({"kind": "cubic"})


def test_quadratic_round_trip_and_smoothness() -> None:
    q = Quadratic(target=np.array([1.0, -2.0]), curvature=np.array([[3.0, 1.0], [1.0, 2.0]]))
    r = objective_from_spec(q.spec())
    x = np.array([0.5, 0.25])
    assert r.value(x) == q.value(x)
    # spectral norm of a symmetric matrix = its largest eigenvalue (numpy linear algebra)
    assert q.smoothness() == pytest.approx(float(np.linalg.eigvalsh(q.curvature)[-1]), rel=1e-14)


# Logistic -----------------------------------------------------------------------------------
def test_logistic_data_is_seeded_and_well_formed() -> None:
    a1, y1 = logistic_data(11, 3, 200, 2)
    a2, y2 = logistic_data(11, 3, 200, 2)
    a3, _ = logistic_data(11, 4, 200, 2)
    assert a1.shape == (200, 2) and y1.shape == (200,)
    assert np.array_equal(a1, a2) and np.array_equal(y1, y2)
    assert not np.allclose(a1, a3)
    assert set(np.unique(y1)) == {-1.0, 1.0}
    # the classes overlap (labels drawn from the model): some samples disagree with the
    # best linear rule, so no separating direction exists for this seed
    fit = Logistic(features=a1, labels=y1, reg=0.0)
    res = minimize(lambda x: fit.value_and_grad(x), np.zeros(2), jac=True, method="BFGS")
    assert res.success and np.all(np.isfinite(res.x))
    assert np.mean(np.sign(a1 @ res.x) != y1) > 0.02


def test_logistic_value_and_gradient_match_independent_formulas() -> None:
    a, y = logistic_data(5, 1, 60, 3)
    f = Logistic(features=a, labels=y, reg=0.05)
    for x in _points(3):
        margins = y * (a @ x)
        expected = np.mean(np.log1p(np.exp(-margins))) + 0.025 * x @ x
        assert f.value(x) == pytest.approx(expected, rel=1e-12)
        g_expected = -(a.T @ (y * expit(-margins))) / 60 + 0.05 * x
        assert np.allclose(f.grad(x), g_expected, rtol=1e-12, atol=1e-14)
        v, g = f.value_and_grad(x)
        assert v == f.value(x) and np.array_equal(g, f.grad(x))
        # scipy's finite differences, a check of the calculus itself
        fd = approx_fprime(x, f.value, 1e-7)
        assert np.allclose(f.grad(x), fd, atol=1e-6)


def test_logistic_is_stable_for_huge_margins() -> None:
    f = Logistic(features=np.array([[1.0], [-1.0]]), labels=np.array([1.0, 1.0]), reg=0.0)
    v, g = f.value_and_grad(np.array([1e4]))
    # log(1 + e^-1e4) ~ 0 and log(1 + e^1e4) ~ 1e4: mean 5e3; slopes 0 and 1: mean 1/2
    assert v == pytest.approx(5e3, rel=1e-12)
    assert g[0] == pytest.approx(0.5, rel=1e-12)


def test_logistic_smoothness_bounds_the_hessian() -> None:
    a, y = logistic_data(2, 0, 80, 3)
    f = Logistic(features=a, labels=y, reg=0.1)
    for x in _points(3, seed=1):
        s = expit(y * (a @ x))
        hess = (a.T * (s * (1 - s))) @ a / 80 + 0.1 * np.eye(3)
        assert np.linalg.eigvalsh(hess)[-1] <= f.smoothness() + 1e-12


def test_logistic_spec_round_trip_and_seeded_spec() -> None:
    spec = {"kind": "logistic", "seed": 9, "agent": 2, "samples": 30, "dimension": 2, "reg": 0.2}
    f = objective_from_spec(spec)
    assert isinstance(f, Logistic) and f.dimension == 2 and f.reg == 0.2 and f.agent == 2
    a, y = logistic_data(9, 2, 30, 2)
    assert np.array_equal(f.features, a) and np.array_equal(f.labels, y)
    g = objective_from_spec(f.spec())
    x = np.array([0.3, -0.7])
    assert g.value(x) == f.value(x)
    assert np.array_equal(g.grad(x), f.grad(x))


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ({"features": [[1.0]], "labels": [0.0], "agent": 4}, "agent 4: logistic objective labels"),
        ({"features": [[1.0]], "agent": 4}, "agent 4: .*no 'labels'"),
        ({"features": [[1.0, 2.0]], "labels": [1.0, -1.0], "agent": 4}, "agent 4: .*m responses"),
        ({"features": [[1.0]], "labels": [1.0], "reg": -1, "agent": 4}, "agent 4: .*'reg'"),
        ({"seed": 1, "samples": 3, "agent": 4}, "agent 4: .*missing \\['dimension'\\]"),
        ({"agent": 4}, "agent 4: logistic objective needs local data"),
        ({"features": [[math.nan]], "labels": [1.0], "agent": 4}, "agent 4: .*NaN"),
    ],
)
def test_logistic_spec_errors_name_the_agent(spec: dict, message: str) -> None:
    with pytest.raises(ObjectiveError, match=message):
        objective_from_spec({"kind": "logistic", **spec})


# Huber --------------------------------------------------------------------------------------
def test_huber_value_and_gradient_match_scipy() -> None:
    a, b = huber_data(3, 2, 50, 3)
    f = Huber(features=a, responses=b, delta=0.7, reg=1e-3)
    both_regimes = 0
    for x in _points(3, seed=4):
        r = a @ x - b
        both_regimes += bool(np.any(np.abs(r) > 0.7) and np.any(np.abs(r) <= 0.7))
        expected = np.mean(huber(0.7, r)) + 0.5e-3 * x @ x  # scipy.special.huber
        assert f.value(x) == pytest.approx(expected, rel=1e-12)
        fd = approx_fprime(x, f.value, 1e-7)
        assert np.allclose(f.grad(x), fd, atol=1e-6)
    assert both_regimes >= 1  # the checks above covered both pieces of h


def test_huber_mixes_both_regimes_at_the_data_fit() -> None:
    # the outliers of huber_data sit in the linear regime at a least-squares fit
    a, b = huber_data(3, 2, 200, 3)
    x_ls = np.linalg.lstsq(a, b, rcond=None)[0]
    r = np.abs(a @ x_ls - b)
    assert np.mean(r > 1.0) > 0.03 and np.mean(r <= 1.0) > 0.5


def test_huber_smoothness_and_round_trip() -> None:
    a, b = huber_data(1, 0, 40, 2)
    f = objective_from_spec(
        {"kind": "huber", "features": a.tolist(), "responses": b.tolist(), "delta": 0.5}
    )
    assert isinstance(f, Huber) and f.reg == 1e-3
    # inside the quadratic regime the Hessian is A^T A / m + reg I
    assert f.smoothness() == pytest.approx(
        float(np.linalg.eigvalsh(a.T @ a / 40)[-1]) + 1e-3, rel=1e-12
    )
    g = objective_from_spec(f.spec())
    x = np.array([0.1, 2.0])
    assert g.value(x) == f.value(x)
    seeded = objective_from_spec(
        {"kind": "huber", "seed": 1, "agent": 0, "samples": 40, "dimension": 2, "delta": 0.5}
    )
    assert np.array_equal(seeded.features, a) and np.array_equal(seeded.responses, b)
    with pytest.raises(ObjectiveError, match="agent 6: huber objective 'delta' = 0"):
        objective_from_spec({**f.spec(), "delta": 0.0, "agent": 6})


# Custom ---------------------------------------------------------------------------------------
def test_custom_objective_calls_the_function() -> None:
    f = objective_from_spec({"kind": "custom", "function": f"{HERE}:bowl", "agent": 1})
    assert isinstance(f, Custom)
    v, g = f.value_and_grad(np.array([0.0, 3.0]))
    assert v == 5.0 and np.array_equal(g, [-2.0, 4.0])
    assert objective_from_spec(f.spec()).value(np.array([1.0, 1.0])) == 0.0


@pytest.mark.parametrize(
    ("name", "message"),
    [
        ("broken_sensor", "raised RuntimeError: sensor bus timed out"),
        ("short_gradient", r"gradient of shape \(3,\); expected \(2,\)"),
        ("nan_value", "non-finite value nan"),
        ("inf_gradient", "non-finite gradient"),
        ("value_only", "returned float; expected a pair"),
    ],
)
def test_custom_objective_errors_name_agent_and_function(name: str, message: str) -> None:
    path = f"{HERE}:{name}"
    f = objective_from_spec({"kind": "custom", "function": path, "agent": 7, "dimension": 2})
    with pytest.raises(ObjectiveError) as info:
        f.value_and_grad(np.zeros(2))
    text = str(info.value)
    assert text.startswith(f"agent 7: custom objective '{path}'")
    assert info.match(message)


def test_custom_objective_errors_reach_the_algorithm_with_agent_and_function() -> None:
    path = f"{HERE}:nan_value"
    spec = AgentSpec(
        id=5,
        n_agents=1,
        dimension=2,
        in_neighbours=(),
        out_neighbours=(),
        weights={5: 1.0},
        objective=objective_from_spec({"kind": "custom", "function": path, "agent": 5}),
        initial_state=np.zeros(2),
        initial_priorities=None,
        step=StepRule(step=0.1),
    )
    agent = DGD(spec)
    state, _ = agent.init()
    with pytest.raises(ObjectiveError, match=f"agent 5: custom objective '{path}'"):
        agent.step(state, {}, 0)


@pytest.mark.parametrize(
    ("function", "message"),
    [
        ("no_colon_here", "is malformed; expected 'package.module:function'"),
        ("tests.unit.no_such_module:f", "cannot be imported: ModuleNotFoundError"),
        (f"{HERE}:no_such_function", "cannot be imported: AttributeError"),
        (f"{HERE}:NOT_CALLABLE", "is a float, not a callable"),
    ],
)
def test_custom_objective_bad_paths(function: str, message: str) -> None:
    with pytest.raises(ObjectiveError, match=f"agent 2: custom objective.*{message}"):
        objective_from_spec({"kind": "custom", "function": function, "agent": 2})


def test_custom_objective_without_agent_says_so() -> None:
    with pytest.raises(ObjectiveError, match="no 'agent' in its spec"):
        objective_from_spec({"kind": "custom", "function": "nope"})
    with pytest.raises(ObjectiveError, match="needs 'function'"):
        objective_from_spec({"kind": "custom", "agent": 1})
