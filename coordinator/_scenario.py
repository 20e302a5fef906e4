"""Scenario files: load, validate every key, fill every default, write the resolved scenario.

A malformed scenario is refused here, before any process starts. Every message names the
file, the key and what was expected, e.g.
``dock.toml: [swarm].agents: expected an integer >= 2, got "twelve"``. Unknown tables and
keys are errors everywhere, so a typo never falls back silently to a default.

Checks that need the built graph (connectivity, whether a ``{from, to}`` link exists, the
priority gain below 1 / max degree) are the coordinator's, after the topology builder ran;
the topology and the fault scopes are checked structurally here.

Every default lives in :data:`DEFAULTS`; :func:`describe_keys` lists every key with its
default and meaning (the README's scenario reference is generated from it).
"""

from __future__ import annotations

import copy
import difflib
import json
import keyword
import math
import os
import re
import secrets
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, NoReturn

import numpy as np
import tomli_w

from coordinator import _limits as lim
from node._links import validate_fault_params
from topologies._build import SHAPES
from topologies._errors import ScenarioError

__all__ = [
    "DEFAULTS",
    "DELAY_DISTRIBUTIONS",
    "FAULT_KINDS",
    "LINK_FAULT_KINDS",
    "MODES",
    "OBJECTIVE_KINDS",
    "PROCESS_FAULT_KINDS",
    "TOPOLOGY_SHAPES",
    "Scenario",
    "check_topology_params",
    "describe_keys",
    "load_scenario",
]

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


# --------------------------------------------------------------------------- the record


@dataclass(frozen=True, slots=True, kw_only=True)
class Scenario:
    """A validated scenario with every default filled; build it with :func:`load_scenario`.

    Equality ignores ``source`` and ``base_dir``: two scenarios are equal when they describe
    the same experiment (every path in them is already absolute). The dict fields are plain
    data (lists, floats, strings); treat them as read-only.
    """

    #: the file it was loaded from, or "<dict>"
    source: str = field(compare=False)
    #: the scenario's folder: relative paths in it were resolved against this
    base_dir: Path = field(compare=False)
    name: str
    agents: int
    dimension: int
    seed: int
    mode: str
    #: budget per agent; exactly one of iterations and seconds is set
    iterations: int | None
    seconds: float | None
    tolerance: float
    #: {"shape": ..., its parameters}; "file" is an absolute path string
    topology: dict[str, Any]
    #: {"kind": ..., its parameters with defaults filled}
    objective: dict[str, Any]
    #: {"initial": n vectors or None (uniform), "gain": float or None (coordinator's default)}
    priorities: dict[str, Any]
    #: {"name", "step": float (constant) or {"rule": "diminishing", "scale", "power"}, extras}
    algorithm: dict[str, Any]
    timing: dict[str, Any]
    telemetry: dict[str, Any]
    #: normalized [[fault]] tables: "index", "kind", "scope" (link faults) or "agents"
    #: (process faults), the window keys, and "params" (the kind's parameters, filled)
    faults: tuple[dict[str, Any], ...]
    #: agent id -> its [[agent]] overrides (without "id"); these win over table defaults
    agent_overrides: dict[int, dict[str, Any]]
    network: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """The resolved scenario as plain data in the file's layout (no None values).

        ``load_scenario(s.to_dict()) == s``; the result can be dumped as TOML or JSON.
        """
        swarm: dict[str, Any] = {
            "name": self.name,
            "agents": self.agents,
            "dimension": self.dimension,
            "seed": self.seed,
            "mode": self.mode,
        }
        if self.iterations is not None:
            swarm["iterations"] = self.iterations
        else:
            swarm["seconds"] = self.seconds
        swarm["tolerance"] = self.tolerance
        doc: dict[str, Any] = {
            "swarm": swarm,
            "topology": copy.deepcopy(self.topology),
            "objective": copy.deepcopy(self.objective),
        }
        priorities = {k: copy.deepcopy(v) for k, v in self.priorities.items() if v is not None}
        if priorities:
            doc["priorities"] = priorities
        doc["algorithm"] = copy.deepcopy(self.algorithm)
        doc["timing"] = dict(self.timing)
        doc["telemetry"] = dict(self.telemetry)
        doc["network"] = dict(self.network)
        if self.agent_overrides:
            doc["agent"] = [
                {"id": i, **copy.deepcopy(o)} for i, o in sorted(self.agent_overrides.items())
            ]
        if self.faults:
            doc["fault"] = [_fault_to_table(f) for f in self.faults]
        return doc

    def to_toml(self) -> str:
        """The resolved scenario as TOML: every default filled, the seed explicit.

        Loading the text back gives a scenario equal to this one.
        """
        origin = self.source.replace("\n", " ")
        header = (
            f"# swarmrig resolved scenario (from {origin}): every default filled, seed explicit"
            " (the algorithm's own option defaults: swarmrig check).\n"
        )
        return header + _dump_toml(self.to_dict())


def _fault_to_table(fault: Mapping[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in fault.items():
        if key == "params":  # the file keeps a fault's parameters beside its kind
            out.update({k: copy.deepcopy(v) for k, v in value.items() if v is not None})
        elif key != "index" and value is not None:
            out["links" if key == "scope" else key] = copy.deepcopy(value)
    return out


def _dump_toml(doc: Mapping[str, Any]) -> str:
    """Tables and arrays of tables with inline values: one screen per scenario.

    (tomli_w writes every array one element per line, which turns a 12-agent priority
    table into some 170 lines; it still formats each scalar here.)
    """
    chunks = []
    for name, value in doc.items():
        tables = value if isinstance(value, list) else [value]
        for table in tables:
            head = f"[[{name}]]" if isinstance(value, list) else f"[{name}]"
            lines = [head] + [f"{k} = {_toml_value(v, k)}" for k, v in table.items()]
            chunks.append("\n".join(lines) + "\n")
    return "\n".join(chunks)


def _toml_value(value: Any, key: str | None = None) -> str:
    """One value; only a top-level array (``key`` given) may spread over several lines."""
    if isinstance(value, Mapping):
        inner = ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items())
        return f"{{ {inner} }}" if inner else "{}"
    if isinstance(value, list):
        items = [_toml_value(v) for v in value]
        inline = f"[{', '.join(items)}]"
        if key is None or len(key) + len(inline) <= 96:
            return inline
        if any(isinstance(v, list) for v in value):  # a matrix: one row per line
            return "[\n" + "".join(f"    {item},\n" for item in items) + "]"
        rows, row = [], ""
        for item in items:
            if row and len(row) + len(item) > 92:
                rows.append(row)
                row = ""
            row += f"{item}, "
        rows.append(row)
        return "[\n" + "".join(f"    {r.rstrip()}\n" for r in rows) + "]"
    # tomli_w knows TOML's escaping rules and float spelling; it renders "v = <value>\n"
    return tomli_w.dumps({"v": value})[4:-1]


# --------------------------------------------------------------------------- loading


def load_scenario(
    path_or_dict: str | os.PathLike[str] | Mapping[str, Any],
    *,
    source: str | None = None,
    base_dir: str | os.PathLike[str] | None = None,
) -> Scenario:
    """Load a scenario file (or an already parsed dict), validate it and fill every default.

    ``source`` names the input in error messages (default: the path as given, or "<dict>").
    Relative paths inside a file are resolved against the file's folder; inside a dict,
    against ``base_dir`` (default: the current directory). A missing seed is drawn here, so
    the returned scenario (and its :meth:`Scenario.to_toml`) fixes it.

    Raises :class:`ScenarioError` naming the file, the key and what was expected.
    """
    if isinstance(path_or_dict, Mapping):
        src = source or "<dict>"
        base = Path(base_dir if base_dir is not None else os.getcwd()).resolve()
        return _resolve(path_or_dict, src, base, default_name="swarm")
    if isinstance(path_or_dict, str | os.PathLike):
        path = Path(path_or_dict)
        src = source or _short_path(str(path_or_dict))
        raw = _read_toml(path, src)
        default_name = re.sub(r"[^A-Za-z0-9._-]+", "-", path.stem).strip("-._")[:64] or "swarm"
        return _resolve(raw, src, path.resolve().parent, default_name=default_name)
    raise ScenarioError(
        f"load_scenario: expected a path or a dict, got {type(path_or_dict).__name__}"
    )


def _short_path(text: str) -> str:
    """A path fit for a message: a very long one keeps its start and its end."""
    return text if len(text) <= 160 else f"{text[:80]}...{text[-60:]} ({len(text)} characters)"


def is_file(path: Path) -> bool:
    """Whether ``path`` is a file; False also for a name the system refuses (too long)."""
    try:
        return path.is_file()
    except OSError:  # ENAMETOOLONG and the like: no file can have that name
        return False


def _read_toml(path: Path, source: str) -> dict[str, Any]:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ScenarioError(
            f"{source}: cannot read the scenario file: {exc.strerror or exc}"
        ) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise ScenarioError(
            f"{source}: line {line}: not UTF-8 text; expected a TOML file"
        ) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        # Python 3.11 puts the position only in the message: "... (at line 3, column 7)".
        message = str(exc)
        at = re.search(r"\s*\(at line (\d+), column (\d+)\)$", message)
        if at:
            where = f"line {at[1]}, column {at[2]}"
            message = message[: at.start()]
        else:
            end = re.search(r"\s*\(at end of document\)$", message)
            where = f"line {text.count(chr(10)) + 1} (end of file)"
            message = message[: end.start()] if end else message
        raise ScenarioError(f"{source}: {where}: invalid TOML: {message}") from None


def _resolve(raw: Mapping[str, Any], src: str, base: Path, *, default_name: str) -> Scenario:
    _check_top_level(raw, src)
    swarm = _section(raw, "swarm", src)
    swarm.check_keys(_SWARM_KEYS)
    name = swarm.string("name", _NAME_RE, _NAME_EXPECTED, default=default_name)
    # agents first, and bounded, so that a huge swarm is refused before anything is built
    n = swarm.integer("agents", lo=2, hi=lim.AGENTS_MAX, why=lim.WHY["agents"])
    d = swarm.integer(
        "dimension",
        lo=1,
        hi=lim.DIMENSION_MAX,
        default=DEFAULTS["swarm"]["dimension"],
        why=lim.WHY["dimension"],
    )
    seed = swarm.integer("seed", lo=0, hi=_INT64_MAX, default=None)
    if seed is None:
        seed = secrets.randbelow(2**32)
    mode = swarm.choice("mode", MODES, default=DEFAULTS["swarm"]["mode"])
    if "iterations" in swarm.data and "seconds" in swarm.data:
        swarm.fail(None, "both iterations and seconds given; expected exactly one budget")
    iterations = swarm.integer(
        "iterations", lo=1, hi=lim.ITERATIONS_MAX, default=None, why=lim.WHY["iterations"]
    )
    seconds = swarm.number("seconds", lo=0.0, lo_open=True, default=None)
    if iterations is None and seconds is None:
        iterations = DEFAULTS["swarm"]["iterations"]
    tolerance = swarm.number(
        "tolerance", lo=0.0, lo_open=True, default=DEFAULTS["swarm"]["tolerance"]
    )

    topo = _section(raw, "topology", src)
    topology = check_topology_params(topo.data, agents=n, base_dir=base, source=src)
    objective = _objective(_section(raw, "objective", src), d)
    timing = _timing(_section(raw, "timing", src))
    if seconds is not None and seconds * 1000.0 / timing["period_ms"] > lim.ITERATIONS_MAX:
        # a seconds budget is also a count of rounds of period_ms (rounds mode, lockstep)
        swarm.fail(
            "seconds",
            f"expected a number <= {lim.ITERATIONS_MAX * timing['period_ms'] / 1000.0:g} with"
            f" [timing].period_ms = {timing['period_ms']:g} (seconds / period counts rounds;"
            f" {lim.WHY['iterations']}), got {_show(seconds)}",
        )
    faults = _faults(raw.get("fault", []), src, n)
    overrides = _agents(raw.get("agent", []), src, n, d, objective["kind"])
    if mode == "async":
        lim.check_waits(src, timing, overrides, faults, n)
    return Scenario(
        source=src,
        base_dir=base,
        name=name,
        agents=n,
        dimension=d,
        seed=seed,
        mode=mode,
        iterations=iterations,
        seconds=seconds,
        tolerance=tolerance,
        topology=topology,
        objective=objective,
        priorities=_priorities(_section(raw, "priorities", src), n),
        algorithm=_algorithm(_section(raw, "algorithm", src)),
        timing=timing,
        telemetry=_telemetry(_section(raw, "telemetry", src)),
        faults=faults,
        agent_overrides=overrides,
        network=_network(_section(raw, "network", src)),
    )


def _check_top_level(raw: Mapping[str, Any], src: str) -> None:
    names = [f"[{t}]" for t in _TABLES] + [f"[[{a}]]" for a in _ARRAYS]
    for key, value in raw.items():
        if key in _TABLES or key in _ARRAYS:
            continue
        hint = _did_you_mean(str(key), _TABLES + _ARRAYS)
        if isinstance(value, Mapping) or (_is_seq(value) and len(value) and _is_table(value[0])):
            what = f"unknown table [{key}]"
        else:
            what = f'key "{key}" outside any table'
        hint_text = ""
        if hint:
            hint_text = (
                f" (did you mean [[{hint}]]?)" if hint in _ARRAYS else f" (did you mean [{hint}]?)"
            )
        raise ScenarioError(f"{src}: {what}; expected one of: {', '.join(names)}{hint_text}")


def _section(raw: Mapping[str, Any], name: str, src: str) -> _Table:
    value = raw.get(name, {})
    if not isinstance(value, Mapping):
        raise ScenarioError(f"{src}: [{name}]: expected a table, got {_show(value)}")
    return _Table(value, f"[{name}]", src)


def check_topology_params(
    table: Mapping[str, Any],
    *,
    agents: int,
    base_dir: str | os.PathLike[str],
    source: str = "<dict>",
) -> dict[str, Any]:
    """Check a [topology] table structurally; return ``{"shape": ..., its parameters}``.

    The shape must be known and get exactly its own parameters with the right types and
    ranges; a ``file`` is resolved against ``base_dir`` and must exist (its contents and the
    graph's connectivity are the topology builder's to check). Raises :class:`ScenarioError`.
    """
    t = _Table(table, "[topology]", source)
    t.check_keys(_TOPOLOGY_KEYS)
    shape = t.choice("shape", TOPOLOGY_SHAPES)
    own = _SHAPE_PARAMS[shape]
    t.check_keys(_TOPOLOGY_KEYS, used=("shape", *own), by=f'shape "{shape}"')
    out: dict[str, Any] = {"shape": shape}
    if agents < _MIN_AGENTS.get(shape, 2):
        t.fail("shape", f'"{shape}" needs [swarm].agents >= {_MIN_AGENTS[shape]}, got {agents}')
    if shape == "grid":
        _grid(t, agents, out)
    elif shape == "random-geometric":
        # agents lie in the unit square: beyond its diagonal, sqrt(2), every pair is linked
        out["radius"] = t.number("radius", lo=0.0, lo_open=True, hi=math.sqrt(2))
    elif shape == "erdos-renyi":
        out["p"] = t.number("p", lo=0.0, lo_open=True, hi=1.0)
    elif shape == "small-world":
        # ring lattice with k/2 neighbours on each side, then rewiring with probability p
        # (Watts & Strogatz, Nature 393 (1998))
        k = t.integer("k", lo=2, hi=agents - 1)
        if k % 2:
            t.fail("k", f"expected an even integer (k/2 neighbours on each side), got {k}")
        out["k"] = k
        out["p"] = t.number("p", lo=0.0, hi=1.0)
    elif shape == "file":
        name = t.string("file", None, "a path to an edge list or GraphML file")
        path = Path(name).expanduser()
        if not path.is_absolute():
            path = Path(base_dir) / path
        if not is_file(path):
            t.fail("file", f"{_show(name)} is not a file (looked for {_short_path(str(path))})")
        out["file"] = str(path.resolve())
        if "directed" in t.data:  # absent: the file says (edge list marker, GraphML flag)
            out["directed"] = t.boolean("directed")
    return out


def _grid(t: _Table, agents: int, out: dict[str, Any]) -> None:
    if "rows" not in t.data and "cols" not in t.data:
        t.fail(None, f'shape "grid" needs rows, cols or both, with rows * cols = {agents}')
    rows = t.integer("rows", lo=1, default=None)
    cols = t.integer("cols", lo=1, default=None)
    # one of them may be left out when it follows from [swarm].agents
    if rows is None and cols is not None:
        if agents % cols:
            t.fail("cols", f"{cols} does not divide [swarm].agents = {agents}")
        rows = agents // cols
    if cols is None and rows is not None:
        if agents % rows:
            t.fail("rows", f"{rows} does not divide [swarm].agents = {agents}")
        cols = agents // rows
    if rows * cols != agents:
        t.fail(None, f"rows * cols = {rows * cols}; expected [swarm].agents = {agents}")
    out["rows"], out["cols"] = rows, cols


def _objective(t: _Table, d: int) -> dict[str, Any]:
    t.check_keys(_OBJECTIVE_KEYS)
    kind = t.choice("kind", OBJECTIVE_KINDS, default=DEFAULTS["objective"]["kind"])
    t.check_keys(_OBJECTIVE_KEYS, used=("kind", *_OBJECTIVE_PARAMS[kind]), by=f'kind "{kind}"')
    out: dict[str, Any] = {"kind": kind}
    if kind == "quadratic":
        if d > lim.QUADRATIC_DIMENSION_MAX:
            raise ScenarioError(
                f"{t.source}: [swarm].dimension: expected an integer <="
                f' {lim.QUADRATIC_DIMENSION_MAX} with [objective].kind = "quadratic"'
                f" ({lim.WHY['quadratic_dimension']}), got {d}"
            )
        dq = DEFAULTS["objective.quadratic"]
        # targets are drawn in [-spread, spread]^d: their norm reaches spread * sqrt(d)
        out["spread"] = t.number(
            "spread",
            lo=0.0,
            hi=lim.MAGNITUDE_MAX / math.sqrt(d),
            default=dq["spread"],
            why=f"targets reach spread * sqrt(dimension) = spread * {math.sqrt(d):.4g}; "
            + lim.WHY["magnitude"],
        )
        out["curvature"] = t.choice("curvature", ("identity", "random"), default=dq["curvature"])
        if out["curvature"] == "random":
            out["condition"] = t.number(
                "condition",
                lo=1.0,
                hi=_CONDITION_MAX,
                default=DEFAULTS["objective.quadratic.random"]["condition"],
                why="the reference optimum is solved in float64, which keeps about"
                " 16 - log10(condition) correct digits",
            )
        elif "condition" in t.data:
            t.fail("condition", 'only used with curvature = "random"')
    elif kind in ("logistic", "huber"):
        dk = DEFAULTS[f"objective.{kind}"]
        out["samples"] = t.integer(
            "samples",
            lo=1,
            hi=lim.SAMPLE_NUMBERS_MAX // (d + 1),
            default=dk["samples"],
            why=f"with [swarm].dimension = {d}; {lim.WHY['samples']}",
        )
        if kind == "huber":
            out["delta"] = t.number("delta", lo=0.0, lo_open=True, default=dk["delta"])
        # separable logistic data have no minimizer without a ridge term
        out["reg"] = t.number("reg", lo=0.0, lo_open=kind == "logistic", default=dk["reg"])
    else:
        out["function"] = t.string(
            "function", None, '"package.module:function"', check=_is_function_path
        )
    return out


def _priorities(t: _Table, n: int) -> dict[str, Any]:
    t.check_keys(("initial", "gain"))
    initial = None
    if "initial" in t.data:
        rows = t.data["initial"]
        if not _is_seq(rows) or len(rows) != n:
            t.fail(
                "initial",
                f"expected {n} priority vectors (one per agent, [swarm].agents = {n}),"
                f" got {_count(rows)}",
            )
        initial = [_priority_vector(t, f"initial[{i}]", row, n) for i, row in enumerate(rows)]
    gain = t.number("gain", lo=0.0, default=None)
    return {"initial": initial, "gain": gain}


def _algorithm(t: _Table) -> dict[str, Any]:
    t.check_keys(_ALGORITHM_KEYS)
    module = t.string(
        "module", None, 'a dotted module name "package.module"', default=None, check=_is_dotted
    )
    default_name = DEFAULTS["algorithm"]["name"]
    if module is None:
        from node import algorithm_names  # importing the package registers its algorithms

        name = t.choice("name", tuple(algorithm_names()), default=default_name)
    else:
        # a custom module registers its algorithm when imported by the agents
        name = t.string(
            "name",
            re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]*"),
            "an algorithm name",
            default=default_name,
        )
    out: dict[str, Any] = {"name": name, "step": _step(t, "step")}
    # Algorithm-specific keys pass through unchanged; their defaults belong to the algorithm.
    for key in _ALGORITHM_KEYS[2:]:
        if key not in t.data or key in ("module", "params"):
            continue
        if key == "missing" and module is None:
            out[key] = _missing_policy(t, name)
        elif key in ("missing", "mode"):
            out[key] = t.string(key, None, "a string")
        elif key == "gain":
            out[key] = t.number(key, lo=0.0)
        elif key == "scale":
            out[key] = t.number(key, lo=0.0, lo_open=True)
        elif key == "average_priorities":
            out[key] = t.boolean(key)
        elif key == "step_rule":
            # "plan" hands the [algorithm].step rule on; otherwise a step of its own
            plan = isinstance(t.data[key], str) and t.data[key] == "plan"
            out[key] = "plan" if plan else _step(t, key, also='"plan", ')
        else:  # priority_averaging: a switch or a variant name
            value = t.data[key]
            if not isinstance(value, bool | str) or value == "":
                t.fail(key, f"expected true, false or a variant name, got {_show(value)}")
            out[key] = value
    if module is not None:
        out["module"] = module
    if "params" in t.data:
        # free-form options of a user's algorithm: plain scalars, handed to it unchanged
        raw = t.data["params"]
        if not isinstance(raw, dict):
            t.fail("params", f"expected a table of options, got {_show(raw)}")
        for k, v in raw.items():
            if not isinstance(v, bool | int | float | str):
                t.fail(f"params.{k}", f"expected a number, a string or a boolean, got {_show(v)}")
        out["params"] = dict(raw)
    return out


def _missing_policy(t: _Table, name: str) -> str:
    """[algorithm].missing of a built-in algorithm: one of the policies it declares."""
    from node import algorithm_class

    policies = algorithm_class(name).missing_policies
    if not policies:
        t.fail("missing", f'not used by "{name}", which has no policy for silent in-neighbours')
    return t.choice("missing", policies)


def _step(t: _Table, key: str, *, also: str = "") -> float | dict[str, Any]:
    """A step rule: a constant > 0, or a {rule, ...} table (diminishing steps filled)."""
    if key not in t.data:
        return DEFAULTS["algorithm"]["step"]
    value = t.data[key]
    if not isinstance(value, Mapping):
        if not _is_number(value):
            t.fail(
                key,
                f'expected {also}a number > 0 or a table {{rule = "constant" | "diminishing",'
                f" ...}}, got {_show(value)}",
            )
        return t.number(key, lo=0.0, lo_open=True)
    s = t.sub(key)
    s.check_keys(_STEP_KEYS)
    rule = s.choice("rule", ("constant", "diminishing"), default=DEFAULTS["algorithm.step"]["rule"])
    if rule == "constant":
        s.check_keys(_STEP_KEYS, used=("rule", "step"), by='rule "constant"')
        dc = DEFAULTS["algorithm.step.constant"]
        # a constant rule is stored as the plain number, the form the file usually uses
        return s.number("step", lo=0.0, lo_open=True, default=dc["step"])
    s.check_keys(_STEP_KEYS, used=("rule", "scale", "power"), by='rule "diminishing"')
    dd = DEFAULTS["algorithm.step.diminishing"]
    return {
        "rule": "diminishing",
        "scale": s.number("scale", lo=0.0, lo_open=True, default=dd["scale"]),
        "power": s.number("power", lo=0.0, lo_open=True, default=dd["power"]),
    }


def _timing(t: _Table) -> dict[str, Any]:
    dt = DEFAULTS["timing"]
    t.check_keys(tuple(dt))
    poll = lim.WHY["poll"]
    return {
        "period_ms": t.number(
            "period_ms", lo=lim.PERIOD_MS_MIN, hi=lim.POLL_MS_MAX, default=dt["period_ms"], why=poll
        ),
        "jitter": t.number("jitter", lo=0.0, hi=1.0, hi_open=True, default=dt["jitter"]),
        "speed_spread": t.number(
            "speed_spread", lo=0.0, hi=1.0, hi_open=True, default=dt["speed_spread"]
        ),
        "round_timeout_ms": t.number(
            "round_timeout_ms",
            lo=0.0,
            lo_open=True,
            hi=lim.POLL_MS_MAX,
            default=dt["round_timeout_ms"],
            why=poll,
        ),
    }


def _telemetry(t: _Table) -> dict[str, Any]:
    dt = DEFAULTS["telemetry"]
    t.check_keys(tuple(dt))
    poll, its = lim.WHY["poll"], lim.WHY["iterations"]
    return {
        "every_ms": t.number(
            "every_ms", lo=0.0, lo_open=True, hi=lim.POLL_MS_MAX, default=dt["every_ms"], why=poll
        ),
        "every_iterations": t.integer(
            "every_iterations",
            lo=0,
            hi=lim.ITERATIONS_MAX,
            default=dt["every_iterations"],
            why=its,
        ),
        "batch_ms": t.number(
            "batch_ms", lo=0.0, lo_open=True, hi=lim.POLL_MS_MAX, default=dt["batch_ms"], why=poll
        ),
        "delay_samples": t.boolean("delay_samples", default=dt["delay_samples"]),
    }


def _network(t: _Table) -> dict[str, Any]:
    dn = DEFAULTS["network"]
    t.check_keys(tuple(dn))
    host = t.string(
        "host",
        re.compile(r"[^\s/]+"),
        "a host name or address (no spaces, no scheme)",
        default=dn["host"],
    )
    return {"transport": t.choice("transport", TRANSPORTS, default=dn["transport"]), "host": host}


def _agents(raw: Any, src: str, n: int, d: int, kind: str) -> dict[int, dict[str, Any]]:
    tables = _array_of_tables(raw, "agent", src)
    first_at: dict[int, int] = {}
    out: dict[int, dict[str, Any]] = {}
    for pos, entry in enumerate(tables):
        t = _Table(entry, f"[[agent]] #{pos}", src, sep=": ")
        i = t.integer("id", lo=0, hi=n - 1)
        t.label = f"[[agent]] id={i}"
        if i in first_at:
            t.fail(
                "id", f"given twice (tables #{first_at[i]} and #{pos}); expected each agent once"
            )
        first_at[i] = pos
        t.check_keys(_AGENT_KEYS)
        o: dict[str, Any] = {}
        for key in ("target", "curvature"):
            if key in t.data and kind != "quadratic":
                t.fail(key, f'only used with [objective].kind = "quadratic" (it is "{kind}")')
        why = f"[swarm].dimension = {d}"
        if "target" in t.data:
            o["target"] = _bounded_norm(t, "target", _vector(t, "target", t.data["target"], d, why))
        if "curvature" in t.data:
            o["curvature"] = _spd_matrix(t, "curvature", t.data["curvature"], d)
        if "initial_state" in t.data:
            o["initial_state"] = _bounded_norm(
                t, "initial_state", _vector(t, "initial_state", t.data["initial_state"], d, why)
            )
        if "initial_priorities" in t.data:
            o["initial_priorities"] = _priority_vector(
                t, "initial_priorities", t.data["initial_priorities"], n
            )
        if "speed" in t.data:
            o["speed"] = t.number("speed", lo=0.0, lo_open=True)
        out[i] = o
    return dict(sorted(out.items()))


def _faults(raw: Any, src: str, n: int) -> tuple[dict[str, Any], ...]:
    faults = tuple(
        _fault(_Table(entry, f"[[fault]] #{index}", src, sep=": "), index, n)
        for index, entry in enumerate(_array_of_tables(raw, "fault", src))
    )
    seen: dict[str, int] = {}
    for f in faults:
        name = f.get("name")
        if name is not None and name in seen:
            raise ScenarioError(
                f"{src}: [[fault]] #{f['index']}: name: {name!r} is already the name of"
                f" [[fault]] #{seen[name]}; expected a name of its own"
            )
        if name is not None:
            seen[name] = f["index"]
    return faults


def _fault(t: _Table, index: int, n: int) -> dict[str, Any]:
    t.check_keys(_FAULT_KEYS)
    kind = t.choice("kind", FAULT_KINDS)
    link = kind in LINK_FAULT_KINDS
    params = _FAULT_PARAMS[kind]
    distribution = None
    if kind == "delay":
        distribution = t.choice(
            "distribution",
            tuple(DELAY_DISTRIBUTIONS),
            default=DEFAULTS["fault.delay"]["distribution"],
        )
        params = params + DELAY_DISTRIBUTIONS[distribution]
    window = ("start_s", "start_iteration") if kind == "crash" else _WINDOW_S + _WINDOW_IT
    used = ("kind", "links" if link else "agents", *window, *params, "name")
    by = f'kind "{kind}"' if distribution is None else f'delay distribution "{distribution}"'
    t.check_keys(_FAULT_KEYS, used=used, by=by)

    out: dict[str, Any] = {"index": index, "kind": kind}
    if "name" in t.data:  # lets a study address this fault: "fault.<name>.<key>"
        out["name"] = t.string("name", _NAME_RE, _FAULT_NAME_EXPECTED)
    if link:
        out["scope"] = _scope(t, n)
    else:
        out["agents"] = _id_list(t, "agents", n)
    out.update(_window(t, kind))
    out["params"] = _fault_params(t, kind, distribution)
    return out


def _window(t: _Table, kind: str) -> dict[str, Any]:
    seconds = [k for k in _WINDOW_S if k in t.data]
    iterations = [k for k in _WINDOW_IT if k in t.data]
    if seconds and iterations:
        t.fail(
            None,
            f"window mixes {seconds[0]} with {iterations[0]}; expected start_s/duration_s"
            " or start_iteration/duration_iterations",
        )
    df = DEFAULTS["fault"]
    out: dict[str, Any] = {}
    if iterations:
        its = lim.WHY["iterations"]
        out["start_iteration"] = t.integer(
            "start_iteration", lo=0, hi=lim.ITERATIONS_MAX, default=df["start_iteration"], why=its
        )
        if kind != "crash":
            out["duration_iterations"] = t.integer(
                "duration_iterations", lo=0, hi=lim.ITERATIONS_MAX, default=None, why=its
            )
        duration = out.get("duration_iterations")
    else:
        out["start_s"] = t.number("start_s", lo=0.0, default=df["start_s"])
        if kind != "crash":
            out["duration_s"] = t.number("duration_s", lo=0.0, default=None)
        duration = out.get("duration_s")
    if kind == "pause" and duration is None:
        t.fail(None, "a pause needs duration_s or duration_iterations")
    return out


def _fault_params(t: _Table, kind: str, distribution: str | None) -> dict[str, Any]:
    if kind in LINK_FAULT_KINDS:
        # One validator for link faults, the agents' own: the scenario and the directives an
        # agent receives are checked by the same rules.
        own = _FAULT_PARAMS[kind] + (DELAY_DISTRIBUTIONS[distribution] if distribution else ())
        params = {k: t.data[k] for k in own if k in t.data}
        if distribution is not None:
            params["distribution"] = distribution
        return validate_fault_params(kind, params, f"{t.source}: {t.label}")
    if kind == "crash":
        return {
            "restart_after_s": t.number("restart_after_s", lo=0.0, default=None),
            "restart_state": t.choice(
                "restart_state",
                ("initial", "last"),
                default=DEFAULTS["fault.crash"]["restart_state"],
            ),
        }
    if kind == "slow":
        return {"factor": t.number("factor", lo=0.0, lo_open=True)}
    return {}  # outage, pause


def _scope(t: _Table, n: int) -> str | dict[str, Any]:
    if "links" not in t.data:
        t.fail("links", f"missing; a link fault needs a scope: {_SCOPE_FORMS}")
    value = t.data["links"]
    if isinstance(value, str):
        if value != "all":
            t.fail("links", f"expected {_SCOPE_FORMS}, got {_show(value)}")
        return "all"
    if not isinstance(value, Mapping) or frozenset(value) not in _SCOPE_KEYSETS:
        got = (
            f"a table with keys {', '.join(map(str, value))}"
            if isinstance(value, Mapping)
            else _show(value)
        )
        t.fail("links", f"expected {_SCOPE_FORMS}, got {got}")
    s = t.sub("links")
    out: dict[str, Any] = {}
    for end in ("from", "to"):
        if end in s.data:
            out[end] = s.integer(end, lo=0, hi=n - 1)
    if out.get("from") is not None and out.get("from") == out.get("to"):
        s.fail(None, f"from and to are both {out['from']}; expected a link between two agents")
    if "edge" in s.data:
        edge = _id_list(s, "edge", n)
        if len(edge) != 2:
            s.fail("edge", f"expected two different agent ids [a, b], got {_show(s.data['edge'])}")
        out["edge"] = edge
    if "between" in s.data:
        groups = s.data["between"]
        if not _is_seq(groups) or len(groups) < 2:
            s.fail("between", f"expected at least two groups of agent ids, got {_show(groups)}")
        out["between"] = [
            _id_list(s, f"between[{g}]", n, value=grp) for g, grp in enumerate(groups)
        ]
        seen: dict[int, int] = {}
        for g, group in enumerate(out["between"]):
            for a in group:
                if a in seen:
                    s.fail(
                        f"between[{g}]",
                        f"agent {a} is also in group {seen[a]}; expected disjoint groups",
                    )
                seen[a] = g
    if "longer_than" in s.data:
        out["longer_than"] = s.number("longer_than", lo=0.0, lo_open=True)
    return out


# --------------------------------------------------------------------------- value checks


class _Table:
    """One table being checked; every error it raises names the source and the key."""

    __slots__ = ("data", "label", "sep", "source")

    def __init__(self, data: Mapping[str, Any], label: str, source: str, sep: str = ".") -> None:
        self.data = data
        self.label = label
        self.source = source
        self.sep = sep

    def where(self, key: str | None) -> str:
        return self.label if key is None else f"{self.label}{self.sep}{key}"

    def fail(self, key: str | None, message: str) -> NoReturn:
        raise ScenarioError(f"{self.source}: {self.where(key)}: {message}")

    def sub(self, key: str) -> _Table:
        return _Table(self.data[key], self.where(key), self.source)

    def check_keys(
        self, allowed: Sequence[str], *, used: Sequence[str] | None = None, by: str = ""
    ) -> None:
        """Refuse keys outside ``allowed``; with ``used``, also keys that ``by`` does not take."""
        for key in self.data:
            if key not in allowed:
                hint = _did_you_mean(str(key), allowed)
                hint_text = f' (did you mean "{hint}"?)' if hint else ""
                self.fail(
                    None,
                    f'unknown key "{key}"; expected one of: {", ".join(allowed)}{hint_text}',
                )
            if used is not None and key not in used:
                self.fail(key, f"not used by {by}; it takes: {', '.join(used)}")

    def _get(self, key: str, default: Any, expected: str) -> tuple[Any, bool]:
        if key in self.data:
            return self.data[key], True
        if default is _REQUIRED:
            self.fail(key, f"missing; expected {expected}")
        return default, False

    def integer(
        self,
        key: str,
        *,
        lo: int | None = None,
        hi: int | None = None,
        default: Any = _REQUIRED,
        why: str = "",
    ) -> Any:
        """``why`` explains the upper bound; it is said only when the bound is passed."""
        expected = _range_text("an integer", lo, False, hi, False)
        value, given = self._get(key, default, expected)
        if not given:
            return value
        if not _is_int(value) or (lo is not None and value < lo):
            self.fail(key, f"expected {expected}, got {_show(value)}")
        if hi is not None and value > hi:
            self.fail(key, f"expected {expected}{_because(why)}, got {_show(value)}")
        return int(value)

    def number(
        self,
        key: str,
        *,
        lo: float | None = None,
        lo_open: bool = False,
        hi: float | None = None,
        hi_open: bool = False,
        default: Any = _REQUIRED,
        why: str = "",
    ) -> Any:
        """``why`` explains the upper bound; it is said only when the bound is passed."""
        expected = _range_text("a number", lo, lo_open, hi, hi_open)
        value, given = self._get(key, default, expected)
        if not given:
            return value
        if not _is_number(value):
            self.fail(key, f"expected {expected}, got {_show(value)}")
        x = float(value)
        if not math.isfinite(x):
            self.fail(key, f"expected a finite number, got {_show(value)}")
        below = lo is not None and (x <= lo if lo_open else x < lo)
        above = hi is not None and (x >= hi if hi_open else x > hi)
        if below or above:
            self.fail(
                key, f"expected {expected}{_because(why) if above else ''}, got {_show(value)}"
            )
        return x

    def choice(self, key: str, choices: Sequence[str], *, default: Any = _REQUIRED) -> Any:
        expected = "one of " + ", ".join(f'"{c}"' for c in choices)
        value, given = self._get(key, default, expected)
        if given and value not in choices:
            hint = _did_you_mean(value, choices) if isinstance(value, str) else None
            hint_text = f' (did you mean "{hint}"?)' if hint else ""
            self.fail(key, f"expected {expected}, got {_show(value)}{hint_text}")
        return value

    def string(
        self,
        key: str,
        pattern: re.Pattern[str] | None,
        expected: str,
        *,
        default: Any = _REQUIRED,
        check: Any = None,
    ) -> Any:
        value, given = self._get(key, default, expected)
        if not given:
            return value
        ok = isinstance(value, str) and value != ""
        ok = ok and (pattern is None or pattern.fullmatch(value) is not None)
        ok = ok and (check is None or check(value))
        if not ok:
            self.fail(key, f"expected {expected}, got {_show(value)}")
        return value

    def boolean(self, key: str, *, default: Any = _REQUIRED) -> Any:
        value, given = self._get(key, default, "true or false")
        if given and not isinstance(value, bool):
            self.fail(key, f"expected true or false, got {_show(value)}")
        return value


def _because(why: str) -> str:
    return f" ({why})" if why else ""


def _array_of_tables(raw: Any, name: str, src: str) -> list[Mapping[str, Any]]:
    if isinstance(raw, Mapping):
        raise ScenarioError(
            f"{src}: [{name}]: expected [[{name}]] tables (an array of tables), got one [{name}] table"
        )
    if not _is_seq(raw):
        raise ScenarioError(
            f"{src}: [[{name}]]: expected [[{name}]] tables (an array of tables), got {_show(raw)}"
        )
    for pos, entry in enumerate(raw):
        if not isinstance(entry, Mapping):
            raise ScenarioError(f"{src}: [[{name}]] #{pos}: expected a table, got {_show(entry)}")
    return list(raw)


def _vector(t: _Table, key: str, value: Any, length: int, why: str) -> list[float]:
    if not _is_seq(value) or len(value) != length:
        t.fail(key, f"expected a list of {length} numbers ({why}), got {_count(value)}")
    out = []
    for i, x in enumerate(value):
        if not _is_number(x) or not math.isfinite(float(x)):
            t.fail(f"{key}[{i}]", f"expected a finite number, got {_show(x)}")
        out.append(float(x))
    return out


def _spd_matrix(t: _Table, key: str, value: Any, d: int) -> list[list[float]]:
    """A d x d symmetric positive definite matrix, as lists of floats."""
    if not _is_seq(value) or len(value) != d:
        t.fail(
            key,
            f"expected a {d} x {d} matrix (a list of {d} rows, [swarm].dimension = {d}),"
            f" got {_count(value)}",
        )
    rows = [
        _vector(t, f"{key}[{i}]", row, d, f"[swarm].dimension = {d}") for i, row in enumerate(value)
    ]
    q = np.array(rows, dtype=float)
    scale = max(1.0, float(np.abs(q).max()))
    asym = np.abs(q - q.T)
    i, j = np.unravel_index(int(np.argmax(asym)), asym.shape)
    # entries written by hand are symmetric exactly; leave room only for rounding
    if asym[i, j] > 1e-12 * scale:
        t.fail(key, f"not symmetric: [{i}][{j}] = {q[i, j]:g} but [{j}][{i}] = {q[j, i]:g}")
    smallest = float(np.linalg.eigvalsh(q)[0])
    if smallest <= 1e-12 * scale:
        t.fail(key, f"not positive definite (smallest eigenvalue {smallest:.6g})")
    return rows


def _bounded_norm(t: _Table, key: str, vec: list[float]) -> list[float]:
    norm = math.hypot(*vec)
    if norm > lim.MAGNITUDE_MAX:
        t.fail(
            key,
            f"its norm is {norm:.4g}; expected at most {lim.MAGNITUDE_MAX:g}"
            f" ({lim.WHY['magnitude']})",
        )
    return vec


def _priority_vector(t: _Table, key: str, value: Any, n: int) -> list[float]:
    vec = _vector(t, key, value, n, f"one priority per agent, [swarm].agents = {n}")
    for i, x in enumerate(vec):
        if x < 0:
            t.fail(f"{key}[{i}]", f"expected a priority >= 0, got {_show(value[i])}")
    total = math.fsum(vec)
    if abs(total - 1.0) > PRIORITY_SUM_TOLERANCE:
        t.fail(key, f"entries sum to {total:.12g}; expected 1 within {_SUM_TOLERANCE_TEXT}")
    return vec


def _id_list(t: _Table, key: str, n: int, *, value: Any = _REQUIRED) -> list[int]:
    if value is _REQUIRED:
        value, _ = t._get(key, _REQUIRED, f"a non-empty list of agent ids in [0, {n - 1}]")
    if not _is_seq(value) or len(value) == 0:
        t.fail(key, f"expected a non-empty list of agent ids in [0, {n - 1}], got {_show(value)}")
    out: list[int] = []
    for i, a in enumerate(value):
        if not _is_int(a) or not 0 <= a < n:
            t.fail(f"{key}[{i}]", f"expected an agent id in [0, {n - 1}], got {_show(a)}")
        if int(a) in out:
            t.fail(f"{key}[{i}]", f"agent {a} is listed twice")
        out.append(int(a))
    return out


def _is_int(v: Any) -> bool:
    return isinstance(v, int | np.integer) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float | np.integer | np.floating) and not isinstance(v, bool)


def _is_seq(v: Any) -> bool:
    return isinstance(v, list | tuple) or (isinstance(v, np.ndarray) and v.ndim >= 1)


def _is_table(v: Any) -> bool:
    return isinstance(v, Mapping)


def _is_dotted(s: str) -> bool:
    return all(p.isidentifier() and not keyword.iskeyword(p) for p in s.split("."))


def _is_function_path(s: str) -> bool:
    module, sep, attr = s.partition(":")
    return bool(sep) and _is_dotted(module) and _is_dotted(attr)


def _count(v: Any) -> str:
    if _is_seq(v):
        return f"a list of {len(v)}"
    return _show(v)


def _show(v: Any) -> str:
    """A value as the user wrote it (TOML spelling), shortened."""
    if isinstance(v, bool | np.bool_):
        return "true" if v else "false"
    if isinstance(v, str):
        text = json.dumps(v, ensure_ascii=False)
        return text if len(text) <= 60 else text[:56] + '..."'
    if isinstance(v, Mapping):
        return "a table"
    if _is_seq(v):
        items = list(v)
        inner = ", ".join(_show(x) for x in items[:6])
        return f"[{inner}{', ...' if len(items) > 6 else ''}]"
    if isinstance(v, float | np.floating):
        return repr(float(v))
    return str(v)


def _range_text(kind: str, lo: float | None, lo_open: bool, hi: float | None, hi_open: bool) -> str:
    def num(x: float) -> str:
        return str(x) if isinstance(x, int) else f"{x:g}"

    if lo is not None and hi is not None:
        left, right = "(" if lo_open else "[", ")" if hi_open else "]"
        return f"{kind} in {left}{num(lo)}, {num(hi)}{right}"
    if lo is not None:
        return f"{kind} {'>' if lo_open else '>='} {num(lo)}"
    if hi is not None:
        return f"{kind} {'<' if hi_open else '<='} {num(hi)}"
    return kind


def _did_you_mean(word: str, choices: Sequence[str]) -> str | None:
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.75)
    return close[0] if close else None


# --------------------------------------------------------------------------- reference


def _lit(value: Any) -> str:
    return (
        "false"
        if value is False
        else "true"
        if value is True
        else (json.dumps(value) if isinstance(value, str) else repr(value))
    )


def _missing_policies_text() -> str:
    from node import algorithm_class, algorithm_names

    parts = []
    for name in algorithm_names():
        policies = algorithm_class(name).missing_policies
        if policies:
            parts.append(f"{name}: " + " or ".join(f'"{p}"' for p in policies))
    return "; ".join(parts)


def describe_keys() -> list[tuple[str, str, str]]:
    """Every scenario key as ``(key path, default, meaning)``, in file order.

    The default column quotes :data:`DEFAULTS` (TOML spelling) or says what happens when the
    key is absent. The README's scenario reference is generated from this list.
    """
    D = DEFAULTS
    shapes = ", ".join(TOPOLOGY_SHAPES)
    kinds = ", ".join(FAULT_KINDS)
    dists = ", ".join(DELAY_DISTRIBUTIONS)
    return [
        (
            "[swarm].name",
            "the file name without extension",
            'names the run directory; letters, digits, ".", "_", "-"',
        ),
        (
            "[swarm].agents",
            "required",
            f"number of agents (one OS process each), in [2, {lim.AGENTS_MAX}]",
        ),
        (
            "[swarm].dimension",
            _lit(D["swarm"]["dimension"]),
            f"length of every agent's decision vector, in [1, {lim.DIMENSION_MAX}]"
            f" ({lim.QUADRATIC_DIMENSION_MAX} for quadratic objectives)",
        ),
        (
            "[swarm].seed",
            "drawn at load time and written out",
            "fixes every random choice of the run (targets, graph, faults, timing)",
        ),
        (
            "[swarm].mode",
            _lit(D["swarm"]["mode"]),
            '"rounds" (wait for round k from every in-neighbour) or "async" (own clock)',
        ),
        (
            "[swarm].iterations",
            f"{_lit(D['swarm']['iterations'])} when seconds is absent",
            "budget: iterations per agent, in [1, 2**53]; exclusive with seconds",
        ),
        (
            "[swarm].seconds",
            "absent",
            "budget: seconds of the run phase, > 0 and at most 2**53 periods;"
            " exclusive with iterations",
        ),
        (
            "[swarm].tolerance",
            _lit(D["swarm"]["tolerance"]),
            "reached when gap <= tolerance * max(|F_star|, 1); > 0",
        ),
        ("[topology].shape", "required", f"one of {shapes}"),
        (
            "[topology].radius",
            "required by random-geometric",
            "link range between agents placed in the unit square, in (0, sqrt(2)]",
        ),
        (
            "[topology].p",
            "required by erdos-renyi and small-world",
            "edge probability in (0, 1] (erdos-renyi); rewiring probability in [0, 1] (small-world)",
        ),
        (
            "[topology].k",
            "required by small-world",
            "even number of ring-lattice neighbours before rewiring, 2 <= k < agents",
        ),
        ("[topology].rows", "agents / cols", "grid rows; rows * cols = agents"),
        ("[topology].cols", "agents / rows", "grid columns; rows * cols = agents"),
        (
            "[topology].file",
            "required by file",
            "edge list or GraphML file, relative to the scenario file",
        ),
        (
            "[topology].directed",
            "as the file says",
            "file: true reads one-way links, false makes every link two-way",
        ),
        ("[objective].kind", _lit(D["objective"]["kind"]), ", ".join(OBJECTIVE_KINDS)),
        (
            "[objective].spread",
            _lit(D["objective.quadratic"]["spread"]),
            "quadratic: scale of the targets drawn from the seed (unless given per agent),"
            f" in [0, {lim.MAGNITUDE_MAX:g} / sqrt(dimension)]",
        ),
        (
            "[objective].curvature",
            _lit(D["objective.quadratic"]["curvature"]),
            'quadratic: "identity" or "random" (SPD matrices drawn from the seed)',
        ),
        (
            "[objective].condition",
            f'{_lit(D["objective.quadratic.random"]["condition"])} with curvature = "random"',
            f"quadratic: condition number of the random curvatures, in [1, {_CONDITION_MAX:g}]",
        ),
        (
            "[objective].samples",
            _lit(D["objective.logistic"]["samples"]),
            "logistic, huber: local data points per agent, drawn from the seed, >= 1;"
            f" samples * (dimension + 1) at most {lim.SAMPLE_NUMBERS_MAX}",
        ),
        (
            "[objective].reg",
            f"{_lit(D['objective.logistic']['reg'])} (logistic), "
            f"{_lit(D['objective.huber']['reg'])} (huber)",
            "weight of the ridge term reg/2 |x|^2; > 0 for logistic, >= 0 for huber",
        ),
        (
            "[objective].delta",
            _lit(D["objective.huber"]["delta"]),
            "huber: threshold between the quadratic and the linear part, > 0",
        ),
        (
            "[objective].function",
            "required by custom",
            '"package.module:function" returning (value, gradient)',
        ),
        (
            "[priorities].initial",
            "uniform (no vectors)",
            "one priority vector per agent: n entries >= 0 summing to 1",
        ),
        (
            "[priorities].gain",
            "0.5 / max degree (set by the coordinator)",
            "priority averaging gain, >= 0 and below 1 / max degree; 0 keeps the initial vectors",
        ),
        ("[algorithm].name", _lit(D["algorithm"]["name"]), "a registered algorithm"),
        (
            "[algorithm].step",
            _lit(D["algorithm"]["step"]),
            "constant step > 0, or a table {rule, step | scale, power}",
        ),
        (
            "[algorithm].step.rule",
            _lit(D["algorithm.step"]["rule"]),
            '"constant" or "diminishing" (alpha_k = scale / (k + 1) ** power)',
        ),
        (
            "[algorithm].step.step",
            _lit(D["algorithm.step.constant"]["step"]),
            "constant rule: the step, > 0",
        ),
        (
            "[algorithm].step.scale",
            _lit(D["algorithm.step.diminishing"]["scale"]),
            "diminishing rule: scale, > 0",
        ),
        (
            "[algorithm].step.power",
            _lit(D["algorithm.step.diminishing"]["power"]),
            "diminishing rule: power, > 0",
        ),
        (
            "[algorithm].missing",
            "the algorithm's",
            "what a silent in-neighbour counts as, one of the algorithm's policies"
            f" ({_missing_policies_text()})",
        ),
        ("[algorithm].gain", "the algorithm's", "algorithm-specific gain, >= 0"),
        (
            "[algorithm].priority_averaging",
            "the algorithm's",
            "algorithm-specific priority averaging switch (true, false or a variant name)",
        ),
        (
            "[algorithm].mode",
            "the algorithm's",
            'algorithm-specific variant (push-sum: "average" or "optimize")',
        ),
        ("[algorithm].scale", "the algorithm's", "push-sum: alpha_t = scale / sqrt(t + 1), > 0"),
        (
            "[algorithm].step_rule",
            "the algorithm's",
            'push-sum: "plan" (use [algorithm].step) or a step of its own, like step',
        ),
        (
            "[algorithm].average_priorities",
            "the algorithm's",
            "ratio-consensus: also average the priority vectors",
        ),
        (
            "[algorithm].module",
            "absent",
            "dotted module every agent imports to register a custom algorithm",
        ),
        (
            "[algorithm].params",
            "absent",
            "table of options (numbers, strings, booleans) handed unchanged to the algorithm",
        ),
        (
            "[timing].period_ms",
            _lit(D["timing"]["period_ms"]),
            f"async mode: iteration period, in [{lim.PERIOD_MS_MIN:g}, {lim.POLL_MS_MAX}];"
            f" period_ms * speed * slow factor * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
        (
            "[timing].jitter",
            _lit(D["timing"]["jitter"]),
            "async mode: period jitter as a fraction of the period, in [0, 1)",
        ),
        (
            "[timing].speed_spread",
            _lit(D["timing"]["speed_spread"]),
            "async mode: speed factors drawn in [1 - s, 1 + s], s in [0, 1)",
        ),
        (
            "[timing].round_timeout_ms",
            _lit(D["timing"]["round_timeout_ms"]),
            f"rounds mode: how long to wait for an in-neighbour's round, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].every_ms",
            _lit(D["telemetry"]["every_ms"]),
            f"async mode: sample interval, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].every_iterations",
            _lit(D["telemetry"]["every_iterations"]),
            "sample every this many iterations, in [0, 2**53]; 0 = automatic",
        ),
        (
            "[telemetry].batch_ms",
            _lit(D["telemetry"]["batch_ms"]),
            f"how long an agent gathers samples before pushing a batch, in (0, {lim.POLL_MS_MAX}]",
        ),
        (
            "[telemetry].delay_samples",
            _lit(D["telemetry"]["delay_samples"]),
            "also report every injected delay (for delay statistics per link)",
        ),
        (
            "[network].transport",
            _lit(D["network"]["transport"]),
            '"ipc" (Unix sockets, used only when every agent runs on this machine) or "tcp"',
        ),
        ("[network].host", _lit(D["network"]["host"]), "address the agents bind on"),
        ("[[agent]].id", "required", "the agent these overrides are for, in [0, agents - 1]"),
        (
            "[[agent]].target",
            "drawn from the seed",
            f"quadratic: this agent's target, d numbers, norm at most {lim.MAGNITUDE_MAX:g}",
        ),
        (
            "[[agent]].curvature",
            "from [objective].curvature",
            "quadratic: this agent's d x d symmetric positive definite curvature",
        ),
        (
            "[[agent]].initial_state",
            "the coordinator's",
            f"this agent's starting x, d numbers, norm at most {lim.MAGNITUDE_MAX:g}",
        ),
        (
            "[[agent]].initial_priorities",
            "its row of [priorities].initial, else uniform",
            "this agent's priority vector: n entries >= 0 summing to 1",
        ),
        (
            "[[agent]].speed",
            "drawn from [timing].speed_spread",
            "async mode: this agent's speed factor (its period is multiplied by it), > 0;"
            f" period_ms * speed * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
        ("[[fault]].kind", "required", kinds),
        (
            "[[fault]].name",
            "none",
            "optional name, unique in the scenario; a study addresses the fault by it",
        ),
        ("[[fault]].links", "required by link faults", f"which directed links: {_SCOPE_FORMS}"),
        ("[[fault]].agents", "required by crash, pause, slow", "list of agent ids"),
        ("[[fault]].start_s", _lit(D["fault"]["start_s"]), "when it starts, seconds, >= 0"),
        ("[[fault]].duration_s", "until the end", "how long it lasts, seconds, >= 0"),
        (
            "[[fault]].start_iteration",
            _lit(D["fault"]["start_iteration"]),
            "when it starts, iterations, in [0, 2**53] (not mixed with the seconds keys)",
        ),
        (
            "[[fault]].duration_iterations",
            "until the end",
            "how long it lasts, iterations, in [0, 2**53]",
        ),
        (
            "[[fault]].rate",
            "required by loss, duplicate, corrupt",
            "probability per message, in [0, 1]",
        ),
        (
            "[[fault]].p_enter",
            "required by burst-loss",
            "Gilbert–Elliott: P(good -> bad) per message, in (0, 1]",
        ),
        (
            "[[fault]].p_leave",
            "required by burst-loss",
            "Gilbert–Elliott: P(bad -> good) per message, in (0, 1]",
        ),
        (
            "[[fault]].loss_good",
            _lit(D["fault.burst-loss"]["loss_good"]),
            "burst-loss: loss probability in the good state, in [0, 1]",
        ),
        (
            "[[fault]].loss_bad",
            _lit(D["fault.burst-loss"]["loss_bad"]),
            "burst-loss: loss probability in the bad state, in [0, 1]",
        ),
        (
            "[[fault]].distribution",
            _lit(D["fault.delay"]["distribution"]),
            f"delay: one of {dists}; every draw at most {lim.DELAY_MAX_MS:g} ms",
        ),
        ("[[fault]].ms", "required by constant", "delay: the constant delay, ms, >= 0"),
        ("[[fault]].low_ms", "required by uniform", "delay: lower bound, ms, >= 0"),
        ("[[fault]].high_ms", "required by uniform", "delay: upper bound, ms, >= low_ms"),
        ("[[fault]].mean_ms", "required by normal", "delay: mean, ms"),
        ("[[fault]].sd_ms", "required by normal", "delay: standard deviation, ms, > 0"),
        ("[[fault]].median_ms", "required by lognormal", "delay: median, ms, > 0"),
        ("[[fault]].sigma", "required by lognormal", "delay: sigma of the log, >= 0"),
        ("[[fault]].scale_ms", "required by pareto", "delay: minimum (scale), ms, > 0"),
        ("[[fault]].shape", "required by pareto", "delay: Pareto shape (tail index), > 0"),
        (
            "[[fault]].jitter_ms",
            _lit(D["fault.delay"]["jitter_ms"]),
            "delay: extra uniform jitter, ms, >= 0",
        ),
        ("[[fault]].fifo", _lit(D["fault.delay"]["fifo"]), "delay: keep the link's message order"),
        (
            "[[fault]].restart_after_s",
            "absent: stays dead",
            "crash: restart after this many seconds, >= 0",
        ),
        (
            "[[fault]].restart_state",
            _lit(D["fault.crash"]["restart_state"]),
            'crash: restart from the "initial" or the "last" reported state',
        ),
        (
            "[[fault]].factor",
            "required by slow",
            "slow: period multiplied by this, > 0; async mode: period_ms * speed * factor"
            f" * (1 + jitter) at most {lim.POLL_MS_MAX}",
        ),
    ]
