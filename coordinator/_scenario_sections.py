"""One reader per scenario table: each takes the table's raw values, checks every key and
returns the resolved values with every default filled.
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from coordinator import _limits as lim
from coordinator._scenario_schema import (
    _AGENT_KEYS,
    _ALGORITHM_KEYS,
    _CONDITION_MAX,
    _FAULT_KEYS,
    _FAULT_NAME_EXPECTED,
    _FAULT_PARAMS,
    _MIN_AGENTS,
    _NAME_RE,
    _OBJECTIVE_KEYS,
    _OBJECTIVE_PARAMS,
    _SCOPE_FORMS,
    _SCOPE_KEYSETS,
    _SHAPE_PARAMS,
    _STEP_KEYS,
    _TOPOLOGY_KEYS,
    _WINDOW_IT,
    _WINDOW_S,
    DEFAULTS,
    DELAY_DISTRIBUTIONS,
    FAULT_KINDS,
    LINK_FAULT_KINDS,
    OBJECTIVE_KINDS,
    TOPOLOGY_SHAPES,
    TRANSPORTS,
)
from coordinator._scenario_table import (
    _array_of_tables,
    _bounded_norm,
    _count,
    _id_list,
    _is_dotted,
    _is_function_path,
    _is_number,
    _is_seq,
    _priority_vector,
    _short_path,
    _show,
    _spd_matrix,
    _Table,
    _vector,
    is_file,
)
from node._links import validate_fault_params
from topologies._errors import ScenarioError


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
