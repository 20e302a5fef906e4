"""The scenario's vocabulary: tables, keys, kinds, every concrete default and the bounds of
names. Data only; the loader (:mod:`coordinator._scenario`) and the key reference
(:mod:`coordinator._scenario_reference`) read it.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

from topologies._build import SHAPES

MODES = ("rounds", "async")
TOPOLOGY_SHAPES = (*SHAPES, "file")
OBJECTIVE_KINDS = ("quadratic", "logistic", "huber", "custom")
LINK_FAULT_KINDS = ("loss", "burst-loss", "delay", "duplicate", "corrupt", "outage")
PROCESS_FAULT_KINDS = ("crash", "pause", "slow")
FAULT_KINDS = LINK_FAULT_KINDS + PROCESS_FAULT_KINDS
#: delay distribution -> its own parameters (milliseconds unless named otherwise)
DELAY_DISTRIBUTIONS: Mapping[str, tuple[str, ...]] = {
    "constant": ("ms",),
    "uniform": ("low_ms", "high_ms"),
    "normal": ("mean_ms", "sd_ms"),
    "lognormal": ("median_ms", "sigma"),
    "pareto": ("scale_ms", "shape"),
}
TRANSPORTS = ("tcp", "ipc")
#: how far a priority vector's sum may be from one
PRIORITY_SUM_TOLERANCE = 1e-9
_SUM_TOLERANCE_TEXT = "1e-9"

#: Every concrete default, in one place. Keys are tables; "table.variant" holds the defaults
#: that apply only to one kind, shape, rule or distribution. Defaults that depend on other
#: keys or on the graph are described in :func:`describe_keys` instead.
_DEFAULTS: dict[str, dict[str, Any]] = {
    "swarm": {"dimension": 2, "mode": "rounds", "iterations": 2000, "tolerance": 1e-3},
    "objective": {"kind": "quadratic"},
    "objective.quadratic": {"spread": 10.0, "curvature": "identity"},
    "objective.quadratic.random": {"condition": 4.0},
    "objective.logistic": {"samples": 40, "reg": 0.01},
    "objective.huber": {"samples": 40, "delta": 1.0, "reg": 0.001},
    "priorities": {"initial": None, "gain": None},
    "algorithm": {"name": "dgd", "step": 0.05},
    "algorithm.step": {"rule": "constant"},
    "algorithm.step.constant": {"step": 0.05},
    "algorithm.step.diminishing": {"scale": 0.5, "power": 0.6},
    "timing": {"period_ms": 1.0, "jitter": 0.1, "speed_spread": 0.0, "round_timeout_ms": 500.0},
    "telemetry": {
        "every_ms": 20.0,
        "every_iterations": 0,
        "batch_ms": 50.0,
        "delay_samples": False,
    },
    "network": {"transport": "ipc", "host": "127.0.0.1"},
    "fault": {"start_s": 0.0, "start_iteration": 0},
    "fault.burst-loss": {"loss_good": 0.0, "loss_bad": 1.0},
    "fault.delay": {"distribution": "constant", "jitter_ms": 0.0, "fifo": False},
    "fault.crash": {"restart_state": "initial"},
}
DEFAULTS: Mapping[str, Mapping[str, Any]] = MappingProxyType(
    {section: MappingProxyType(values) for section, values in _DEFAULTS.items()}
)

_TABLES = (
    "swarm",
    "topology",
    "objective",
    "priorities",
    "algorithm",
    "timing",
    "telemetry",
    "network",
)
_ARRAYS = ("agent", "fault")
_SWARM_KEYS = ("name", "agents", "dimension", "seed", "mode", "iterations", "seconds", "tolerance")
_SHAPE_PARAMS: Mapping[str, tuple[str, ...]] = {
    "ring": (),
    "path": (),
    "grid": ("rows", "cols"),
    "star": (),
    "complete": (),
    "random-geometric": ("radius",),
    "erdos-renyi": ("p",),
    "small-world": ("k", "p"),
    "file": ("file", "directed"),
}
_TOPOLOGY_KEYS = ("shape", "radius", "p", "k", "rows", "cols", "file", "directed")
#: fewest agents each shape can be built with (a ring of two would repeat its one edge)
_MIN_AGENTS = {"ring": 3, "small-world": 3}
_OBJECTIVE_PARAMS: Mapping[str, tuple[str, ...]] = {
    "quadratic": ("spread", "curvature", "condition"),
    "logistic": ("samples", "reg"),
    "huber": ("samples", "delta", "reg"),
    "custom": ("function",),
}
_OBJECTIVE_KEYS = (
    "kind",
    "spread",
    "curvature",
    "condition",
    "samples",
    "reg",
    "delta",
    "function",
)
_ALGORITHM_KEYS = (
    "name",
    "step",
    "missing",
    "gain",
    "priority_averaging",
    "mode",
    "scale",
    "step_rule",
    "average_priorities",
    "module",
    "params",
)
_STEP_KEYS = ("rule", "step", "scale", "power")
_AGENT_KEYS = ("id", "target", "curvature", "initial_state", "initial_priorities", "speed")
_WINDOW_S = ("start_s", "duration_s")
_WINDOW_IT = ("start_iteration", "duration_iterations")
_FAULT_PARAMS: Mapping[str, tuple[str, ...]] = {
    "loss": ("rate",),
    "duplicate": ("rate",),
    "corrupt": ("rate",),
    "burst-loss": ("p_enter", "p_leave", "loss_good", "loss_bad"),
    "delay": ("distribution", "jitter_ms", "fifo"),
    "outage": (),
    "crash": ("restart_after_s", "restart_state"),
    "pause": (),
    "slow": ("factor",),
}
_FAULT_KEYS = tuple(
    dict.fromkeys(
        [
            "kind",
            "links",
            "agents",
            *_WINDOW_S,
            *_WINDOW_IT,
            *(k for params in _FAULT_PARAMS.values() for k in params),
            *(k for params in DELAY_DISTRIBUTIONS.values() for k in params),
            "name",
        ]
    )
)
_SCOPE_FORMS = (
    '"all" | {from = a, to = b} | {edge = [a, b]} | {from = a} | {to = a}'
    " | {between = [[...], [...], ...]} | {longer_than = r}"
)
_SCOPE_KEYSETS = (
    frozenset({"from", "to"}),
    frozenset({"from"}),
    frozenset({"to"}),
    frozenset({"edge"}),
    frozenset({"between"}),
    frozenset({"longer_than"}),
)
# The name becomes part of a directory name: no separators, no spaces.
_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_NAME_EXPECTED = 'a name of up to 64 letters, digits, ".", "_" or "-" (it names the run directory)'
_FAULT_NAME_EXPECTED = 'a name of up to 64 letters, digits, ".", "_" or "-"'
_REQUIRED: Any = object()
#: TOML integers are signed 64-bit
_INT64_MAX = 2**63 - 1
#: largest condition number of random curvatures (float64 keeps about 16 - log10 of it digits)
_CONDITION_MAX = 1e12
