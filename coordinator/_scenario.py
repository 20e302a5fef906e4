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

The loader is split along its concepts: the vocabulary and defaults
(:mod:`coordinator._scenario_schema`), checking one table's values
(:mod:`coordinator._scenario_table`), one reader per table
(:mod:`coordinator._scenario_sections`), the key reference
(:mod:`coordinator._scenario_reference`); this module holds the record and the loading.
"""

from __future__ import annotations

import copy
import os
import re
import secrets
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import tomli_w

from coordinator import _limits as lim
from coordinator._scenario_reference import describe_keys
from coordinator._scenario_schema import (
    _ARRAYS,
    _INT64_MAX,
    _NAME_EXPECTED,
    _NAME_RE,
    _SWARM_KEYS,
    _TABLES,
    DEFAULTS,
    DELAY_DISTRIBUTIONS,
    FAULT_KINDS,
    LINK_FAULT_KINDS,
    MODES,
    OBJECTIVE_KINDS,
    PROCESS_FAULT_KINDS,
    TOPOLOGY_SHAPES,
)
from coordinator._scenario_sections import (
    _agents,
    _algorithm,
    _faults,
    _network,
    _objective,
    _priorities,
    _section,
    _telemetry,
    _timing,
    check_topology_params,
)
from coordinator._scenario_table import (
    _did_you_mean,
    _is_seq,
    _is_table,
    _short_path,
    _show,
    is_file,
)
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
    "is_file",
    "load_scenario",
]


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
