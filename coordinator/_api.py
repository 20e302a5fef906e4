"""The Python API: one call runs a scenario (a path or a dict) and returns its results."""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from coordinator._demos import demo_path
from coordinator._endpoints import check_endpoint
from coordinator._run import RunOptions, RunResult, execute
from coordinator._scenario import Scenario, is_file, load_scenario
from coordinator._swarm import Swarm, build_swarm
from coordinator._trajectories import read_trajectories
from topologies._errors import ScenarioError

__all__ = ["check", "load", "read_trajectories", "run"]


def load(scenario: str | Path | Mapping[str, Any] | Scenario) -> Swarm:
    """Validate a scenario (path, demo name, dict or Scenario) and build its swarm.

    Raises ScenarioError naming the file and key; nothing is started.
    """
    if isinstance(scenario, Scenario):
        return build_swarm(scenario)
    if isinstance(scenario, str) and not is_file(Path(scenario)) and demo_path(scenario):
        scenario = demo_path(scenario)  # type: ignore[assignment]
    swarm = build_swarm(load_scenario(scenario))  # type: ignore[arg-type]
    ref = swarm.reference
    if not (math.isfinite(ref.F_star) and np.all(np.isfinite(ref.x_star))):
        # the bounds on every scale keep this from happening; say so if a combination slips by
        raise ScenarioError(
            f"{swarm.scenario.source}: the reference optimum is not finite (F_star ="
            f" {ref.F_star!r}): the objective overflows float64; reduce [objective].spread or"
            " the [[agent]] targets and curvatures"
        )
    return swarm


def run(
    scenario: str | Path | Mapping[str, Any] | Scenario | Swarm,
    *,
    out: str | Path | None = None,
    runs_root: str | Path = "runs",
    view: Any = None,
    baseline: bool = False,
    replace: bool = False,
    **options: Any,
) -> RunResult:
    """Run a scenario to the end and return summary, metrics series and link rows.

    A non-empty ``out`` is refused (coordinator._rundir.OutNotEmpty) unless ``replace``,
    which deletes the earlier run there first.

    ``baseline=True`` also runs the same scenario without its faults (in ``<out>/baseline``)
    and puts its figures beside the faulty run's under ``summary["baseline"]``.
    """
    if options.get("listen") is not None:
        # refused before the run directory is written (ZeroMQ would say "Invalid argument")
        check_endpoint(options["listen"], option="listen", bind=True)
    swarm = scenario if isinstance(scenario, Swarm) else load(scenario)
    opts = RunOptions(
        out=None if out is None else Path(out),
        runs_root=Path(runs_root),
        view=view,
        replace=replace,
        **options,
    )
    result = execute(swarm, opts)
    if baseline and result.exit_code not in (130, 6):  # interrupted, or the disk failed
        from coordinator._baseline import attach_baseline

        attach_baseline(swarm, result, opts)
    return result


def check(scenario: str | Path | Mapping[str, Any] | Scenario) -> dict[str, Any]:
    """The resolved scenario, the graph facts, the reference optimum and the algorithm's
    options as every agent will use them (its own defaults filled); starts nothing."""
    import topologies as topo
    from node import algorithm_class

    swarm = load(scenario)
    cls = algorithm_class(swarm.algorithm["name"])
    options = {**cls.option_defaults, **swarm.algorithm["params"]}
    facts = topo.graph_facts(swarm.topology).as_dict()
    ref = swarm.reference
    return {
        "scenario": swarm.scenario.to_dict(),
        "resolved_toml": swarm.scenario.to_toml(),
        "graph": facts,
        "reference": {
            "x_star": ref.x_star.tolist(),
            "F_star": ref.F_star,
            "method": ref.method,
            "tolerance": ref.tolerance,
        },
        "intended_priorities": swarm.intended.tolist(),
        "algorithm": {
            "name": swarm.algorithm["name"],
            "step": swarm.algorithm["step"],
            "options": dict(sorted(options.items())),
        },
    }
