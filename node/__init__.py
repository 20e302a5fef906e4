"""One swarmrig agent: pure algorithm cores, link fault models, wire format, and the process."""

import os as _os

# Tiny matrices: threads only cost, and a forked child must not inherit a BLAS thread pool.
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_v, "1")

from node._algorithm import (  # noqa: E402
    AgentSpec,
    Algorithm,
    Payload,
    Received,
    StepRule,
    algorithm_class,
    algorithm_names,
    register_algorithm,
)
from node._dgd import DGD  # noqa: E402
from node import _gradient_tracking, _priority, _pushsum, _ratio  # noqa: E402, F401  (register)
from node._errors import AgentFailure, ObjectiveError, ProtocolError, WireError  # noqa: E402
from node._memory import run_in_memory  # noqa: E402
from node._objectives import Objective, Quadratic, objective_from_spec  # noqa: E402

__all__ = [
    "DGD",
    "AgentFailure",
    "AgentSpec",
    "Algorithm",
    "Objective",
    "ObjectiveError",
    "Payload",
    "ProtocolError",
    "Quadratic",
    "Received",
    "StepRule",
    "WireError",
    "algorithm_class",
    "algorithm_names",
    "objective_from_spec",
    "register_algorithm",
    "run_in_memory",
]
