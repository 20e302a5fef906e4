"""The live view reads frozen snapshots computed by the code that writes the files; fault
windows the agents enforce themselves get start and end events from telemetry."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

from rich.console import Console

import coordinator
from coordinator._lockstep import ROUNDS_PER_FLUSH, execute_lockstep
from coordinator._run import RunOptions
from coordinator._snapshot import Snapshot
from coordinator._view import LiveView
from coordinator._window_events import WindowEvents


class Recording(LiveView):
    """The live view, keeping every snapshot it drew and the text of each frame."""

    def __init__(self) -> None:
        # every frame handed is drawn (the lockstep run is much faster than a screen)
        super().__init__(Console(file=io.StringIO(), width=160), hz=1e9)
        self.frames: list[Snapshot] = []
        self.texts: list[str] = []

    def render(self, snap: Snapshot) -> Any:
        panel = super().render(snap)
        out = Console(file=io.StringIO(), width=160)
        out.print(panel)
        self.frames.append(snap)
        self.texts.append(out.file.getvalue())  # type: ignore[attr-defined]
        return panel


def partition(iterations: int = 1400) -> dict[str, Any]:
    return {
        "swarm": {
            "name": "split",
            "agents": 6,
            "dimension": 2,
            "seed": 8,
            "iterations": iterations,
        },
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 10.0},
        "algorithm": {"name": "gradient-tracking", "step": 0.1},
        "telemetry": {"every_iterations": 10},
        "fault": [
            {
                "kind": "outage",
                "links": {"between": [[0, 1, 2], [3, 4, 5]]},
                "start_iteration": 300,
                "duration_iterations": 500,
            },
            {"kind": "loss", "links": {"from": 1, "to": 2}, "rate": 0.3},
        ],
    }


def test_view_frames_come_from_snapshots_that_agree_with_the_files(tmp_path: Path) -> None:
    view = Recording()
    res = execute_lockstep(coordinator.load(partition()), RunOptions(out=tmp_path / "r", view=view))
    s = res.summary
    # lockstep hands a frame every ROUNDS_PER_FLUSH rounds, the final one after the results
    assert len(view.frames) >= 1400 // ROUNDS_PER_FLUSH
    assert all(f.t_s is None or f.t_s >= 0.0 for f in view.frames)
    last = view.last
    assert last is not None and last.final and last is view.frames[-1]
    assert last.verdict == s["verdict"] and not last.faults_active
    assert last.average_gap == s["final_gap"] and last.worst_agent_gap == s["worst_agent_gap"]
    assert last.worst_agent == s["worst_agent"] and last.agreement == s["agreement"]
    assert last.totals.as_dict() == s["messages"]
    with (res.run_dir / "links.csv").open() as f:
        links = list(csv.DictReader(f))
    for row in last.agents:
        into = [r for r in links if int(r["to"]) == row.id]
        assert row.delivered == sum(int(r["delivered"]) for r in into)
        assert row.dropped == sum(int(r["dropped_injected"]) for r in into)
        assert row.lost == sum(int(r["lost_transport"]) for r in into)
        assert row.sent == sum(int(r["sent"]) for r in links if int(r["from"]) == row.id)
    assert s["verdict"] in view.texts[-1] and "lockstep" in view.texts[-1]
    # the outage line shows while its window is on, and goes when it ends
    for f, text in zip(view.frames[:-1], view.texts[:-1], strict=True):
        its = [a.iteration for a in f.agents if a.iteration is not None]
        inside = 300 <= sorted(its)[len(its) // 2] < 800
        assert ("#0 outage" in text) == inside, (its, text)
        assert "#1 loss" in text  # for the whole run


def test_windows_the_agents_enforce_get_events_from_telemetry(tmp_path: Path) -> None:
    res = execute_lockstep(coordinator.load(partition()), RunOptions(out=tmp_path / "r"))
    events = [json.loads(x) for x in (res.run_dir / "events.jsonl").read_text().splitlines()]
    mine = [e for e in events if e["event"] in ("fault-start", "fault-end")]
    outage = [e for e in mine if e["fault"] == 0]
    assert [e["event"] for e in outage] == ["fault-start", "fault-end"]
    assert outage[0]["iteration"] == 300 and outage[1]["iteration"] == 800
    # virtual time: the first sample at or past iteration k is taken in round k - 1 (after
    # step k - 1) at (k - 1) ms; every agent samples every 10 iterations
    assert outage[0]["t_sample_s"] == 299e-3 and outage[1]["t_sample_s"] == 799e-3
    assert all(e["t_s"] >= e["t_sample_s"] for e in outage)  # noticed when telemetry came
    loss = [e for e in mine if e["fault"] == 1]
    assert [e["event"] for e in loss] == ["fault-start"] and loss[0]["at_s"] == 0.0


def test_a_window_ends_when_every_live_agent_is_past_it() -> None:
    faults = [
        {
            "index": 0,
            "kind": "outage",
            "scope": "all",
            "start_iteration": 10,
            "duration_iterations": 10,
            "params": {},
        }
    ]
    w = WindowEvents(faults, 3)
    assert w.observe(0, [(5, 0.5)]) == []
    (start,) = w.observe(0, [(12, 1.2)])
    assert start["event"] == "fault-start" and start["agent"] == 0 and start["t_sample_s"] == 1.2
    assert w.observe(0, [(25, 2.5)]) == [] and w.observe(1, [(20, 2.0)]) == []
    (end,) = w.observe(2, [(21, 2.1)], dead=[])
    assert end["event"] == "fault-end" and end["iteration"] == 20 and end["agent"] == 2
    assert w.observe(2, [(30, 3.0)]) == []  # once
    # an agent that died for good is not waited for
    w = WindowEvents(faults, 3)
    w.observe(0, [(10, 1.0), (20, 2.0)])
    assert w.observe(1, [(20, 2.0)], dead=[2])[0]["event"] == "fault-end"
