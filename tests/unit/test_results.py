"""Verdicts, settled times and recovery figures: pure functions, and lockstep runs against
closed forms (methods.md: DGD and gradient-tracking stability bounds on the 10-ring)."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import pytest

import coordinator
from coordinator._lockstep import execute_lockstep
from coordinator._reference import Reference
from coordinator._results import (
    VERDICT_DISAGREE,
    VERDICT_NOT_REACHED,
    VERDICT_REACHED,
    FaultWindow,
    GapFunction,
    fault_windows,
    quiet_line,
    recovery,
    standing,
    strict_exit_status,
    tolerance_threshold,
    tolerance_times,
    verdict,
)
from coordinator._run import RunOptions
from node._objectives import Quadratic
from tests.run_dir_spec import FINAL_STATE_KEYS, RECOVERY_KEYS


def ring(step: float, algorithm: str = "dgd", iterations: int = 1500, n: int = 10) -> dict:
    return {
        "swarm": {"name": "ring", "agents": n, "dimension": 2, "seed": 3, "iterations": iterations},
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 10.0, "curvature": "identity"},
        "algorithm": {"name": algorithm, "step": step},
        "telemetry": {"every_iterations": 5},
    }


def lockstep(sc: dict, out: Path) -> Any:
    return execute_lockstep(coordinator.load(sc), RunOptions(out=out))


def metrics_rows(run_dir: Path) -> list[dict[str, Any]]:
    with (run_dir / "metrics.csv").open() as f:
        return [{k: float(v) for k, v in r.items()} for r in csv.DictReader(f)]


def own_gaps_from_files(run_dir: Path) -> np.ndarray:
    """F(x_i) - F* for every recorded final state, from agents.json and final_states.json
    alone, with numpy (F* from the closed form of a weighted sum of quadratics)."""
    agents = json.loads((run_dir / "agents.json").read_text())
    states = json.loads((run_dir / "final_states.json").read_text())
    t = np.array([a["objective"]["target"] for a in agents])
    q = np.array([a["objective"]["curvature"] for a in agents])
    w = np.full(len(agents), 1.0 / len(agents))  # no priorities given: uniform
    h = np.einsum("j,jde->de", w, q)
    x_star = np.linalg.solve(h, np.einsum("j,jde,je->d", w, q, t))

    def F(x: np.ndarray) -> float:
        e = x - t
        return float(0.5 * np.einsum("j,jd,jde,je->", w, e, q, e))

    F_star = F(x_star)
    X = np.array([s["x"] for s in states])
    direct = np.array([F(x) for x in X]) - F_star
    # F(x) - F* = 1/2 (x - x*)^T H (x - x*) for a quadratic F (its gradient vanishes at x*):
    # the same numbers without the cancellation of the subtraction
    e = X - x_star
    exact = 0.5 * np.einsum("md,de,me->m", e, h, e)
    np.testing.assert_allclose(direct, exact, rtol=1e-9, atol=1e-12 * max(abs(F_star), 1.0))
    return exact


def test_step_067_dgd_ring_is_not_reached_tolerance(tmp_path: Path) -> None:
    # Metropolis-Hastings 10-ring: lambda_min(W) = -1/3, so constant-step DGD on identity
    # curvatures is stable only for step < 2/3 (methods.md, "Studies"); at 0.67 the agents
    # drift apart while their average still follows xbar <- xbar - step (xbar - bbar).
    g = nx.cycle_graph(10)  # Metropolis-Hastings weights of networkx's cycle, with numpy
    w = np.zeros((10, 10))
    for i, j in g.edges():
        w[i, j] = w[j, i] = 1.0 / (1 + max(g.degree(i), g.degree(j)))
    w += np.diag(1.0 - w.sum(axis=1))
    lam_min = float(np.linalg.eigvalsh(w).min())
    assert lam_min == pytest.approx(-1.0 / 3.0, abs=1e-12)  # numpy, as methods.md says
    assert 1.0 + lam_min < 0.67
    res = lockstep(ring(0.67), tmp_path / "run")
    s = res.summary
    assert s["final_gap"] <= s["tolerance_threshold"]  # the average alone looks perfect
    assert s["verdict"] == VERDICT_DISAGREE != VERDICT_REACHED
    assert s["worst_agent_gap"] > 1e3 * s["tolerance_threshold"]
    assert s["time_to_tolerance_s"] is None
    assert s["agreement"] == s["final_consensus_error"] and s["agreement_relative"] > 1.0
    own = own_gaps_from_files(res.run_dir)
    assert s["worst_agent"] == int(np.argmax(own))
    assert s["worst_agent_gap"] == pytest.approx(float(own.max()), rel=1e-12)


def test_gradient_tracking_on_the_same_ring_reaches_tolerance_for_every_agent(
    tmp_path: Path,
) -> None:
    # DIGing on the 10-ring with L = 1 is stable for step < (1 + lambda_min)^2 / 2 = 2/9
    # (methods.md, gradient tracking); 0.15 is inside and converges exactly.
    res = lockstep(ring(0.15, "gradient-tracking"), tmp_path / "run")
    s = res.summary
    assert s["verdict"] == VERDICT_REACHED
    states = json.loads((res.run_dir / "final_states.json").read_text())
    assert [st["id"] for st in states] == list(range(10))
    for st in states:
        assert set(FINAL_STATE_KEYS) <= set(st)
        assert st["source"] == "final report" and st["iteration"] == 1500
    own = own_gaps_from_files(res.run_dir)
    assert np.all(own <= s["tolerance_threshold"]) and s["agents_within_tolerance"] == 10
    # each recorded final state recomputes the summary's figures (at this level the worst
    # agent's id is rounding noise, so only the values are compared)
    assert s["worst_agent_gap"] == pytest.approx(float(own.max()), rel=1e-12, abs=1e-24)
    assert s["median_agent_gap"] == pytest.approx(float(np.median(own)), rel=1e-12, abs=1e-24)
    np.testing.assert_allclose([st["gap"] for st in states], own, rtol=1e-12, atol=1e-24)
    # settled and first touch, recomputed from metrics.csv
    rows = metrics_rows(res.run_dir)
    thr = s["tolerance_threshold"]
    first = next(r["t_s"] for r in rows if r["worst_agent_gap"] <= thr)
    last_out = max(i for i, r in enumerate(rows) if r["worst_agent_gap"] > thr)
    assert s["first_within_tolerance_s"] == pytest.approx(first, abs=1e-9)
    assert s["time_to_tolerance_s"] == pytest.approx(rows[last_out + 1]["t_s"], abs=1e-9)


def test_the_worst_agent_gap_column_is_the_largest_own_gap(tmp_path: Path) -> None:
    res = lockstep(ring(0.3, iterations=200), tmp_path / "run")
    rows = metrics_rows(res.run_dir)
    assert all(r["worst_agent_gap"] >= r["gap"] - 1e-12 for r in rows)  # F convex
    last = rows[-1]
    assert last["worst_agent_gap"] == pytest.approx(res.summary["worst_agent_gap"], rel=1e-12)


# -- pure functions -----------------------------------------------------------------------
def _quadratic_gap() -> GapFunction:
    objectives = [
        Quadratic(target=np.array([0.0]), curvature=np.eye(1)),
        Quadratic(target=np.array([4.0]), curvature=np.eye(1)),
    ]
    # F(x) = 1/2 (x^2 + (x - 4)^2) / 2, minimized at 2 with F* = 2
    return GapFunction(objectives, np.array([0.5, 0.5]), Reference(np.array([2.0]), 2.0, "", 0))


def test_gap_function_is_f_minus_f_star() -> None:
    gap = _quadratic_gap()
    for x in (2.0, 0.0, 3.5):
        assert gap(np.array([x])) == pytest.approx(0.25 * (x**2 + (x - 4) ** 2) - 2.0)
    assert tolerance_threshold(1e-3, -50.0) == pytest.approx(0.05)
    assert tolerance_threshold(1e-3, 0.2) == pytest.approx(1e-3)


def test_verdicts_in_plain_words() -> None:
    gap = _quadratic_gap()
    thr = 1e-3
    agree = standing({0: np.array([2.0]), 1: np.array([2.0])}, gap)
    apart = standing({0: np.array([1.0]), 1: np.array([3.0])}, gap)
    off = standing({0: np.array([3.0]), 1: np.array([3.0])}, gap)
    assert apart.average_gap == 0.0 and apart.worst_agent_gap == pytest.approx(0.5)
    assert verdict(agree, thr, n_agents=2) == VERDICT_REACHED
    assert verdict(apart, thr, n_agents=2) == VERDICT_DISAGREE
    assert verdict(off, thr, n_agents=2) == VERDICT_NOT_REACHED
    # an agent without any state cannot be said to have reached anything
    assert verdict(standing({0: np.array([2.0])}, gap), thr, n_agents=2) != VERDICT_REACHED
    assert verdict(agree, thr, n_agents=2, diverged=True) == "diverged"
    assert verdict(agree, thr, n_agents=2, exit_code=130) == "interrupted"
    assert verdict(agree, thr, n_agents=2, exit_code=3) == "failed"
    nan = standing({0: np.array([math.nan]), 1: np.array([2.0])}, gap)
    assert nan.worst_agent == 0 and verdict(nan, thr, n_agents=2) != VERDICT_REACHED


def _rows(values: list[float], start: int = 0) -> list[dict[str, Any]]:
    return [
        {
            "t_s": 0.1 * k,
            "iteration_median": float(10 * k),
            "gap": v / 2,
            "worst_agent_gap": v,
            "consensus_error": v / 10,
        }
        for k, v in enumerate(values, start)
    ]


def test_time_to_tolerance_is_settled_and_first_touch_apart() -> None:
    rows = _rows([5.0, 0.5, 3.0, 0.5, 0.4, 0.1])
    assert tolerance_times(rows, 1.0) == (pytest.approx(0.3), pytest.approx(0.1))
    assert tolerance_times(_rows([5.0, 0.5, 3.0]), 1.0) == (None, pytest.approx(0.1))
    assert tolerance_times(_rows([math.nan, 0.5]), 1.0) == (pytest.approx(0.1),) * 2


def test_recovery_figures_of_a_window_in_iterations() -> None:
    #            it: 0    10   20   30   40   50   60   70   80
    rows = _rows([4.0, 0.5, 0.4, 9.0, 7.0, 2.0, 3.0, 0.5, 0.2])
    (rec,) = recovery(
        rows, [FaultWindow(index=0, kind="outage", unit="iteration", start=30, end=50)], 1.0
    )
    assert set(RECOVERY_KEYS) <= set(rec)
    assert rec["before"]["worst_agent_gap"] == 0.4 and rec["before"]["iteration"] == 20
    assert rec["peak"]["worst_agent_gap"] == 9.0 and rec["peak"]["t_s"] == pytest.approx(0.3)
    assert rec["peak_agreement"]["agreement"] == pytest.approx(0.9)
    assert rec["end_t_s"] == pytest.approx(0.5)  # the first row at iteration 50
    assert rec["recovered_at_s"] == pytest.approx(0.7)
    assert rec["recovered_after_s"] == pytest.approx(0.2)
    assert rec["recovered_after_iterations"] == pytest.approx(20.0)
    assert rec["not_recovered"] is None


def test_recovery_says_why_when_there_is_none() -> None:
    rows = _rows([0.5, 0.5, 9.0, 0.5, 3.0])
    w = FaultWindow(index=0, kind="loss", unit="s", start=0.15, end=0.25)
    assert recovery(rows, [w], 1.0)[0]["not_recovered"] == (
        "not within tolerance at the end of the run"
    )
    forever = FaultWindow(index=1, kind="loss", unit="s", start=0.15, end=None)
    assert recovery(rows, [forever], 1.0)[0]["not_recovered"] == (
        "the fault lasts to the end of the run"
    )
    late = FaultWindow(index=2, kind="loss", unit="s", start=0.3, end=9.0)
    assert recovery(rows, [late], 1.0)[0]["not_recovered"] == "the run ended inside the window"
    # never out of tolerance after the end: recovered at once
    calm = FaultWindow(index=3, kind="loss", unit="s", start=0.0, end=0.05)
    rec = recovery(_rows([0.5, 0.4, 0.3]), [calm], 1.0)[0]
    assert rec["before"] is None and rec["recovered_after_s"] == 0.0


def test_process_fault_windows_come_from_events() -> None:
    faults = [
        {"index": 0, "kind": "crash", "agents": [5], "start_s": 1.0, "params": {}},
        {
            "index": 1,
            "kind": "pause",
            "agents": [2],
            "start_iteration": 100,
            "duration_iterations": 50,
            "params": {},
        },
        {
            "index": 2,
            "kind": "outage",
            "scope": "all",
            "start_iteration": 300,
            "duration_iterations": 500,
            "params": {},
        },
        {"index": 3, "kind": "crash", "agents": [1], "start_s": 9.0, "params": {}},
    ]
    events = [
        {"t_s": 0.5, "event": "pause", "fault": 1, "agent": 2},
        {"t_s": 0.8, "event": "resume", "fault": 1, "agent": 2},
        {"t_s": 1.01, "event": "crash", "fault": 0, "agent": 5},
        {"t_s": 1.5, "event": "agent-rejoined", "agent": 5, "epoch": 1},
    ]
    w = {x.index: x for x in fault_windows(faults, events)}
    assert (w[0].unit, w[0].start, w[0].end) == ("s", 1.01, 1.5)
    assert (w[1].start, w[1].end) == (0.5, 0.8)
    assert (w[2].unit, w[2].start, w[2].end) == ("iteration", 300.0, 800.0)
    assert w[3].start is None and w[3].note == "never happened"


def test_strict_exit_statuses_and_quiet_line() -> None:
    base = {
        "worst_agent_gap": 0.25,
        "worst_agent": 3,
        "tolerance_threshold": 0.01,
        "run_dir": "runs/x",
    }
    assert strict_exit_status({**base, "verdict": VERDICT_REACHED}) == 0
    assert strict_exit_status({**base, "verdict": VERDICT_DISAGREE}) == 4
    assert strict_exit_status({**base, "verdict": VERDICT_NOT_REACHED}) == 4
    assert strict_exit_status({**base, "verdict": "diverged"}) == 5
    line = quiet_line({**base, "verdict": VERDICT_DISAGREE})
    assert "\n" not in line and VERDICT_DISAGREE in line and "0.25" in line
    assert "agent 3" in line and line.endswith("runs/x")
