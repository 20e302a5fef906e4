"""The built-in demos do what their descriptions promise, on the numbers."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

import coordinator
from coordinator._demos import list_demos

pytestmark = pytest.mark.integration


def _gap(rows: list[dict], lo: int, hi: int) -> float:
    """Median gap over the metrics rows whose slowest agent is in [lo, hi)."""
    g = [float(r["gap"]) for r in rows if lo <= int(r["iteration_min"]) < hi]
    assert g, f"no metrics rows with iterations in [{lo}, {hi})"
    return float(np.median(g))


def test_the_demos_are_listed():
    names = [n for n, _ in list_demos()]
    assert names == ["depot-partition", "tidal-buoys"]


def test_partition_demo_gap_rises_during_the_partition_and_falls_after(processes, tmp_path):
    out = tmp_path / "depot"
    processes.watch_run_dir(out)
    result = coordinator.run("depot-partition", out=out)
    assert result.exit_code == 0, result.summary["exit"]
    with (out / "metrics.csv").open() as f:
        rows = list(csv.DictReader(f))
    # the outage covers rounds [300, 800); the crash comes at round 1000
    before = _gap(rows, 150, 300)
    during = _gap(rows, 550, 800)
    after = _gap(rows, 900, 1000)
    assert during > 3 * before, (before, during)
    assert after < during / 3, (during, after)
    # constant-step DGD: the average lands, the robots stay a bias apart, and the verdict
    # says so (Yuan, Ling, Yin, SIAM J. Optim. 26 (2016): an O(step) neighbourhood)
    s = result.summary
    assert s["verdict"] == "average within tolerance but agents disagree"
    assert s["final_gap"] <= s["tolerance_threshold"] < s["worst_agent_gap"]
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]
    order = [e["event"] for e in events if e["event"] in ("crash", "restart", "agent-rejoined")]
    assert order == ["crash", "restart", "agent-rejoined"]
    with (out / "links.csv").open() as f:
        links = {(int(r["from"]), int(r["to"])): r for r in csv.DictReader(f)}
    cut = {(1, 2), (2, 1), (5, 6), (6, 5), (9, 10), (10, 9), (13, 14), (14, 13)}
    for link, row in links.items():
        dropped = int(row["dropped_injected"])
        # exactly rounds [300, 800) of every cut link are dropped: 500 messages each
        assert dropped == (500 if link in cut else 0), (link, dropped)
