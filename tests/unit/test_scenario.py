"""Scenario loading: defaults, round trips, path resolution, and every refusal naming its key."""

from __future__ import annotations

import copy
import dataclasses
import math
import re
import tomllib
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import pytest
import tomli_w

import topologies
from coordinator._scenario import (
    DEFAULTS,
    Scenario,
    check_topology_params,
    describe_keys,
    load_scenario,
)
from coordinator._scopes import links_in_scope
from node._links import validate_fault_params
from topologies._errors import ScenarioError

HERE = Path(__file__).parent / "scenarios"
BASE: dict[str, Any] = {"swarm": {"agents": 6, "seed": 1}, "topology": {"shape": "ring"}}
SCOPE_FORMS = (
    '"all" | {from = a, to = b} | {edge = [a, b]} | {from = a} | {to = a}'
    " | {between = [[...], [...], ...]} | {longer_than = r}"
)


def exact(message: str) -> str:
    """A pattern matching the whole error message and nothing else."""
    return "^" + re.escape(message) + "$"


def doc(**tables: Any) -> dict[str, Any]:
    """BASE with some tables merged in; a value of None removes that key or table."""
    out = copy.deepcopy(BASE)
    for name, table in tables.items():
        if table is None:
            out.pop(name, None)
        elif isinstance(table, dict) and isinstance(out.get(name), dict):
            for key, value in table.items():
                if value is None:
                    out[name].pop(key, None)
                else:
                    out[name][key] = value
        else:
            out[name] = table
    return out


@pytest.fixture
def dock(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    """Write a scenario as ./dock.toml (so messages start with "dock.toml: ") and load it."""
    monkeypatch.chdir(tmp_path)

    def load(content: dict[str, Any] | str) -> Scenario:
        text = content if isinstance(content, str) else tomli_w.dumps(content)
        Path("dock.toml").write_text(text, encoding="utf-8")
        return load_scenario("dock.toml")

    return load


def key_paths(table: dict[str, Any]) -> set[str]:
    """The key paths of a scenario document, in describe_keys() spelling."""
    paths: set[str] = set()
    for name, value in table.items():
        entries = value if isinstance(value, list) else [value]
        head = f"[[{name}]]" if isinstance(value, list) else f"[{name}]"
        for entry in entries:
            for key, v in entry.items():
                # a scope or a step rule is one key whatever its form
                if isinstance(v, dict) and key not in ("links", "step_rule"):
                    paths.update(f"{head}.{key}.{k}" for k in v)
                paths.add(f"{head}.{key}")
    return paths


# Valid scenarios covering every shape, kind, rule, distribution and fault kind.
VARIANTS: list[dict[str, Any]] = [
    doc(swarm={"iterations": 10, "name": "variant-a"}, topology={"shape": "path"}),
    doc(topology={"shape": "grid", "rows": 2, "cols": 3}),
    doc(topology={"shape": "grid", "cols": 2}),
    doc(topology={"shape": "star"}, objective={"kind": "logistic", "samples": 8, "reg": 0.1}),
    doc(
        topology={"shape": "complete"},
        objective={"kind": "huber", "samples": 12, "delta": 0.5, "reg": 0.0},
    ),
    doc(
        topology={"shape": "random-geometric", "radius": 0.9},
        objective={"kind": "custom", "function": "my_pkg.objectives:bowl"},
    ),
    doc(
        topology={"shape": "erdos-renyi", "p": 0.9},
        algorithm={"step": {"rule": "constant", "step": 0.02}},
    ),
    doc(
        topology={"shape": "small-world", "k": 2, "p": 0.1},
        algorithm={"name": "dgd", "step": {"rule": "diminishing"}, "missing": "reuse"},
    ),
    doc(
        algorithm={
            "name": "my-method",
            "module": "my_pkg.methods",
            "gain": 0.1,
            "priority_averaging": "ratio",
            "mode": "optimize",
            "scale": 2.0,
            "step_rule": "plan",
            "average_priorities": True,
        }
    ),
    doc(algorithm={"name": "my-method", "module": "m", "step_rule": {"rule": "diminishing"}}),
    doc(
        fault=[
            {"kind": "duplicate", "links": {"from": 1, "to": 2}, "rate": 0.1},
            {"kind": "corrupt", "links": {"to": 4}, "rate": 0.01, "start_iteration": 3},
            {"kind": "delay", "links": "all", "ms": 5},
            {"kind": "delay", "links": "all", "distribution": "uniform", "low_ms": 1, "high_ms": 2},
            {"kind": "delay", "links": "all", "distribution": "normal", "mean_ms": 3, "sd_ms": 1},
            {"kind": "delay", "links": "all", "distribution": "pareto", "scale_ms": 1, "shape": 2},
            {
                "kind": "burst-loss",
                "links": {"longer_than": 0.3},
                "p_enter": 0.1,
                "p_leave": 0.3,
                "loss_good": 0.01,
                "loss_bad": 0.9,
            },
            {"kind": "crash", "agents": [0], "start_iteration": 50},
            {"kind": "pause", "agents": [1], "start_iteration": 10, "duration_iterations": 5},
            {"kind": "slow", "agents": [2], "factor": 0.5, "duration_s": 1.0},
        ]
    ),
    doc(network={"transport": "tcp", "host": "lab-pc-3.local"}),
]


# ------------------------------------------------------------------- valid scenarios


def test_minimal_scenario_gets_every_default() -> None:
    s = load_scenario(HERE / "minimal.toml")
    assert s.name == "minimal"  # the file name without extension
    assert s.agents == 6
    assert s.dimension == DEFAULTS["swarm"]["dimension"] == 2
    assert s.mode == DEFAULTS["swarm"]["mode"] == "rounds"
    assert (s.iterations, s.seconds) == (2000, None)
    assert s.tolerance == DEFAULTS["swarm"]["tolerance"] == 1e-3
    # a seed is drawn at load time and kept in the record, so the run is reproducible
    assert isinstance(s.seed, int) and 0 <= s.seed < 2**32
    assert s.topology == {"shape": "ring"}
    assert s.objective == {"kind": "quadratic", "spread": 10.0, "curvature": "identity"}
    assert s.priorities == {"initial": None, "gain": None}
    assert s.algorithm == {"name": "dgd", "step": 0.05}
    assert s.timing == DEFAULTS["timing"]
    assert s.timing == {
        "period_ms": 1.0,
        "jitter": 0.1,
        "speed_spread": 0.0,
        "round_timeout_ms": 500.0,
    }
    assert s.telemetry == DEFAULTS["telemetry"]
    assert (s.telemetry["every_ms"], s.telemetry["every_iterations"]) == (20.0, 0)
    # ipc between local agents; the coordinator falls back to tcp for remote ones
    assert s.network == {"transport": "ipc", "host": "127.0.0.1"}
    assert s.faults == ()
    assert s.agent_overrides == {}
    assert s.source == str(HERE / "minimal.toml")
    assert s.base_dir == HERE.resolve()


def test_scenario_is_frozen() -> None:
    s = load_scenario(BASE)
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.agents = 3  # type: ignore[misc]


def test_resolved_toml_fixes_the_drawn_seed() -> None:
    s = load_scenario(HERE / "minimal.toml")
    text = s.to_toml()
    assert tomllib.loads(text)["swarm"]["seed"] == s.seed
    assert load_scenario(tomllib.loads(text)) == s


def test_full_scenario_values_and_defaults() -> None:
    s = load_scenario(HERE / "full.toml")
    assert (s.name, s.mode, s.iterations, s.seconds, s.seed) == ("lab-floor", "async", None, 4.5, 7)
    assert s.objective == {
        "kind": "quadratic",
        "spread": 5.0,
        "curvature": "random",
        "condition": 8.0,
    }
    assert s.algorithm["step"] == {"rule": "diminishing", "scale": 0.4, "power": 0.7}
    assert s.timing["round_timeout_ms"] == 250.0 and isinstance(s.timing["round_timeout_ms"], float)
    assert list(s.agent_overrides) == [0, 3]  # sorted by id, "id" itself dropped
    assert s.agent_overrides[0] == {"initial_state": [3.0, 3.0]}
    assert s.agent_overrides[3]["curvature"] == [[2.0, 0.5], [0.5, 1.0]]
    loss, burst, delay, outage, crash, pause, slow = s.faults
    assert [f["index"] for f in s.faults] == list(range(7))
    assert loss == {
        "index": 0,
        "kind": "loss",
        "name": "background-loss",
        "scope": "all",
        "start_s": 1.0,
        "duration_s": 2.0,
        "params": {"rate": 0.2},
    }
    # defaults filled: the whole run, Gilbert's simple model (loss only in the bad state)
    assert burst["scope"] == {"edge": [0, 1]}
    assert (burst["start_s"], burst["duration_s"]) == (0.0, None)
    assert burst["params"] == {"p_enter": 0.05, "p_leave": 0.5, "loss_good": 0.0, "loss_bad": 1.0}
    assert delay["scope"] == {"from": 2}
    assert (delay["start_iteration"], delay["duration_iterations"]) == (100, 50)
    assert "start_s" not in delay
    assert delay["params"] == {
        "distribution": "lognormal",
        "median_ms": 4.0,
        "sigma": 0.5,
        "jitter_ms": 1.0,
        "fifo": True,
    }
    assert outage["scope"] == {"between": [[0, 1, 2], [3, 4, 5]]} and outage["params"] == {}
    assert crash == {
        "index": 4,
        "kind": "crash",
        "agents": [5],
        "start_s": 1.5,
        "params": {"restart_after_s": 1.0, "restart_state": "last"},
    }
    assert pause["agents"] == [4] and pause["duration_s"] == 0.25
    assert slow["params"] == {"factor": 3.0} and slow["duration_s"] is None


def test_round_trip_through_toml(tmp_path: Path) -> None:
    for source in (HERE / "minimal.toml", HERE / "full.toml", *VARIANTS):
        s = load_scenario(source)
        text = s.to_toml()
        assert text.startswith("# swarmrig resolved scenario")
        assert tomllib.loads(text) == s.to_dict()
        # written elsewhere (as into a run directory): every path in it is absolute already
        out = tmp_path / "run" / "scenario.toml"
        out.parent.mkdir(exist_ok=True)
        out.write_text(text, encoding="utf-8")
        back = load_scenario(out)
        assert back == s
        assert back.source != s.source
        assert back.to_toml().splitlines()[1:] == text.splitlines()[1:]
        assert load_scenario(s.to_dict()) == s


def test_resolved_toml_is_compact() -> None:
    # a 12-agent priority table stays one row per agent
    n = 12
    rows = np.full((n, n), 1.0 / n).tolist()
    s = load_scenario(
        {
            "swarm": {"agents": n, "seed": 3},
            "topology": {"shape": "ring"},
            "priorities": {"initial": rows},
        }
    )
    text = s.to_toml()
    assert len(text.splitlines()) < 60
    assert load_scenario(tomllib.loads(text)) == s


def test_relative_paths_resolve_against_the_scenario_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    lab = tmp_path / "lab"
    (lab / "graphs").mkdir(parents=True)
    nx.write_edgelist(nx.cycle_graph(6), lab / "graphs" / "floor.edges", data=False)
    (lab / "dock.toml").write_text(
        tomli_w.dumps(doc(topology={"shape": "file", "file": "graphs/floor.edges"})),
        encoding="utf-8",
    )
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    s = load_scenario(Path("..") / "lab" / "dock.toml")
    assert s.topology["file"] == str((lab / "graphs" / "floor.edges").resolve())
    assert Path(s.topology["file"]).is_absolute()
    assert s.base_dir == lab.resolve()
    # the resolved file can be moved anywhere and still points at the graph
    moved = tmp_path / "moved.toml"
    moved.write_text(s.to_toml(), encoding="utf-8")
    assert load_scenario(moved).topology["file"] == s.topology["file"]
    # a dict resolves against base_dir, else the current directory
    d = doc(topology={"shape": "file", "file": "graphs/floor.edges"})
    assert load_scenario(d, base_dir=lab).topology == s.topology
    with pytest.raises(
        ScenarioError, match=r'^<dict>: \[topology\]\.file: "graphs/floor.edges" is not a file'
    ):
        load_scenario(d)


def test_loaded_file_topology_feeds_the_builder() -> None:
    s = load_scenario(HERE / "full.toml")
    params = {k: v for k, v in s.topology.items() if k != "shape"}
    top = topologies.load(params["file"], directed=params["directed"])
    assert top.n == s.agents
    # every link scope that passed the structural check resolves on the real graph
    for f in s.faults:
        if "scope" in f:
            assert links_in_scope(f["scope"], top, where="test"), f


@pytest.mark.parametrize("variant", [v for v in VARIANTS if v["topology"]["shape"] != "file"])
def test_checked_shapes_are_accepted_by_the_builder(variant: dict[str, Any]) -> None:
    s = load_scenario(variant)
    params = {k: v for k, v in s.topology.items() if k != "shape"}
    top = topologies.build(s.topology["shape"], s.agents, seed=s.seed, **params)
    assert top.n == s.agents


def test_link_fault_params_match_the_link_models() -> None:
    faults = [*load_scenario(HERE / "full.toml").faults, *load_scenario(VARIANTS[10]).faults]
    link = [f for f in faults if "scope" in f]
    assert {f["kind"] for f in link} == {
        "loss",
        "burst-loss",
        "delay",
        "duplicate",
        "corrupt",
        "outage",
    }
    for f in link:
        # the link models fill the same defaults, so nothing changes on the way
        assert validate_fault_params(f["kind"], f["params"], f"fault {f['index']}") == f["params"]


def test_python_api_accepts_numpy_values() -> None:
    s = load_scenario(
        doc(
            swarm={"agents": np.int64(6), "dimension": 2},
            priorities={"initial": np.full((6, 6), 1 / 6)},
            agent=[{"id": np.int32(2), "target": np.array([1.0, 2.0]), "curvature": np.eye(2)}],
        )
    )
    assert s.agents == 6 and type(s.agents) is int
    assert s.agent_overrides == {2: {"target": [1.0, 2.0], "curvature": [[1.0, 0.0], [0.0, 1.0]]}}
    assert tomllib.loads(s.to_toml()) == s.to_dict()


def test_priority_sums_are_checked_within_1e_9() -> None:
    third = [1 / 3, 1 / 3, 1 / 3]  # sums to one only up to rounding
    ok = {"swarm": {"agents": 3, "seed": 0}, "topology": {"shape": "ring"}}
    assert load_scenario({**ok, "priorities": {"initial": [third] * 3}}).priorities["initial"]
    near = [0.5, 0.5 + 5e-10, 0.0]
    load_scenario({**ok, "priorities": {"initial": [near] * 3}})
    far = [0.5, 0.5 + 2e-9, 0.0]
    with pytest.raises(
        ScenarioError, match=r"\[priorities\]\.initial\[0\]: entries sum to 1\.000000002"
    ):
        load_scenario({**ok, "priorities": {"initial": [far] * 3}})


def test_dict_errors_name_the_source() -> None:
    with pytest.raises(
        ScenarioError,
        match=exact("<dict>: [swarm].agents: missing; expected an integer in [2, 4096]"),
    ):
        load_scenario({"topology": {"shape": "ring"}})
    with pytest.raises(
        ScenarioError,
        match=exact("notebook cell 3: [swarm].agents: expected an integer in [2, 4096], got 1"),
    ):
        load_scenario(doc(swarm={"agents": 1}), source="notebook cell 3")


def test_check_topology_params_alone(tmp_path: Path) -> None:
    assert check_topology_params({"shape": "grid", "rows": 3}, agents=12, base_dir=tmp_path) == {
        "shape": "grid",
        "rows": 3,
        "cols": 4,
    }
    with pytest.raises(
        ScenarioError, match=exact("<dict>: [topology].p: missing; expected a number in [0, 1]")
    ):
        check_topology_params({"shape": "small-world", "k": 2}, agents=5, base_dir=tmp_path)


# ------------------------------------------------------------------- the key reference


def test_describe_keys_covers_exactly_the_accepted_keys() -> None:
    described = [path for path, _, _ in describe_keys()]
    assert len(described) == len(set(described))
    used: set[str] = set()
    for source in (tomllib.loads((HERE / "full.toml").read_text()), *VARIANTS):
        resolved = load_scenario(source, base_dir=HERE).to_dict()
        used |= key_paths(source) | key_paths(resolved)
    # [algorithm].params is free-form: its own keys belong to the user's algorithm
    used = {"[algorithm].params" if u.startswith("[algorithm].params.") else u for u in used}
    # every key the examples use is documented, and every documented key is exercised here
    assert used == set(described)


def test_every_default_is_quoted_in_the_reference() -> None:
    described = {path: default for path, default, _ in describe_keys()}
    for section, values in DEFAULTS.items():
        table = section.split(".")[0]
        head = "[[fault]]" if table == "fault" else f"[{table}]"
        prefix = f"{head}.step." if section.startswith("algorithm.step") else f"{head}."
        for key, value in values.items():
            if value is None:
                continue
            literal = tomli_w.dumps({"v": value})[4:-1]  # TOML spelling of the value
            assert literal in described[prefix + key], (section, key, described[prefix + key])


def test_every_meaning_is_written() -> None:
    for path, default, meaning in describe_keys():
        assert re.fullmatch(r"\[\[?[a-z]+\]\]?\.[a-z_]+(\.[a-z_]+)?", path), path
        assert default and meaning, path


# ------------------------------------------------------------------- refusals

MALFORMED: list[tuple[str, dict[str, Any], str]] = [
    # unknown tables and keys, top level and nested
    (
        "unknown table",
        {**BASE, "swarmm": {"agents": 3}},
        exact(
            "dock.toml: unknown table [swarmm]; expected one of: [swarm], [topology], [objective],"
            " [priorities], [algorithm], [timing], [telemetry], [network], [[agent]], [[fault]]"
            " (did you mean [swarm]?)"
        ),
    ),
    (
        "unknown key",
        doc(topology={"shape": "random-geometric", "radiuss": 0.4}),
        exact(
            'dock.toml: [topology]: unknown key "radiuss"; expected one of: shape, radius, p, k,'
            ' rows, cols, file, directed (did you mean "radius"?)'
        ),
    ),
    (
        "unknown nested key",
        doc(algorithm={"step": {"rule": "diminishing", "scal": 0.5}}),
        exact(
            'dock.toml: [algorithm].step: unknown key "scal"; expected one of: rule, step, scale,'
            ' power (did you mean "scale"?)'
        ),
    ),
    (
        "unknown agent key",
        doc(agent=[{"id": 1, "targett": [0, 0]}]),
        exact(
            'dock.toml: [[agent]] id=1: unknown key "targett"; expected one of: id, target,'
            ' curvature, initial_state, initial_priorities, speed (did you mean "target"?)'
        ),
    ),
    (
        "unknown fault key",
        doc(fault=[{"kind": "loss", "links": "all", "rat": 0.1}]),
        r'^dock\.toml: \[\[fault\]\] #0: unknown key "rat"; expected one of: kind, links, agents,'
        r' start_s, .*, factor, ms, .* \(did you mean "rate"\?\)$',
    ),
    (
        "key of another shape",
        doc(topology={"shape": "ring", "radius": 0.4}),
        exact('dock.toml: [topology].radius: not used by shape "ring"; it takes: shape'),
    ),
    (
        "key of another kind",
        doc(objective={"kind": "logistic", "spread": 3.0}),
        exact(
            'dock.toml: [objective].spread: not used by kind "logistic"; it takes: kind, samples, reg'
        ),
    ),
    # wrong types
    (
        "string for integer",
        doc(swarm={"agents": "twelve"}),
        exact('dock.toml: [swarm].agents: expected an integer in [2, 4096], got "twelve"'),
    ),
    (
        "float for integer",
        doc(swarm={"dimension": 2.0}),
        exact("dock.toml: [swarm].dimension: expected an integer in [1, 63000], got 2.0"),
    ),
    (
        "bool for integer",
        doc(swarm={"seed": True}),
        exact("dock.toml: [swarm].seed: expected an integer in [0, 9223372036854775807], got true"),
    ),
    (
        "string for number",
        doc(swarm={"tolerance": "small"}),
        exact('dock.toml: [swarm].tolerance: expected a number > 0, got "small"'),
    ),
    (
        "string for bool",
        doc(fault=[{"kind": "delay", "links": "all", "ms": 2, "fifo": "no"}]),
        exact('dock.toml: [[fault]] #0: fifo: expected true or false, got "no"'),
    ),
    (
        "array for table",
        doc(timing=[1, 2]),
        exact("dock.toml: [timing]: expected a table, got [1, 2]"),
    ),
    (
        "one [fault] table",
        doc(fault={"kind": "loss"}),
        exact(
            "dock.toml: [fault]: expected [[fault]] tables (an array of tables), got one [fault] table"
        ),
    ),
    (
        "step of the wrong type",
        doc(algorithm={"step": "big"}),
        exact(
            'dock.toml: [algorithm].step: expected a number > 0 or a table {rule = "constant" |'
            ' "diminishing", ...}, got "big"'
        ),
    ),
    (
        "malformed function",
        doc(objective={"kind": "custom", "function": "pkg.mod.func"}),
        exact(
            'dock.toml: [objective].function: expected "package.module:function", got "pkg.mod.func"'
        ),
    ),
    (
        "name with a slash",
        doc(swarm={"name": "a/b"}),
        exact(
            'dock.toml: [swarm].name: expected a name of up to 64 letters, digits, ".", "_" or "-"'
            ' (it names the run directory), got "a/b"'
        ),
    ),
    # out of range
    (
        "too few agents",
        doc(swarm={"agents": 1}),
        exact("dock.toml: [swarm].agents: expected an integer in [2, 4096], got 1"),
    ),
    (
        "jitter of one period",
        doc(timing={"jitter": 1.0}),
        exact("dock.toml: [timing].jitter: expected a number in [0, 1), got 1.0"),
    ),
    (
        "rate above one",
        doc(fault=[{"kind": "loss", "links": "all", "rate": 1.5}]),
        exact("dock.toml: [[fault]] #0: rate: expected a number in [0, 1], got 1.5"),
    ),
    (
        "zero tolerance",
        doc(swarm={"tolerance": 0}),
        exact("dock.toml: [swarm].tolerance: expected a number > 0, got 0"),
    ),
    (
        "infinite tolerance",
        doc(swarm={"tolerance": math.inf}),
        exact("dock.toml: [swarm].tolerance: expected a finite number, got inf"),
    ),
    (
        "p_enter of zero",
        doc(fault=[{"kind": "burst-loss", "links": "all", "p_enter": 0.0, "p_leave": 0.5}]),
        exact("dock.toml: [[fault]] #0: p_enter: expected a number in (0, 1], got 0.0"),
    ),
    (
        "odd k",
        doc(topology={"shape": "small-world", "k": 3, "p": 0.1}),
        exact(
            "dock.toml: [topology].k: expected an even integer (k/2 neighbours on each side), got 3"
        ),
    ),
    (
        "k too large",
        doc(topology={"shape": "small-world", "k": 6, "p": 0.1}),
        exact("dock.toml: [topology].k: expected an integer in [2, 5], got 6"),
    ),
    (
        "radius beyond the square",
        doc(topology={"shape": "random-geometric", "radius": 2.0}),
        exact("dock.toml: [topology].radius: expected a number in (0, 1.41421], got 2.0"),
    ),
    (
        "zero edge probability",
        doc(topology={"shape": "erdos-renyi", "p": 0.0}),
        exact("dock.toml: [topology].p: expected a number in (0, 1], got 0.0"),
    ),
    (
        "grid of the wrong size",
        doc(topology={"shape": "grid", "rows": 4, "cols": 2}),
        exact("dock.toml: [topology]: rows * cols = 8; expected [swarm].agents = 6"),
    ),
    (
        "grid side not dividing",
        doc(topology={"shape": "grid", "rows": 4}),
        exact("dock.toml: [topology].rows: 4 does not divide [swarm].agents = 6"),
    ),
    (
        "ring of two",
        doc(swarm={"agents": 2}),
        exact('dock.toml: [topology].shape: "ring" needs [swarm].agents >= 3, got 2'),
    ),
    (
        "agent id out of range",
        doc(agent=[{"id": 6}]),
        exact("dock.toml: [[agent]] #0: id: expected an integer in [0, 5], got 6"),
    ),
    (
        "agent without id",
        doc(agent=[{"speed": 2.0}]),
        exact("dock.toml: [[agent]] #0: id: missing; expected an integer in [0, 5]"),
    ),
    (
        "negative step",
        doc(algorithm={"step": -0.1}),
        exact("dock.toml: [algorithm].step: expected a number > 0, got -0.1"),
    ),
    (
        "negative gain",
        doc(priorities={"gain": -0.5}),
        exact("dock.toml: [priorities].gain: expected a number >= 0, got -0.5"),
    ),
    (
        "high_ms below low_ms",
        doc(
            fault=[
                {
                    "kind": "delay",
                    "links": "all",
                    "distribution": "uniform",
                    "low_ms": 5,
                    "high_ms": 4.5,
                }
            ]
        ),
        exact("dock.toml: [[fault]] #0: high_ms: expected a number >= low_ms = 5, got 4.5"),
    ),
    (
        "zero slow factor",
        doc(fault=[{"kind": "slow", "agents": [1], "factor": 0}]),
        exact("dock.toml: [[fault]] #0: factor: expected a number > 0, got 0"),
    ),
    # choices
    (
        "unknown mode",
        doc(swarm={"mode": "sync"}),
        exact(
            'dock.toml: [swarm].mode: expected one of "rounds", "async", got "sync" (did you mean "async"?)'
        ),
    ),
    (
        "unknown shape",
        doc(topology={"shape": "torus"}),
        exact(
            'dock.toml: [topology].shape: expected one of "ring", "path", "grid", "star", "complete",'
            ' "random-geometric", "erdos-renyi", "small-world", "file", got "torus"'
        ),
    ),
    (
        "unknown algorithm",
        doc(algorithm={"name": "dgdd"}),
        r'^dock\.toml: \[algorithm\]\.name: expected one of .*"dgd".*, got "dgdd" \(did you mean "dgd"\?\)$',
    ),
    (
        "unknown transport",
        doc(network={"transport": "udp"}),
        exact('dock.toml: [network].transport: expected one of "tcp", "ipc", got "udp"'),
    ),
    (
        "host with a scheme",
        doc(network={"host": "tcp://lab"}),
        exact(
            'dock.toml: [network].host: expected a host name or address (no spaces, no scheme), got "tcp://lab"'
        ),
    ),
    # budgets and keys that need other keys
    (
        "both budgets",
        doc(swarm={"iterations": 100, "seconds": 5.0}),
        exact("dock.toml: [swarm]: both iterations and seconds given; expected exactly one budget"),
    ),
    (
        "no topology",
        doc(topology=None),
        exact(
            'dock.toml: [topology].shape: missing; expected one of "ring", "path", "grid", "star",'
            ' "complete", "random-geometric", "erdos-renyi", "small-world", "file"'
        ),
    ),
    (
        "condition without random curvature",
        doc(objective={"condition": 2.0}),
        exact('dock.toml: [objective].condition: only used with curvature = "random"'),
    ),
    (
        "target of a logistic objective",
        doc(objective={"kind": "logistic"}, agent=[{"id": 1, "target": [0, 0]}]),
        exact(
            'dock.toml: [[agent]] id=1: target: only used with [objective].kind = "quadratic" (it is "logistic")'
        ),
    ),
    (
        "step key of a diminishing rule",
        doc(algorithm={"step": {"rule": "diminishing", "step": 0.1}}),
        exact(
            'dock.toml: [algorithm].step.step: not used by rule "diminishing"; it takes: rule, scale, power'
        ),
    ),
    (
        "missing graph file",
        doc(topology={"shape": "file", "file": "nowhere.graphml"}),
        r'^dock\.toml: \[topology\]\.file: "nowhere\.graphml" is not a file \(looked for /.*/nowhere\.graphml\)$',
    ),
    # vectors and matrices
    (
        "target of the wrong length",
        doc(agent=[{"id": 1, "target": [1, 2, 3]}]),
        exact(
            "dock.toml: [[agent]] id=1: target: expected a list of 2 numbers ([swarm].dimension = 2), got a list of 3"
        ),
    ),
    (
        "initial_state entry not a number",
        doc(agent=[{"id": 1, "initial_state": [1, "a"]}]),
        exact('dock.toml: [[agent]] id=1: initial_state[1]: expected a finite number, got "a"'),
    ),
    (
        "initial_priorities of the wrong length",
        doc(agent=[{"id": 1, "initial_priorities": [0.2] * 5}]),
        exact(
            "dock.toml: [[agent]] id=1: initial_priorities: expected a list of 6 numbers (one priority"
            " per agent, [swarm].agents = 6), got a list of 5"
        ),
    ),
    (
        "too few priority vectors",
        doc(priorities={"initial": [[1 / 6] * 6] * 5}),
        exact(
            "dock.toml: [priorities].initial: expected 6 priority vectors (one per agent,"
            " [swarm].agents = 6), got a list of 5"
        ),
    ),
    (
        "curvature not symmetric",
        doc(agent=[{"id": 3, "curvature": [[1.0, 0.5], [0.2, 1.0]]}]),
        exact("dock.toml: [[agent]] id=3: curvature: not symmetric: [0][1] = 0.5 but [1][0] = 0.2"),
    ),
    (
        "curvature of the wrong shape",
        doc(agent=[{"id": 3, "curvature": [[1.0, 0.0]]}]),
        exact(
            "dock.toml: [[agent]] id=3: curvature: expected a 2 x 2 matrix (a list of 2 rows,"
            " [swarm].dimension = 2), got a list of 1"
        ),
    ),
    (
        "curvature row too short",
        doc(agent=[{"id": 3, "curvature": [[1.0, 0.0], [1.0]]}]),
        exact(
            "dock.toml: [[agent]] id=3: curvature[1]: expected a list of 2 numbers ([swarm].dimension"
            " = 2), got a list of 1"
        ),
    ),
    (
        "priorities not summing to one",
        doc(
            priorities={
                "initial": [[1 / 6] * 6] * 2 + [[0.4, 0.1, 0.1, 0.1, 0.1, 0.1]] + [[1 / 6] * 6] * 3
            }
        ),
        exact("dock.toml: [priorities].initial[2]: entries sum to 0.9; expected 1 within 1e-9"),
    ),
    (
        "negative priority",
        doc(
            priorities={
                "initial": [[1 / 6] * 6] + [[-0.1, 0.3, 0.2, 0.2, 0.2, 0.2]] + [[1 / 6] * 6] * 4
            }
        ),
        exact("dock.toml: [priorities].initial[1][0]: expected a priority >= 0, got -0.1"),
    ),
    (
        "agent priorities not summing to one",
        doc(agent=[{"id": 4, "initial_priorities": [0.5] * 6}]),
        exact(
            "dock.toml: [[agent]] id=4: initial_priorities: entries sum to 3; expected 1 within 1e-9"
        ),
    ),
    (
        "duplicated agent id",
        doc(agent=[{"id": 1, "speed": 1.1}, {"id": 2}, {"id": 1, "speed": 0.9}]),
        exact(
            "dock.toml: [[agent]] id=1: id: given twice (tables #0 and #2); expected each agent once"
        ),
    ),
    # faults
    (
        "bad fault kind",
        doc(fault=[{"kind": "los", "links": "all"}]),
        exact(
            'dock.toml: [[fault]] #0: kind: expected one of "loss", "burst-loss", "delay",'
            ' "duplicate", "corrupt", "outage", "crash", "pause", "slow", got "los" (did you mean "loss"?)'
        ),
    ),
    (
        "bad scope word",
        doc(fault=[{"kind": "outage", "links": "some"}]),
        exact(f'dock.toml: [[fault]] #0: links: expected {SCOPE_FORMS}, got "some"'),
    ),
    (
        "bad scope keys",
        doc(fault=[{"kind": "outage", "links": {"from": 1, "edge": [1, 2]}}]),
        exact(
            f"dock.toml: [[fault]] #0: links: expected {SCOPE_FORMS}, got a table with keys from, edge"
        ),
    ),
    (
        "scope end out of range",
        doc(fault=[{"kind": "outage", "links": {"from": 1, "to": 9}}]),
        exact("dock.toml: [[fault]] #0: links.to: expected an integer in [0, 5], got 9"),
    ),
    (
        "scope from itself",
        doc(fault=[{"kind": "outage", "links": {"from": 2, "to": 2}}]),
        exact(
            "dock.toml: [[fault]] #0: links: from and to are both 2; expected a link between two agents"
        ),
    ),
    (
        "edge of one agent",
        doc(fault=[{"kind": "outage", "links": {"edge": [3]}}]),
        exact(
            "dock.toml: [[fault]] #0: links.edge: expected two different agent ids [a, b], got [3]"
        ),
    ),
    (
        "overlapping groups",
        doc(fault=[{"kind": "outage", "links": {"between": [[0, 1], [1, 2]]}}]),
        exact(
            "dock.toml: [[fault]] #0: links.between[1]: agent 1 is also in group 0; expected disjoint groups"
        ),
    ),
    (
        "non-positive length",
        doc(fault=[{"kind": "outage", "links": {"longer_than": 0}}]),
        exact("dock.toml: [[fault]] #0: links.longer_than: expected a number > 0, got 0"),
    ),
    (
        "link fault without scope",
        doc(fault=[{"kind": "loss", "rate": 0.1}]),
        exact(
            f"dock.toml: [[fault]] #0: links: missing; a link fault needs a scope: {SCOPE_FORMS}"
        ),
    ),
    (
        "process fault with a scope",
        doc(fault=[{"kind": "slow", "links": "all", "factor": 2.0}]),
        exact(
            'dock.toml: [[fault]] #0: links: not used by kind "slow"; it takes: kind, agents, start_s,'
            " duration_s, start_iteration, duration_iterations, factor, name"
        ),
    ),
    (
        "duplicated fault agent",
        doc(fault=[{"kind": "crash", "agents": [1, 1]}]),
        exact("dock.toml: [[fault]] #0: agents[1]: agent 1 is listed twice"),
    ),
    (
        "no fault agents",
        doc(fault=[{"kind": "crash", "agents": []}]),
        exact(
            "dock.toml: [[fault]] #0: agents: expected a non-empty list of agent ids in [0, 5], got []"
        ),
    ),
    (
        "mixed window units",
        doc(
            fault=[
                {
                    "kind": "loss",
                    "links": "all",
                    "rate": 0.1,
                    "start_s": 1.0,
                    "duration_iterations": 10,
                }
            ]
        ),
        exact(
            "dock.toml: [[fault]] #0: window mixes start_s with duration_iterations; expected"
            " start_s/duration_s or start_iteration/duration_iterations"
        ),
    ),
    (
        "negative start",
        doc(fault=[{"kind": "outage", "links": "all", "start_s": -1.0}]),
        exact("dock.toml: [[fault]] #0: start_s: expected a number >= 0, got -1.0"),
    ),
    (
        "pause without duration",
        doc(fault=[{"kind": "pause", "agents": [2], "start_s": 1.0}]),
        exact("dock.toml: [[fault]] #0: a pause needs duration_s or duration_iterations"),
    ),
    (
        "crash with a duration",
        doc(fault=[{"kind": "crash", "agents": [2], "duration_s": 1.0}]),
        exact(
            'dock.toml: [[fault]] #0: duration_s: not used by kind "crash"; it takes: kind, agents,'
            " start_s, start_iteration, restart_after_s, restart_state, name"
        ),
    ),
    (
        "parameter of another distribution",
        doc(fault=[{"kind": "delay", "links": "all", "distribution": "uniform", "ms": 3}]),
        exact(
            'dock.toml: [[fault]] #0: ms: not used by delay distribution "uniform"; it takes: kind,'
            " links, start_s, duration_s, start_iteration, duration_iterations, distribution,"
            " jitter_ms, fifo, low_ms, high_ms, name"
        ),
    ),
    (
        "bad restart state",
        doc(fault=[{"kind": "crash", "agents": [2], "restart_state": "fresh"}]),
        exact(
            'dock.toml: [[fault]] #0: restart_state: expected one of "initial", "last", got "fresh"'
        ),
    ),
    (
        "second fault named by its index",
        doc(
            fault=[
                {"kind": "outage", "links": "all"},
                {"kind": "loss", "links": "all", "rate": -0.1},
            ]
        ),
        exact("dock.toml: [[fault]] #1: rate: expected a number in [0, 1], got -0.1"),
    ),
]


@pytest.mark.parametrize(
    ("content", "pattern"), [(c, p) for _, c, p in MALFORMED], ids=[i for i, _, _ in MALFORMED]
)
def test_malformed_scenario_is_refused(dock, content: dict[str, Any], pattern: str) -> None:
    with pytest.raises(ScenarioError, match=pattern):
        dock(content)


def test_curvature_not_positive_definite(dock) -> None:
    q = [[1.0, 2.0], [2.0, 1.0]]
    smallest = np.linalg.eigvalsh(np.array(q))[0]  # -1: eigenvalues 1 -/+ 2
    with pytest.raises(
        ScenarioError,
        match=exact(
            f"dock.toml: [[agent]] id=3: curvature: not positive definite (smallest eigenvalue {smallest:.6g})"
        ),
    ):
        dock(doc(agent=[{"id": 3, "curvature": q}]))


def test_top_level_key_outside_any_table(dock) -> None:
    with pytest.raises(
        ScenarioError,
        match=r'^dock\.toml: key "agents" outside any table; expected one of: \[swarm\], .*,'
        r" \[\[fault\]\] \(did you mean \[\[agent\]\]\?\)$",
    ):
        dock('agents = 6\n[topology]\nshape = "ring"\n')
    with pytest.raises(
        ScenarioError,
        match=exact("dock.toml: [[agent]]: expected [[agent]] tables (an array of tables), got 3"),
    ):
        dock('agent = 3\n[swarm]\nagents = 6\n[topology]\nshape = "ring"\n')


def test_toml_syntax_error_names_file_and_line(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(HERE)
    text = (HERE / "syntax-error.toml").read_text()
    line = next(i for i, row in enumerate(text.splitlines(), 1) if row.startswith("radius 0.4"))
    with pytest.raises(
        ScenarioError, match=rf"^syntax-error\.toml: line {line}, column \d+: invalid TOML: \S"
    ):
        load_scenario("syntax-error.toml")


def test_toml_error_at_end_of_file(dock) -> None:
    with pytest.raises(
        ScenarioError,
        match=exact("dock.toml: line 3 (end of file): invalid TOML: Unterminated string"),
    ):
        dock('[swarm]\nagents = 6\nname = "open')


def test_unreadable_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    with pytest.raises(
        ScenarioError,
        match=exact("absent.toml: cannot read the scenario file: No such file or directory"),
    ):
        load_scenario("absent.toml")
    Path("latin1.toml").write_bytes(b'[swarm]\nname = "caf\xe9"\n')
    with pytest.raises(
        ScenarioError, match=exact("latin1.toml: line 2: not UTF-8 text; expected a TOML file")
    ):
        load_scenario("latin1.toml")


# ------------------------------------------------------------------- what the runtime can do

POLL = (
    "an agent waits for its next iteration in one poll, whose timeout is a 32-bit count of"
    " milliseconds: at most 2147483647 ms, about 24.8 days"
)
ITS = "iteration numbers are kept as float64 in telemetry and metrics, exact up to 2**53"
MAGNITUDE = (
    "an agent whose state's norm reaches 1e+12 counts as diverged, and the scenario's own"
    " scale stays 1000 times below that"
)
ASYNC = {"agents": 6, "seed": 1, "mode": "async", "seconds": 1.0}

BEYOND_THE_RUNTIME: list[tuple[str, dict[str, Any], str]] = [
    (
        "period too long for one poll",
        doc(timing={"period_ms": 1e308}),
        f"dock.toml: [timing].period_ms: expected a number in [0.001, 2147483647] ({POLL}),"
        " got 1e+308",
    ),
    (
        "speed too large for one poll",
        doc(swarm=ASYNC, agent=[{"id": 1, "speed": 9.2e18}]),
        "dock.toml: [[agent]] id=1: speed: expected a number <= 1.95226e+09 with"
        f" [timing].period_ms = 1 and jitter = 0.1 ({POLL}), got 9.2e+18",
    ),
    (
        "slow factor too large for one poll",
        doc(
            swarm=ASYNC,
            timing={"period_ms": 1000.0, "jitter": 0.0},
            fault=[{"kind": "slow", "agents": [2, 3], "factor": 1e7}],
        ),
        "dock.toml: [[fault]] #0: factor: expected a number <= 2.14748e+06 for agent 2 with"
        f" [timing].period_ms = 1000 ({POLL}), got 10000000.0",
    ),
    (
        "period with jitter and speed spread",
        doc(swarm=ASYNC, timing={"period_ms": 2e9, "jitter": 0.5, "speed_spread": 0.5}),
        "dock.toml: [timing].period_ms: expected a number <= 9.54437e+08 with jitter = 0.5 and"
        f" speed_spread = 0.5 ({POLL}), got 2000000000.0",
    ),
    (
        "round timeout",
        doc(timing={"round_timeout_ms": 3e9}),
        "dock.toml: [timing].round_timeout_ms: expected a number in (0, 2147483647]"
        f" ({POLL}), got 3000000000.0",
    ),
    (
        "telemetry batch",
        doc(telemetry={"batch_ms": 1e300}),
        f"dock.toml: [telemetry].batch_ms: expected a number in (0, 2147483647] ({POLL}),"
        " got 1e+300",
    ),
    (
        "spread gives an infinite F*",
        doc(objective={"spread": 1e308}),
        "dock.toml: [objective].spread: expected a number in [0, 7.07107e+08] (targets reach"
        f" spread * sqrt(dimension) = spread * 1.414; {MAGNITUDE}), got 1e+308",
    ),
    (
        "a million agents",
        doc(swarm={"agents": 10**6}),
        "dock.toml: [swarm].agents: expected an integer in [2, 4096] (the coordinator builds"
        " dense agents x agents matrices for the graph spectrum, the mixing weights and the"
        " priorities, and starts one OS process per agent), got 1000000",
    ),
    (
        "quadratic dimension",
        doc(swarm={"dimension": 5000}),
        "dock.toml: [swarm].dimension: expected an integer <= 1900 with [objective].kind ="
        ' "quadratic" (each agent\'s plan carries its d x d curvature matrix in one control'
        " frame of at most 64 MiB), got 5000",
    ),
    (
        "data frame dimension",
        doc(swarm={"dimension": 10**6}, objective={"kind": "logistic"}),
        "dock.toml: [swarm].dimension: expected an integer in [1, 63000] (a data frame carries"
        " up to two vectors of this length in at most 1048576 bytes), got 1000000",
    ),
    (
        "local data per agent",
        doc(swarm={"dimension": 1000}, objective={"kind": "logistic", "samples": 10**6}),
        "dock.toml: [objective].samples: expected an integer in [1, 3724] (with"
        " [swarm].dimension = 1000; each agent's local data, samples x (dimension + 1)"
        " numbers, travels in its plan, one control frame of at most 64 MiB), got 1000000",
    ),
    (
        "iterations",
        doc(swarm={"agents": 6, "iterations": 2**60}),
        f"dock.toml: [swarm].iterations: expected an integer in [1, {2**53}] ({ITS}), got {2**60}",
    ),
    (
        "seconds count rounds",
        doc(swarm={"agents": 6, "seconds": 1e300}),
        "dock.toml: [swarm].seconds: expected a number <= 9.0072e+12 with [timing].period_ms"
        f" = 1 (seconds / period counts rounds; {ITS}), got 1e+300",
    ),
    (
        "iteration window",
        doc(fault=[{"kind": "outage", "links": "all", "start_iteration": 2**60}]),
        f"dock.toml: [[fault]] #0: start_iteration: expected an integer in [0, {2**53}]"
        f" ({ITS}), got {2**60}",
    ),
    (
        "target beyond the divergence threshold",
        doc(agent=[{"id": 2, "target": [3e12, 0.0]}]),
        f"dock.toml: [[agent]] id=2: target: its norm is 3e+12; expected at most 1e+09"
        f" ({MAGNITUDE})",
    ),
    (
        "initial state beyond the divergence threshold",
        doc(agent=[{"id": 0, "initial_state": [1e9, 1e9]}]),
        f"dock.toml: [[agent]] id=0: initial_state: its norm is 1.414e+09; expected at most"
        f" 1e+09 ({MAGNITUDE})",
    ),
    (
        "condition number",
        doc(objective={"curvature": "random", "condition": 1e20}),
        "dock.toml: [objective].condition: expected a number in [1, 1e+12] (the reference"
        " optimum is solved in float64, which keeps about 16 - log10(condition) correct"
        " digits), got 1e+20",
    ),
    (
        "pareto tail that overflows",
        doc(
            fault=[
                {
                    "kind": "delay",
                    "links": "all",
                    "distribution": "pareto",
                    "scale_ms": 1,
                    "shape": 0.1,
                }
            ]
        ),
        "dock.toml: [[fault]] #0: shape: this delay can draw 3.51e+159 ms; expected every draw"
        " to be at most 1e+100 ms (delays add up and are counted in rounds, and must stay"
        " finite numbers)",
    ),
    (
        "lognormal tail that overflows",
        doc(
            fault=[
                {
                    "kind": "delay",
                    "links": "all",
                    "distribution": "lognormal",
                    "median_ms": 5,
                    "sigma": 200,
                }
            ]
        ),
        "dock.toml: [[fault]] #0: sigma: this delay can draw inf ms; expected every draw to be"
        " at most 1e+100 ms (delays add up and are counted in rounds, and must stay finite"
        " numbers)",
    ),
    (
        "constant delay beyond the bound",
        doc(fault=[{"kind": "delay", "links": "all", "ms": 1e300}]),
        "dock.toml: [[fault]] #0: ms: this delay can draw 1e+300 ms; expected every draw to be"
        " at most 1e+100 ms (delays add up and are counted in rounds, and must stay finite"
        " numbers)",
    ),
    (
        "unknown missing policy",
        doc(algorithm={"missing": "sefl"}),
        'dock.toml: [algorithm].missing: expected one of "reuse", "self", got "sefl"'
        ' (did you mean "self"?)',
    ),
    (
        "missing policy of priority-weighted",
        doc(algorithm={"name": "priority-weighted", "missing": "self"}),
        'dock.toml: [algorithm].missing: expected one of "same-rule", "reuse", got "self"',
    ),
    (
        "missing policy where there is none",
        doc(algorithm={"name": "push-sum", "missing": "reuse"}),
        'dock.toml: [algorithm].missing: not used by "push-sum", which has no policy for'
        " silent in-neighbours",
    ),
]


@pytest.mark.parametrize(
    ("content", "message"),
    [(c, m) for _, c, m in BEYOND_THE_RUNTIME],
    ids=[i for i, _, _ in BEYOND_THE_RUNTIME],
)
def test_values_beyond_the_runtime_are_refused_with_bound_and_reason(
    dock, content: dict[str, Any], message: str
) -> None:
    with pytest.raises(ScenarioError, match=exact(message)):
        dock(content)


def test_values_at_the_runtime_bounds_are_accepted() -> None:
    import coordinator._limits as lim

    s = load_scenario(
        doc(
            swarm={**ASYNC, "agents": lim.AGENTS_MAX},
            timing={"period_ms": 1e6, "jitter": 0.0},
            agent=[{"id": 1, "speed": lim.POLL_MS_MAX / 1e6, "target": [lim.MAGNITUDE_MAX, 0]}],
            objective={"spread": lim.MAGNITUDE_MAX / math.sqrt(2)},
        )
    )
    assert s.agents == lim.AGENTS_MAX
    assert s.agent_overrides[1]["speed"] == lim.POLL_MS_MAX / 1e6
    # rounds mode never multiplies the period by speeds or slow factors
    load_scenario(doc(fault=[{"kind": "slow", "agents": [1], "factor": 1e12}]))


def test_a_huge_swarm_is_refused_before_anything_is_built() -> None:
    import tracemalloc

    # priorities for a million agents would be refused only after a million vectors were
    # checked; the agent count must be refused first, without allocating anything big
    content = doc(swarm={"agents": 10**6}, priorities={"initial": [[1.0]]})
    tracemalloc.start()
    try:
        with pytest.raises(ScenarioError, match=r"\[swarm\]\.agents: expected an integer in"):
            load_scenario(content)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 1 << 20, f"refusing the agent count allocated {peak} bytes"


def test_a_too_long_path_gets_a_clear_error(tmp_path: Path) -> None:
    import coordinator

    name = "a" * 5000 + ".toml"
    with pytest.raises(ScenarioError) as err:
        load_scenario(name)
    text = str(err.value)
    assert text.endswith("cannot read the scenario file: File name too long")
    assert "(5005 characters)" in text and len(text) < 300
    with pytest.raises(ScenarioError, match="File name too long"):
        coordinator.load(name)
    with pytest.raises(ScenarioError, match=r"\[topology\]\.file: .* is not a file"):
        load_scenario(
            doc(topology={"shape": "file", "file": "g" * 5000 + ".txt"}), base_dir=tmp_path
        )


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
def test_a_reference_that_overflows_is_refused() -> None:
    import coordinator

    # every scale is bounded, but a curvature's entries are not: F* overflows float64 here
    huge = [[1e300, 0.0], [0.0, 1e300]]
    content = doc(
        agent=[
            {"id": 0, "curvature": huge, "target": [1e8, 0.0]},
            {"id": 1, "curvature": huge, "target": [-1e8, 0.0]},
        ]
    )
    with pytest.raises(ScenarioError, match=r"^<dict>: the reference optimum is not finite"):
        coordinator.load(content)


# ------------------------------------------------------------------- one fault validator

LINK_PARAMS = [
    # degenerate distributions are constant delays: both sides accept them
    ("uniform, high = low", {"distribution": "uniform", "low_ms": 5, "high_ms": 5}, None),
    ("lognormal, sigma = 0", {"distribution": "lognormal", "median_ms": 3, "sigma": 0}, None),
    (
        "uniform, high < low",
        {"distribution": "uniform", "low_ms": 5, "high_ms": 4},
        "high_ms: expected a number >= low_ms = 5, got 4",
    ),
    (
        "normal, sd = 0",
        {"distribution": "normal", "mean_ms": 3, "sd_ms": 0},
        "sd_ms: expected a number > 0, got 0",
    ),
    (
        "lognormal, sigma < 0",
        {"distribution": "lognormal", "median_ms": 3, "sigma": -1},
        "sigma: expected a number >= 0, got -1",
    ),
    ("pareto, shape = 0", {"distribution": "pareto", "scale_ms": 1, "shape": 0}, "shape: expected"),
    ("negative jitter", {"distribution": "constant", "ms": 1, "jitter_ms": -1}, "jitter_ms: exp"),
]


@pytest.mark.parametrize(
    ("params", "error"), [(p, e) for _, p, e in LINK_PARAMS], ids=[i for i, _, _ in LINK_PARAMS]
)
def test_scenario_and_agents_validate_link_faults_alike(
    params: dict[str, Any], error: str | None
) -> None:
    from node._links import LinkFault, LinkModel

    table = {"kind": "delay", "links": "all", **params}
    outcomes = []
    for check in (
        lambda: load_scenario(doc(fault=[table])).faults[0]["params"],
        lambda: dict(LinkFault(index=0, kind="delay", params=params).params),
    ):
        try:
            outcomes.append(("ok", check()))
        except ScenarioError as exc:
            outcomes.append(("refused", str(exc).split("#0: ", 1)[1]))
    assert outcomes[0] == outcomes[1]
    if error is None:
        assert outcomes[0][0] == "ok"
        # a degenerate distribution is the constant delay it reduces to
        model = LinkModel(1, 0, 1, [LinkFault(index=0, kind="delay", params=params)])
        constant = params.get("low_ms", params.get("median_ms"))
        delays = [model.decide(seq, 0, 0.0).delay_s for seq in range(200)]
        assert delays == pytest.approx([constant / 1000.0] * 200, rel=1e-15)
    else:
        assert outcomes[0][0] == "refused" and outcomes[0][1].startswith(error)
