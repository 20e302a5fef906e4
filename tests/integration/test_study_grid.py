"""A grid study: a point of it equals the same scenario and seed run alone (through the
Python API, and as real processes), and the study directory loads into pandas."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import coordinator
from coordinator._study import StudyOptions, run_study
from coordinator._study_runs import TIMING_KEYS, flatten_scalars

pytestmark = pytest.mark.integration

BASE = """
[swarm]
name = "kelp-grid"
agents = 5
dimension = 2
iterations = 300
[topology]
shape = "ring"
[objective]
kind = "quadratic"
curvature = "random"
[algorithm]
name = "gradient-tracking"
step = 0.08
[[fault]]
kind = "loss"
name = "swell"
links = "all"
rate = 0.1
"""

STUDY = """
[study]
kind = "grid"
scenario = "kelp.toml"
seeds = [4, 9]
engine = "lockstep"
[vary]
"fault.swell.rate" = [0.0, 0.25]
"""


def test_grid_point_equals_the_run_alone(tmp_path: Path, processes) -> None:
    (tmp_path / "kelp.toml").write_text(BASE)
    (tmp_path / "grid.toml").write_text(STUDY)
    out = run_study(tmp_path / "grid.toml", StudyOptions(out=tmp_path / "s", workers=2))
    frames = coordinator.load_study(out)
    assert len(frames.runs) == 4 and len(frames.points) == 2
    row = frames.runs[(frames.runs["fault.swell.rate"] == 0.25) & (frames.runs["seed"] == 9)]
    assert len(row) == 1
    rec = json.loads((out / "rows" / f"{row['run_id'].iloc[0]}.json").read_text())

    # outside the study: the same scenario with the value set by hand, run alone
    alone_toml = BASE.replace("rate = 0.1", "rate = 0.25").replace(
        "iterations = 300", "iterations = 300\nseed = 9"
    )
    (tmp_path / "alone.toml").write_text(alone_toml)
    alone = coordinator.run(tmp_path / "alone.toml", out=tmp_path / "alone", engine="lockstep")
    mine = {k: v for k, v in flatten_scalars(rec["summary"]).items() if k not in TIMING_KEYS}
    theirs = {k: v for k, v in flatten_scalars(alone.summary).items() if k not in TIMING_KEYS}
    assert mine == theirs
    assert rec["summary"]["x_hat"] == alone.summary["x_hat"]
    # runs.csv carries the same scalars
    assert row["final_gap"].iloc[0] == pytest.approx(alone.summary["final_gap"], rel=1e-15)
    assert row["messages.dropped_injected"].iloc[0] == alone.summary["messages"]["dropped_injected"]

    # and as real processes (rounds mode, a fault without a time window: the same states)
    processes.watch_run_dir(tmp_path / "real")
    real = coordinator.run(tmp_path / "alone.toml", out=tmp_path / "real", engine="processes")
    np.testing.assert_allclose(rec["finals"], _finals(tmp_path / "real"), rtol=1e-12, atol=1e-12)
    assert (
        real.summary["messages"]["dropped_injected"]
        == rec["summary"]["messages"]["dropped_injected"]
    )
    assert real.summary["verdict"] == rec["summary"]["verdict"]


def _finals(run_dir: Path) -> list[list[float]]:
    rows = json.loads((run_dir / "final_states.json").read_text())
    return [r["x"] for r in sorted(rows, key=lambda r: r["id"])]
