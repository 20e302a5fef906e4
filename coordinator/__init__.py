"""The swarmrig experiment: scenarios, launch, faults, telemetry, metrics, run directories."""

import os as _os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_v, "1")

from coordinator._api import check, load, read_trajectories, run  # noqa: E402
from coordinator._batch import check_batch, run_batch  # noqa: E402
from coordinator._reference import Reference, reference_optimum, total_objective  # noqa: E402
from coordinator._run import RunOptions, RunResult  # noqa: E402
from coordinator._scenario import (  # noqa: E402
    DEFAULTS,
    Scenario,
    check_topology_params,
    describe_keys,
    load_scenario,
)
from coordinator._scopes import links_in_scope  # noqa: E402
from coordinator._study import StudyFrames, StudyOptions, load_study, run_study  # noqa: E402
from coordinator._swarm import Swarm, build_swarm  # noqa: E402

__all__ = [
    "DEFAULTS",
    "Reference",
    "RunOptions",
    "RunResult",
    "Scenario",
    "StudyFrames",
    "StudyOptions",
    "Swarm",
    "build_swarm",
    "check",
    "check_batch",
    "check_topology_params",
    "describe_keys",
    "links_in_scope",
    "load",
    "load_scenario",
    "load_study",
    "read_trajectories",
    "reference_optimum",
    "run",
    "run_batch",
    "run_study",
    "total_objective",
]
