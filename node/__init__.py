"""One swarmrig agent: pure algorithm cores, link fault models, wire format, and the process."""

import os as _os

# Tiny matrices: threads only cost, and a forked child must not inherit a BLAS thread pool.
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_v, "1")

from node import _gradient_tracking, _priority, _pushsum, _ratio  # noqa: E402, F401  (register)
from node._algorithm import (  # noqa: E402
    AgentSpec,
    Algorithm,
    Block,
    BlockAlgorithm,
    Heard,
    Payload,
    Received,
    StepRule,
    algorithm_class,
    algorithm_names,
    register_algorithm,
)
from node._dgd import DGD  # noqa: E402
from node._errors import AgentFailure, ObjectiveError, ProtocolError, WireError  # noqa: E402
from node._links import (  # noqa: E402
    DELIVER,
    Decision,
    LinkFault,
    LinkModel,
    corrupt_bytes,
    validate_fault_params,
)
from node._memory import run_in_memory  # noqa: E402
from node._objectives import (  # noqa: E402
    Custom,
    Huber,
    Logistic,
    Objective,
    Quadratic,
    huber_data,
    logistic_data,
    objective_from_spec,
    objective_kinds,
)
from node._receiver import InLinkCounters, Receiver  # noqa: E402
from node._wire import DataMessage, decode_control, decode_data, encode_control, encode_data  # noqa: E402

__all__ = [
    "DELIVER",
    "DGD",
    "AgentFailure",
    "AgentSpec",
    "Algorithm",
    "Block",
    "BlockAlgorithm",
    "Custom",
    "DataMessage",
    "Decision",
    "Heard",
    "Huber",
    "InLinkCounters",
    "LinkFault",
    "LinkModel",
    "Logistic",
    "Objective",
    "ObjectiveError",
    "Payload",
    "ProtocolError",
    "Quadratic",
    "Received",
    "Receiver",
    "StepRule",
    "WireError",
    "algorithm_class",
    "algorithm_names",
    "corrupt_bytes",
    "decode_control",
    "decode_data",
    "encode_control",
    "encode_data",
    "huber_data",
    "logistic_data",
    "objective_from_spec",
    "objective_kinds",
    "register_algorithm",
    "run_in_memory",
    "validate_fault_params",
]
