"""The ``swarmrig`` command: check starts nothing, a malformed scenario is refused before any
process starts, demos are listed, and ``--json`` prints exactly summary.json.

Every CLI call goes through the ``processes`` fixture. To tell our own processes from those
of other test runs on the machine, each call carries a unique environment tag, which every
process it starts inherits.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import re
import time
import tomllib
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import psutil
import pytest

from coordinator._scenario import load_scenario
from tests.conftest import swarmrig_processes

pytestmark = pytest.mark.integration

DEMOS = Path(__file__).resolve().parents[2] / "coordinator" / "demos"
TAG = "SWARMRIG_TEST_TAG"


@dataclass(frozen=True, slots=True, kw_only=True)
class Call:
    code: int
    stdout: str
    stderr: str
    #: processes the call started besides itself (fork server, agents), seen at any time
    spawned: tuple[str, ...]


def _tagged(tag: str, exclude: int) -> list[str]:
    found = []
    for p in swarmrig_processes():
        with contextlib.suppress(psutil.Error):
            if p.pid != exclude and p.environ().get(TAG) == tag:
                found.append(f"{p.pid}: {' '.join(p.cmdline())}")
    return found


def swarmrig(processes: Any, *args: str, cwd: Path, timeout: float = 60.0) -> Call:
    """Run ``swarmrig ARGS`` to the end, watching for any process it starts."""
    tag = uuid.uuid4().hex
    p = processes.start(*args, cwd=cwd, env={**os.environ, TAG: tag})
    seen: set[str] = set()
    deadline = time.monotonic() + timeout
    while p.poll() is None:
        if time.monotonic() > deadline:
            raise AssertionError(f"swarmrig {' '.join(args)} did not end in {timeout} s")
        with contextlib.suppress(psutil.Error):
            for child in psutil.Process(p.pid).children(recursive=True):
                with contextlib.suppress(psutil.Error):
                    seen.add(f"{child.pid}: {' '.join(child.cmdline())}")
        time.sleep(0.01)
    stdout, stderr = p.communicate(timeout=10)
    seen.update(_tagged(tag, p.pid))
    return Call(code=p.returncode, stdout=stdout, stderr=stderr, spawned=tuple(sorted(seen)))


# ----------------------------------------------------------------------------- check

TARGETS = np.array([[4.0, -1.0], [0.5, 2.0], [-3.0, 0.0], [1.0, 1.0], [2.5, -4.0]])
CURVATURES = np.array(
    [
        [[2.0, 0.5], [0.5, 1.0]],
        [[1.0, 0.0], [0.0, 3.0]],
        [[4.0, -1.0], [-1.0, 2.0]],
        [[1.5, 0.2], [0.2, 0.5]],
        [[1.0, 0.0], [0.0, 1.0]],
    ]
)


def checked_scenario(path: Path) -> Path:
    agents = "\n".join(
        f"[[agent]]\nid = {i}\ntarget = {TARGETS[i].tolist()}\ncurvature = {CURVATURES[i].tolist()}\n"
        for i in range(5)
    )
    path.write_text(
        f"""
[swarm]
name = "quay-check"
agents = 5
dimension = 2
seed = 13

[topology]
shape = "ring"

{agents}
"""
    )
    return path


def reference() -> tuple[np.ndarray, float]:
    # F(x) = sum_i (1/n) * 0.5 (x - b_i)' A_i (x - b_i): the minimizer solves
    # (sum A_i) x = sum A_i b_i (numpy linear algebra).
    x = np.linalg.solve(CURVATURES.sum(axis=0), np.einsum("ijk,ik->j", CURVATURES, TARGETS))
    e = x - TARGETS
    f = float(np.mean([0.5 * e[i] @ CURVATURES[i] @ e[i] for i in range(5)]))
    return x, f


def printed(stdout: str, key: str) -> str:
    m = re.search(rf"^#\s+{re.escape(key)} = (.+)$", stdout, re.MULTILINE)
    assert m, f"no '{key}' line in:\n{stdout}"
    return m.group(1)


def numbers(text: str) -> list[float]:
    return [float(v) for v in re.findall(r"-?\d+(?:\.\d+)?(?:e[-+]?\d+)?", text)]


def test_check_prints_the_resolved_scenario_graph_facts_and_optimum(
    processes: Any, tmp_path: Path
) -> None:
    scenario = checked_scenario(tmp_path / "quay.toml")
    call = swarmrig(processes, "check", str(scenario), cwd=tmp_path)
    assert call.code == 0, call.stderr
    assert call.spawned == ()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["quay.toml"]  # wrote nothing

    # The resolved scenario is TOML (the facts are comments) and fixes every seed.
    resolved = tomllib.loads(call.stdout)
    assert resolved["swarm"]["seed"] == 13 and resolved["swarm"]["name"] == "quay-check"
    again = load_scenario(resolved, source="printed")
    assert again.to_dict() == load_scenario(scenario).to_dict()

    g = nx.cycle_graph(5)
    lap = np.linalg.eigvalsh(nx.laplacian_matrix(g).toarray().astype(float))
    assert int(printed(call.stdout, "diameter")) == nx.diameter(g)
    assert numbers(printed(call.stdout, "algebraic_connectivity"))[0] == pytest.approx(
        lap[1], rel=1e-5
    )
    # cycle Laplacian eigenvalues 2 - 2cos(2πk/n) (methods.md, [derived])
    assert lap[1] == pytest.approx(2 - 2 * math.cos(2 * math.pi / 5))

    x_star, f_star = reference()
    assert numbers(printed(call.stdout, "x_star")) == pytest.approx(x_star.tolist(), rel=1e-5)
    assert float(printed(call.stdout, "F_star")) == pytest.approx(f_star, rel=1e-10)


def test_check_json_carries_the_same_facts(processes: Any, tmp_path: Path) -> None:
    scenario = checked_scenario(tmp_path / "quay.toml")
    call = swarmrig(processes, "check", "--json", str(scenario), cwd=tmp_path)
    assert call.code == 0, call.stderr
    assert call.spawned == ()
    info = json.loads(call.stdout)
    x_star, f_star = reference()
    np.testing.assert_allclose(info["reference"]["x_star"], x_star, rtol=1e-9)
    assert info["reference"]["F_star"] == pytest.approx(f_star, rel=1e-9)
    g = nx.cycle_graph(5)
    assert info["graph"]["diameter"] == nx.diameter(g)
    assert info["graph"]["algebraic_connectivity"] == pytest.approx(nx.algebraic_connectivity(g))
    assert info["graph"]["max_degree"] == 2
    assert info["intended_priorities"] == pytest.approx([0.2] * 5)


# ------------------------------------------------------------------- malformed scenarios

BASE = """
[swarm]
name = "bad"
agents = 6
dimension = 2
seed = 1
mode = "rounds"
iterations = 50
"""
RING = '\n[topology]\nshape = "ring"\n'

MALFORMED: dict[str, tuple[str, tuple[str, ...]]] = {
    # name: (scenario text, fragments the message must hold)
    "unknown-key": (BASE + "agentz = 4\n" + RING, ("[swarm]", "agentz")),
    "wrong-type": (BASE.replace("agents = 6", 'agents = "six"') + RING, ("[swarm].agents",)),
    "disconnected-file": (
        BASE + '\n[topology]\nshape = "file"\nfile = "two-islands.edges"\n',
        ("[topology]", "two-islands.edges", "not connected"),
    ),
    "disconnected-erdos-renyi": (
        BASE + '\n[topology]\nshape = "erdos-renyi"\np = 0.01\n',
        ("topology", "p=0.01", "not connected"),
    ),
    "curvature-not-positive-definite": (
        BASE + RING + "\n[[agent]]\nid = 0\ncurvature = [[1.0, 0.0], [0.0, -1.0]]\n",
        ("id=0", "curvature", "positive definite"),
    ),
    "target-wrong-length": (
        BASE + RING + "\n[[agent]]\nid = 1\ntarget = [1.0, 2.0, 3.0]\n",
        ("id=1", "target", "2 numbers"),
    ),
    "initial-state-wrong-length": (
        BASE + RING + "\n[[agent]]\nid = 4\ninitial_state = [1.0]\n",
        ("id=4", "initial_state", "2 numbers"),
    ),
    "priorities-not-summing-to-one": (
        BASE
        + RING
        + "\n[priorities]\ninitial = ["
        + ", ".join(["[0.5, 0.5, 0.5, 0, 0, 0]"] * 6)
        + "]\n",
        ("[priorities].initial", "sum"),
    ),
    "agent-priorities-not-summing-to-one": (
        BASE + RING + "\n[[agent]]\nid = 2\ninitial_priorities = [0.2, 0.2, 0.2, 0.2, 0.2, 0.2]\n",
        ("id=2", "initial_priorities", "sum"),
    ),
}


@pytest.mark.parametrize("name", sorted(MALFORMED))
def test_malformed_scenarios_are_refused_before_anything_starts(
    processes: Any, tmp_path: Path, name: str
) -> None:
    text, fragments = MALFORMED[name]
    (tmp_path / "two-islands.edges").write_text("0 1\n1 2\n2 0\n3 4\n4 5\n5 3\n")
    scenario = tmp_path / f"{name}.toml"
    scenario.write_text(text)
    out = tmp_path / "out"
    call = swarmrig(processes, "run", str(scenario), "--out", str(out), "--quiet", cwd=tmp_path)
    assert call.code == 2, (call.code, call.stderr)
    assert call.spawned == ()
    assert not out.exists()
    assert not (tmp_path / "runs").exists()
    message = call.stderr.strip()
    assert message.startswith("swarmrig: error: "), message
    assert str(scenario) in message, message
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in: {message}"
    assert "Traceback" not in call.stderr


def test_a_missing_scenario_file_is_refused(processes: Any, tmp_path: Path) -> None:
    call = swarmrig(processes, "run", str(tmp_path / "nowhere.toml"), "--quiet", cwd=tmp_path)
    assert call.code == 2
    assert "nowhere.toml" in call.stderr and "Traceback" not in call.stderr
    assert call.spawned == () and sorted(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------- demos and json


def test_list_demos_names_every_demo_with_its_first_comment(processes: Any, tmp_path: Path) -> None:
    call = swarmrig(processes, "run", "--list-demos", cwd=tmp_path)
    assert call.code == 0, call.stderr
    assert call.spawned == ()
    lines = [ln for ln in call.stdout.splitlines() if ln.strip()]
    demos = sorted(DEMOS.glob("*.toml"))
    assert demos, "no demo shipped"
    assert len(lines) == len(demos)
    for line, path in zip(lines, demos, strict=True):
        first = next(ln for ln in path.read_text().splitlines() if ln.startswith("#"))
        assert line.split()[0] == path.stem
        assert first.lstrip("#").strip() in line
        load_scenario(path)  # every demo is itself a valid scenario


def _strict_json(text: str) -> Any:
    def refuse(token: str) -> Any:
        raise AssertionError(f"{token} is not JSON")

    return json.loads(text, parse_constant=refuse)


def test_json_summary_on_stdout_equals_summary_json(processes: Any, tmp_path: Path) -> None:
    scenario = tmp_path / "dock.toml"
    scenario.write_text(
        """
[swarm]
name = "dock"
agents = 3
mode = "rounds"
iterations = 60
seed = 4

[topology]
shape = "ring"
"""
    )
    out = tmp_path / "out"
    processes.watch_run_dir(out)  # the swarm's own group is killed in teardown too
    call = swarmrig(
        processes, "run", "--quiet", "--json", "--out", str(out), str(scenario), cwd=tmp_path
    )
    assert call.code == 0, call.stderr
    printed_summary = _strict_json(call.stdout)
    assert printed_summary == _strict_json((out / "summary.json").read_text())
    assert printed_summary["scenario"] == "dock" and printed_summary["agents"] == 3
    assert printed_summary["exit"] == "budget"
    for name in ("scenario.toml", "agents.json", "run.json", "events.jsonl", "links.csv"):
        assert (out / name).is_file(), name
    assert call.stderr == ""  # --quiet: no live view, no table
    # the watcher does see what a run starts (so "spawned == ()" above means something)
    assert any("node._forkserver" in s for s in call.spawned), call.spawned
