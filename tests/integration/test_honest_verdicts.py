"""Verdicts on every agent's own state, recovery figures, effective priorities and the live
view, on real agent processes (rounds mode)."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from rich.console import Console

import coordinator
from coordinator._snapshot import Snapshot
from coordinator._view import LiveView

pytestmark = pytest.mark.integration


def ring(step: float, algorithm: str, **extra: Any) -> dict[str, Any]:
    return {
        "swarm": {"name": "ring", "agents": 10, "dimension": 2, "seed": 3, "iterations": 1500},
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 10.0, "curvature": "identity"},
        "algorithm": {"name": algorithm, "step": step},
        **extra,
    }


def rows_of(run_dir: Path) -> list[dict[str, float]]:
    with (run_dir / "metrics.csv").open() as f:
        return [{k: float(v) for k, v in r.items()} for r in csv.DictReader(f)]


def own_gaps(run_dir: Path) -> np.ndarray:
    """F(x_i) - F* of every recorded final state, from agents.json and final_states.json with
    numpy: F(x) - F* = 1/2 (x - x*)^T H (x - x*) for quadratics, uniform weights."""
    agents = json.loads((run_dir / "agents.json").read_text())
    t = np.array([a["objective"]["target"] for a in agents])
    q = np.array([a["objective"]["curvature"] for a in agents])
    h = q.mean(axis=0)
    x_star = np.linalg.solve(h, np.einsum("jde,je->d", q, t) / len(agents))
    X = np.array([s["x"] for s in json.loads((run_dir / "final_states.json").read_text())])
    e = X - x_star
    return 0.5 * np.einsum("md,de,me->m", e, h, e)


def test_step_067_ring_is_not_reached_and_gradient_tracking_is(processes, tmp_path):
    # methods.md: MH 10-ring, lambda_min(W) = -1/3: DGD needs step < 2/3; DIGing < 2/9
    out = tmp_path / "dgd"
    processes.watch_run_dir(out)
    s = coordinator.run(ring(0.67, "dgd"), out=out).summary
    assert s["final_gap"] <= s["tolerance_threshold"] < s["worst_agent_gap"]
    assert s["verdict"] == "average within tolerance but agents disagree"
    own = own_gaps(out)
    assert s["worst_agent"] == int(np.argmax(own))
    assert s["worst_agent_gap"] == pytest.approx(float(own.max()), rel=1e-12)

    out = tmp_path / "gt"
    processes.watch_run_dir(out)
    s = coordinator.run(ring(0.15, "gradient-tracking"), out=out).summary
    assert s["verdict"] == "reached tolerance"
    own = own_gaps(out)
    assert np.all(own <= s["tolerance_threshold"]) and s["agents_within_tolerance"] == 10
    assert s["worst_agent_gap"] == pytest.approx(float(own.max()), rel=1e-12, abs=1e-24)


def test_partition_recovery_figures_match_the_metrics(processes, tmp_path):
    sc = {
        "swarm": {
            "name": "split",
            "agents": 8,
            "dimension": 2,
            "seed": 4,
            "iterations": 800,
            "tolerance": 0.05,
        },
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 10.0},
        "algorithm": {"name": "dgd", "step": 0.05, "missing": "self"},
        "telemetry": {"every_iterations": 2},
        "fault": [
            {
                "kind": "outage",
                "links": {"between": [[0, 1, 2, 3], [4, 5, 6, 7]]},
                "start_iteration": 200,
                "duration_iterations": 200,
            }
        ],
    }
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    s = coordinator.run(sc, out=out).summary
    (rec,) = s["recovery"]
    rows = rows_of(out)
    thr = s["tolerance_threshold"]
    # recomputed here from metrics.csv alone
    inside = [r for r in rows if 200 <= r["iteration_median"] < 400]
    peak = max(inside, key=lambda r: r["worst_agent_gap"])
    assert peak["worst_agent_gap"] > thr  # the partition pushes agents out of tolerance
    assert rec["peak"]["worst_agent_gap"] == pytest.approx(peak["worst_agent_gap"], rel=1e-12)
    assert rec["peak"]["t_s"] == pytest.approx(peak["t_s"], abs=1e-9)
    before = [r for r in rows if r["iteration_median"] < 200][-1]
    assert rec["before"]["worst_agent_gap"] == pytest.approx(before["worst_agent_gap"])
    end = next(r for r in rows if r["iteration_median"] >= 400)
    last_out = max(i for i, r in enumerate(rows) if r["worst_agent_gap"] > thr)
    back = rows[last_out + 1]
    assert back["iteration_median"] >= 400
    assert rec["recovered_after_s"] == pytest.approx(back["t_s"] - end["t_s"], abs=1e-9)
    assert rec["recovered_after_iterations"] == back["iteration_median"] - 400
    # settled after the partition; the first touch came before it
    assert s["verdict"] == "reached tolerance"
    assert s["time_to_tolerance_s"] == pytest.approx(back["t_s"], abs=1e-9)
    assert s["first_within_tolerance_s"] < before["t_s"]
    events = [json.loads(x) for x in (out / "events.jsonl").read_text().splitlines()]
    window = [e for e in events if e["event"] in ("fault-start", "fault-end")]
    assert [(e["event"], e["iteration"]) for e in window] == [
        ("fault-start", 200),
        ("fault-end", 400),
    ]


def test_effective_priorities_come_from_the_delivery_rates(processes, tmp_path):
    # methods.md, path 1-2-3 with agreed w = (.5, .3, .2); agent 1 (the middle one) hears
    # agent 0 through a link that loses 30% of its messages
    w = [0.5, 0.3, 0.2]
    sc = {
        "swarm": {
            "name": "lossy",
            "agents": 3,
            "dimension": 1,
            "seed": 1,
            "mode": "rounds",
            "iterations": 6000,
        },
        "topology": {"shape": "path"},
        "priorities": {"initial": [w, w, w], "gain": 0.0},
        "algorithm": {"name": "priority-weighted", "step": 0.05},
        "agent": [{"id": i, "target": [b]} for i, b in enumerate((0.0, 1.0, 4.0))],
        "fault": [{"kind": "loss", "links": {"from": 0, "to": 1}, "rate": 0.3}],
    }
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    s = coordinator.run(sc, out=out).summary

    def perron(a: np.ndarray) -> np.ndarray:  # left Perron vector with numpy
        ev, vecs = np.linalg.eig(a.T)
        pi = np.real(vecs[:, np.argmin(np.abs(ev - 1.0))])
        return pi / pi.sum()

    def expected(q: float) -> np.ndarray:  # methods.md, expected mixing under loss
        return np.array([[0.7, 0.3, 0.0], [0.5 * q, 0.3 + 0.5 * (1 - q), 0.2], [0.0, 0.3, 0.7]])

    pi = perron(expected(0.7))
    assert np.abs(np.asarray(s["effective_priorities"]) - pi).max() < 1e-2
    assert np.abs(np.asarray(s["last_round_priorities"]) - pi).max() > 1e-2
    assert s["effective_source"] == "delivery rates over the run"
    assert "last round" in s["last_round_note"]
    with (out / "links.csv").open() as f:
        link = next(r for r in csv.DictReader(f) if (r["from"], r["to"]) == ("0", "1"))
    q = int(link["delivered"]) / (int(link["sent"]) - int(link["in_flight"]))
    np.testing.assert_allclose(s["effective_priorities"], perron(expected(q)), atol=1e-9)
    d = np.abs(np.asarray(s["effective_priorities"]) - np.asarray(s["intended_priorities"]))
    assert s["effective_vs_intended"]["l1"] == pytest.approx(float(d.sum()), abs=1e-12)


class Recording(LiveView):
    def __init__(self) -> None:
        super().__init__(Console(file=io.StringIO(), width=160))
        self.frames: list[Snapshot] = []
        self.texts: list[str] = []

    def render(self, snap: Snapshot) -> Any:
        panel = super().render(snap)
        out = Console(file=io.StringIO(), width=160)
        out.print(panel)
        self.frames.append(snap)
        self.texts.append(out.file.getvalue())  # type: ignore[attr-defined]
        return panel


def test_live_view_at_the_end_of_a_crash_run_equals_the_files(processes, tmp_path):
    sc = ring(0.1, "gradient-tracking")
    sc["swarm"].update(agents=6, iterations=3000)
    sc["fault"] = [
        {
            "kind": "crash",
            "agents": [4],
            "start_iteration": 800,
            "restart_after_s": 0.3,
            "restart_state": "last",
        }
    ]
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    view = Recording()
    s = coordinator.run(sc, out=out, view=view).summary
    view.close()
    last = view.last
    assert last is not None and last.final and last.verdict == s["verdict"]
    assert all(f.t_s is None or f.t_s >= 0.0 for f in view.frames)
    assert last.average_gap == s["final_gap"] and last.worst_agent_gap == s["worst_agent_gap"]
    assert last.worst_agent == s["worst_agent"]
    assert last.totals.as_dict() == s["messages"]
    assert last.agents[4].epoch == 1
    with (out / "links.csv").open() as f:
        links = list(csv.DictReader(f))
    for row in last.agents:
        into = [r for r in links if int(r["to"]) == row.id]
        assert row.delivered == sum(int(r["delivered"]) for r in into)
        assert row.lost == sum(int(r["lost_transport"]) for r in into)
        assert row.dropped == sum(int(r["dropped_injected"]) for r in into)
        assert row.sent == sum(int(r["sent"]) for r in links if int(r["from"]) == row.id)
    text = view.texts[-1]
    assert s["verdict"] in text and f"{s['worst_agent_gap']:.3e}" in text
    assert "faults active" not in text


@pytest.mark.parametrize(
    ("step", "status", "verdict"),
    [(0.05, 4, "average within tolerance but agents disagree"), (3.0, 5, "diverged")],
)
def test_quiet_prints_one_line_and_strict_exit_tells_the_verdict(
    processes, tmp_path, step, status, verdict
):
    scenario = tmp_path / "s.toml"
    scenario.write_text(
        '[swarm]\nagents = 6\nseed = 2\niterations = 400\n[topology]\nshape = "ring"\n'
        f'[algorithm]\nname = "dgd"\nstep = {step}\n'
    )
    out = tmp_path / "run"
    p = processes.start(
        "run",
        str(scenario),
        "--engine",
        "lockstep",
        "--out",
        str(out),
        "--quiet",
        "--strict-exit",
    )
    stdout, stderr = p.communicate(timeout=120)
    assert p.returncode == status, stderr
    lines = stdout.splitlines()
    assert len(lines) == 1 and lines[0].startswith(verdict) and lines[0].endswith(str(out))
    s = json.loads((out / "summary.json").read_text())
    assert s["verdict"] == verdict
    if s["worst_agent_gap"] is not None:
        assert f"{s['worst_agent_gap']:.3g}" in lines[0]
