"""``--baseline``: the same scenario once more without its faults, side by side."""

from __future__ import annotations

import dataclasses
import json
from typing import Any

from coordinator._run import RunOptions, RunResult, execute
from coordinator._swarm import Swarm, build_swarm

__all__ = ["attach_baseline"]

#: figures put side by side (the faulty run's ``recovery`` goes with them: the baseline has
#: no fault windows, so its settled time is what each recovery compares with)
COMPARED = (
    "final_gap",
    "worst_agent_gap",
    "median_agent_gap",
    "final_consensus_error",
    "agreement_relative",
    "time_to_tolerance_s",
    "first_within_tolerance_s",
    "verdict",
)


def attach_baseline(swarm: Swarm, result: RunResult, options: RunOptions) -> RunResult:
    """Run ``swarm`` without faults in ``<run dir>/baseline``; record both in summary.json."""
    clean = build_swarm(dataclasses.replace(swarm.scenario, faults=()))
    opts = dataclasses.replace(options, out=result.run_dir / "baseline", label="baseline")
    base = execute(clean, opts)
    b = base.summary
    result.summary["baseline"] = {
        **{k: b.get(k) for k in COMPARED},
        "messages": b["messages"],
        "exit": b["exit"],
        "run_dir": b["run_dir"],
    }
    result.summary["with_and_without_faults"] = {
        k: {"with_faults": result.summary.get(k), "without_faults": b.get(k)} for k in COMPARED
    }
    result.summary["with_and_without_faults"]["recovery"] = {
        "with_faults": result.summary.get("recovery", []),
        "without_faults": b.get("recovery", []),
    }
    (result.run_dir / "summary.json").write_text(
        json.dumps(_clean(result.summary), indent=2) + "\n"
    )
    return result


def _clean(obj: Any) -> Any:
    from coordinator._rundir import _clean as clean

    return clean(obj)
