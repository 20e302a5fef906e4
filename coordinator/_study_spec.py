"""Study files: load and validate, address scenario keys, fingerprint.

A study file is TOML of our own schema::

    [study]
    name = "buoy-loss"          # names the study directory (default: the file's stem)
    kind = "grid"               # "grid" | "breakpoint" | "front"
    scenario = "buoys.toml"     # the base scenario, relative to the study file
    seeds = 20                  # a count (base seed, base seed + 1, ...) or a list
    success = "reached tolerance"   # a verdict, a list of verdicts, or "not diverged"
    engine = "auto"             # "auto" | "batch" | "lockstep" | "processes"

    [scenario]                  # instead of study.scenario: the base scenario inline
    ...

    [vary]                      # grid: key -> list of values or {from, to, count}
    "fault.lossy.rate" = { from = 0.0, to = 0.5, count = 6 }

    [search]                    # breakpoint: one key between two bounds
    key = "algorithm.step"
    low = 0.3
    high = 1.0

    [front]                     # front: objective groups on a simplex lattice
    groups = [[0, 1], [2, 3]]
    divisions = 4

A key is dotted: ``section.key`` (``swarm.agents``, ``algorithm.step``, ``topology.k``,
``algorithm.params.lam``) or ``fault.<name>.<key>`` for the fault with that ``name`` (a
fault's position, ``fault.0.rate``, works too).
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from coordinator._scenario import Scenario, load_scenario
from topologies._errors import ScenarioError

__all__ = [
    "ENGINES",
    "KINDS",
    "StudySpec",
    "apply_values",
    "load_study_spec",
    "scenario_for",
]

KINDS = ("grid", "breakpoint", "front")
ENGINES = ("auto", "batch", "lockstep", "processes")
#: success criteria that are not a single verdict
NOT_DIVERGED = "not diverged"
_TOP = ("study", "scenario", "vary", "search", "front")
_STUDY_KEYS = ("name", "kind", "scenario", "seeds", "success", "engine")
_SEARCH_KEYS = (
    "key",
    "low",
    "high",
    "level",
    "resolution",
    "max_points",
    "max_seeds",
)
_FRONT_KEYS = ("groups", "divisions", "without_faults", "reference_point")
_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_MAX_RUNS = 100_000


@dataclass(frozen=True, slots=True, kw_only=True)
class StudySpec:
    """A validated study file; ``base`` is the base scenario as a plain TOML-like dict."""

    source: str
    base_dir: Path
    name: str
    kind: str
    #: the base scenario in the file's layout (raw keys, before defaults)
    base: dict[str, Any]
    #: where relative paths inside the base scenario are resolved
    scenario_dir: Path
    seeds: tuple[int, ...]
    #: verdicts that count as success, or ("not diverged",)
    success: tuple[str, ...]
    engine: str
    #: grid: key -> tuple of values
    vary: dict[str, tuple[Any, ...]] = field(default_factory=dict)
    #: breakpoint: key, low, high, level, resolution, max_points, max_seeds
    search: dict[str, Any] = field(default_factory=dict)
    #: front: groups, divisions, without_faults, reference_point
    front: dict[str, Any] = field(default_factory=dict)

    def resolved(self) -> dict[str, Any]:
        """The study as plain data with every default filled (what study.toml holds)."""
        doc: dict[str, Any] = {
            "study": {
                "name": self.name,
                "kind": self.kind,
                "seeds": list(self.seeds),
                "success": list(self.success),
                "engine": self.engine,
            },
            "scenario": copy.deepcopy(self.base),
        }
        if self.kind == "grid":
            doc["vary"] = {k: list(v) for k, v in self.vary.items()}
        elif self.kind == "breakpoint":
            doc["search"] = dict(self.search)
        else:
            doc["front"] = {k: v for k, v in copy.deepcopy(self.front).items() if v is not None}
        return doc

    def fingerprint(self) -> str:
        """SHA-256 of the resolved study: two study files that mean the same share it."""
        text = json.dumps(self.resolved(), sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()

    def is_success(self, summary: Mapping[str, Any]) -> bool:
        """Whether a run's summary counts as a success under this study's criterion."""
        verdict = summary.get("verdict")
        if self.success == (NOT_DIVERGED,):
            return summary.get("exit_code", 0) == 0 and verdict not in ("diverged", "failed")
        return verdict in self.success


def _fail(src: str, where: str, message: str) -> ScenarioError:
    return ScenarioError(f"{src}: {where}: {message}")


def load_study_spec(path: str | Path) -> StudySpec:
    """Load and validate a study file; errors name the file and the key."""
    path = Path(path)
    src = str(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ScenarioError(f"{src}: cannot read the study file: {exc.strerror or exc}") from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ScenarioError(f"{src}: invalid TOML: {exc}") from None
    return study_from_dict(raw, source=src, base_dir=path.resolve().parent, stem=path.stem)


def study_from_dict(
    raw: Mapping[str, Any], *, source: str, base_dir: Path, stem: str = "study"
) -> StudySpec:
    for key in raw:
        if key not in _TOP:
            raise _fail(source, f"[{key}]", f"unknown table; expected one of {', '.join(_TOP)}")
    st = raw.get("study")
    if not isinstance(st, Mapping):
        raise _fail(source, "[study]", "missing; a study file needs a [study] table")
    _check_keys(st, _STUDY_KEYS, source, "[study]")
    name = st.get("name", re.sub(r"[^A-Za-z0-9._-]+", "-", stem).strip("-._")[:64] or "study")
    if not isinstance(name, str) or not _NAME_RE.fullmatch(name):
        raise _fail(
            source, "[study].name", f"expected a name of letters, digits, . _ -; got {name!r}"
        )
    kind = st.get("kind")
    if kind not in KINDS:
        raise _fail(source, "[study].kind", f"expected one of {', '.join(KINDS)}; got {kind!r}")
    engine = st.get("engine", "auto")
    if engine not in ENGINES:
        raise _fail(
            source, "[study].engine", f"expected one of {', '.join(ENGINES)}; got {engine!r}"
        )

    base, scenario_dir, scen_src = _base_scenario(st, raw, source, base_dir)
    seeds = _seeds(st.get("seeds", 1), base, source)
    success = _success(st.get("success", "reached tolerance"), source)
    spec_kw: dict[str, Any] = {}
    if kind == "grid":
        spec_kw["vary"] = _vary(raw.get("vary"), source)
    elif kind == "breakpoint":
        spec_kw["search"] = _search(raw.get("search"), source, len(seeds))
    else:
        spec_kw["front"] = _front(raw.get("front"), source)
    for table in ("vary", "search", "front"):
        wanted = {"grid": "vary", "breakpoint": "search", "front": "front"}[kind]
        if table in raw and table != wanted:
            raise _fail(source, f"[{table}]", f'not used by kind "{kind}" (it reads [{wanted}])')
    spec = StudySpec(
        source=source,
        base_dir=base_dir,
        name=name,
        kind=kind,
        base=base,
        scenario_dir=scenario_dir,
        seeds=seeds,
        success=success,
        engine=engine,
        **spec_kw,
    )
    # Every run's scenario must load: check the corners now, before anything runs.
    base_scenario = scenario_for(spec, {}, seeds[0], where=f"{source}: base scenario ({scen_src})")
    if kind == "front":
        _check_groups(spec, base_scenario)
    elif kind == "grid":
        for key, values in spec.vary.items():
            for v in values:
                scenario_for(spec, {key: v}, seeds[0], where=f"{source}: [vary].{key} = {v!r}")
        total = math.prod(len(v) for v in spec.vary.values()) * len(seeds)
        if total > _MAX_RUNS:
            raise _fail(source, "[vary]", f"{total} runs; expected at most {_MAX_RUNS}")
    else:
        key = spec.search["key"]
        for v in (spec.search["low"], spec.search["high"]):
            scenario_for(spec, {key: v}, seeds[0], where=f"{source}: [search] {key} = {v!r}")
    return spec


def _check_keys(t: Mapping[str, Any], allowed: Sequence[str], src: str, where: str) -> None:
    for key in t:
        if key not in allowed:
            raise _fail(src, f"{where}.{key}", f"unknown key; expected one of {', '.join(allowed)}")


def _base_scenario(
    st: Mapping[str, Any], raw: Mapping[str, Any], src: str, base_dir: Path
) -> tuple[dict[str, Any], Path, str]:
    given = "scenario" in st
    inline = raw.get("scenario")
    if given == (inline is not None):
        raise _fail(
            src,
            "[study].scenario",
            "expected exactly one base scenario: a path in [study].scenario or a [scenario] table",
        )
    if inline is not None:
        if not isinstance(inline, Mapping):
            raise _fail(src, "[scenario]", "expected a table (the base scenario inline)")
        return copy.deepcopy(dict(inline)), base_dir, "inline [scenario]"
    value = st["scenario"]
    if not isinstance(value, str) or not value:
        raise _fail(src, "[study].scenario", f"expected a path to a scenario file; got {value!r}")
    path = (base_dir / value).resolve()
    try:
        scen = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise _fail(src, "[study].scenario", f"cannot read {path}: {exc.strerror or exc}") from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise _fail(src, "[study].scenario", f"{path}: invalid TOML: {exc}") from None
    return scen, path.parent, str(path)


def _seeds(value: Any, base: Mapping[str, Any], src: str) -> tuple[int, ...]:
    if isinstance(value, bool):
        value = None
    if isinstance(value, int):
        if not 1 <= value <= 10_000:
            raise _fail(src, "[study].seeds", f"expected a count in [1, 10000]; got {value}")
        first = base.get("swarm", {}).get("seed", 0)
        first = first if isinstance(first, int) and not isinstance(first, bool) else 0
        return tuple(first + i for i in range(value))
    if (
        isinstance(value, list)
        and value
        and all(isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in value)
    ):
        if len(set(value)) != len(value):
            raise _fail(src, "[study].seeds", "the list repeats a seed; expected distinct seeds")
        return tuple(value)
    raise _fail(src, "[study].seeds", f"expected a count or a list of seeds >= 0; got {value!r}")


def _success(value: Any, src: str) -> tuple[str, ...]:
    if isinstance(value, str) and value:
        return (value,)
    if isinstance(value, list) and value and all(isinstance(v, str) and v for v in value):
        if NOT_DIVERGED in value and len(value) > 1:
            raise _fail(src, "[study].success", f'"{NOT_DIVERGED}" stands alone')
        return tuple(value)
    raise _fail(
        src,
        "[study].success",
        f'expected a verdict, a list of verdicts or "{NOT_DIVERGED}"; got {value!r}',
    )


def _values(key: str, value: Any, src: str, where: str) -> tuple[Any, ...]:
    if isinstance(value, list) and value:
        if len(set(map(repr, value))) != len(value):
            raise _fail(src, where, "a value repeats; expected distinct values")
        return tuple(value)
    if isinstance(value, Mapping):
        _check_keys(value, ("from", "to", "count"), src, where)
        lo, hi, count = value.get("from"), value.get("to"), value.get("count")
        if not all(_num(v) for v in (lo, hi)) or not isinstance(count, int) or count < 2:
            raise _fail(src, where, "expected { from = number, to = number, count = n >= 2 }")
        # evenly spaced, both ends included, each value rounded to 12 significant digits
        return tuple(float(f"{lo + (hi - lo) * i / (count - 1):.12g}") for i in range(count))
    raise _fail(src, where, "expected a list of values or { from, to, count }")


def _num(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def _vary(t: Any, src: str) -> dict[str, tuple[Any, ...]]:
    if not isinstance(t, Mapping) or not t:
        raise _fail(src, "[vary]", "missing; a grid study varies at least one key")
    return {str(k): _values(str(k), v, src, f"[vary].{k}") for k, v in t.items()}


def _search(t: Any, src: str, n_seeds: int) -> dict[str, Any]:
    if not isinstance(t, Mapping):
        raise _fail(src, "[search]", "missing; a breakpoint study needs key, low and high")
    _check_keys(t, _SEARCH_KEYS, src, "[search]")
    key = t.get("key")
    if not isinstance(key, str) or not key:
        raise _fail(src, "[search].key", "expected the dotted key to search along")
    lo, hi = t.get("low"), t.get("high")
    if not (_num(lo) and _num(hi) and lo < hi):
        raise _fail(src, "[search]", f"expected numbers low < high; got {lo!r}, {hi!r}")
    level = t.get("level", 0.5)
    if not (_num(level) and 0 < level < 1):
        raise _fail(src, "[search].level", f"expected a success rate in (0, 1); got {level!r}")
    resolution = t.get("resolution", (hi - lo) / 64)
    if not (_num(resolution) and resolution > 0):
        raise _fail(src, "[search].resolution", f"expected a number > 0; got {resolution!r}")
    max_points = t.get("max_points", 16)
    if not (isinstance(max_points, int) and max_points >= 3):
        raise _fail(src, "[search].max_points", f"expected an integer >= 3; got {max_points!r}")
    max_seeds = t.get("max_seeds", 4 * n_seeds)
    if not (isinstance(max_seeds, int) and max_seeds >= n_seeds):
        raise _fail(
            src,
            "[search].max_seeds",
            f"expected an integer >= seeds ({n_seeds}); got {max_seeds!r}",
        )
    return {
        "key": key,
        "low": float(lo),
        "high": float(hi),
        "level": float(level),
        "resolution": float(resolution),
        "max_points": max_points,
        "max_seeds": max_seeds,
    }


def _front(t: Any, src: str) -> dict[str, Any]:
    t = {} if t is None else t
    if not isinstance(t, Mapping):
        raise _fail(src, "[front]", "expected a table")
    _check_keys(t, _FRONT_KEYS, src, "[front]")
    groups = t.get("groups")
    if groups is not None and not (
        isinstance(groups, list)
        and len(groups) >= 2
        and all(isinstance(g, list) and g and all(isinstance(i, int) for i in g) for g in groups)
    ):
        raise _fail(src, "[front].groups", "expected at least two non-empty lists of agent ids")
    divisions = t.get("divisions", 4)
    if not (isinstance(divisions, int) and 1 <= divisions <= 100):
        raise _fail(src, "[front].divisions", f"expected an integer in [1, 100]; got {divisions!r}")
    without = t.get("without_faults", False)
    if not isinstance(without, bool):
        raise _fail(src, "[front].without_faults", f"expected true or false; got {without!r}")
    ref = t.get("reference_point")
    if ref is not None and not (isinstance(ref, list) and all(_num(v) for v in ref)):
        raise _fail(src, "[front].reference_point", "expected one number per group")
    return {
        "groups": groups,
        "divisions": divisions,
        "without_faults": without,
        "reference_point": ref,
    }


def _check_groups(spec: StudySpec, s: Scenario) -> None:
    n = s.agents
    groups = spec.front["groups"]
    src = spec.source
    if groups is None:
        if n > 3:
            raise _fail(
                src, "[front].groups", f"missing; with {n} agents (more than 3) name the groups"
            )
        groups = [[i] for i in range(n)]
        spec.front["groups"] = groups
    flat = [i for g in groups for i in g]
    bad = [i for i in flat if not 0 <= i < n]
    if bad:
        raise _fail(src, "[front].groups", f"agent ids {bad} are not in [0, {n - 1}]")
    if len(set(flat)) != len(flat):
        raise _fail(src, "[front].groups", "an agent is in two groups; expected disjoint groups")
    if sorted(flat) != list(range(n)):
        missing = sorted(set(range(n)) - set(flat))
        raise _fail(src, "[front].groups", f"agents {missing} are in no group")
    ref = spec.front["reference_point"]
    if ref is not None and len(ref) != len(groups):
        raise _fail(
            src, "[front].reference_point", f"expected {len(groups)} numbers (one per group)"
        )


# --------------------------------------------------------------------------- key addressing


def apply_values(doc: dict[str, Any], values: Mapping[str, Any], where: str = "") -> dict[str, Any]:
    """A deep copy of scenario ``doc`` with each dotted key of ``values`` set."""
    out = copy.deepcopy(doc)
    for key, value in values.items():
        _set(out, key, value, where)
    return out


def _set(doc: dict[str, Any], key: str, value: Any, where: str) -> None:
    parts = key.split(".")
    if len(parts) < 2 or not all(parts):
        raise ScenarioError(f"{where}: key {key!r}: expected section.key or fault.<name>.<key>")
    if parts[0] == "fault":
        if len(parts) < 3:
            raise ScenarioError(f"{where}: key {key!r}: expected fault.<name>.<key>")
        faults = doc.get("fault", [])
        names = [f.get("name") for f in faults]
        if parts[1] in names:
            table = faults[names.index(parts[1])]
        elif parts[1].isdigit() and int(parts[1]) < len(faults):
            table = faults[int(parts[1])]
        else:
            known = ", ".join(repr(n) for n in names if n) or "none"
            raise ScenarioError(
                f"{where}: key {key!r}: the base scenario has no fault named {parts[1]!r}"
                f" (named faults: {known}; give the [[fault]] a name = ...)"
            )
        parts = parts[2:]
    else:
        table = doc
    for p in parts[:-1]:
        nxt = table.get(p)
        if nxt is None:
            nxt = table[p] = {}
        if not isinstance(nxt, dict):
            raise ScenarioError(f"{where}: key {key!r}: {p!r} is not a table")
        table = nxt
    table[parts[-1]] = value


def scenario_for(
    spec: StudySpec, values: Mapping[str, Any], seed: int, *, where: str | None = None
) -> Scenario:
    """The validated scenario of one run: the base with ``values`` set and the seed fixed."""
    where = where or f"{spec.source}: run {dict(values)!r} seed {seed}"
    doc = apply_values(spec.base, values, where)
    doc.setdefault("swarm", {})["seed"] = int(seed)
    try:
        return load_scenario(doc, source=where, base_dir=spec.scenario_dir)
    except ScenarioError as exc:
        raise ScenarioError(str(exc)) from None


def scenario_doc(spec: StudySpec, values: Mapping[str, Any], seed: int) -> dict[str, Any]:
    """The raw scenario dict of one run (what the worker loads)."""
    doc = apply_values(spec.base, values, spec.source)
    doc.setdefault("swarm", {})["seed"] = int(seed)
    return doc
