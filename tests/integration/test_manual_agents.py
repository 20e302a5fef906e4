"""Agents started by hand (as on other machines) join a coordinator that launches none."""

from __future__ import annotations

import json
import socket
import subprocess
import sys

import pytest

pytestmark = pytest.mark.integration


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_swarmrig_node_joins_a_listening_coordinator(processes, tmp_path):
    n = 4
    scenario = tmp_path / "lab.toml"
    scenario.write_text(
        f"""
[swarm]
name = "hand-started"
agents = {n}
seed = 3
mode = "rounds"
iterations = 300

[topology]
shape = "ring"

[network]
transport = "tcp"
host = "127.0.0.1"
"""
    )
    endpoint = f"tcp://127.0.0.1:{_free_port()}"
    out = tmp_path / "run"
    coord = processes.start(
        "run",
        str(scenario),
        "--listen",
        endpoint,
        "--no-launch",
        "--out",
        str(out),
        "--quiet",
        "--json",
    )
    agents = []
    for i in range(n):
        p = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "coordinator.cli",
                "node",
                "--join",
                endpoint,
                "--agent",
                str(i),
            ],
            start_new_session=True,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        processes.groups.add(p.pid)
        processes.popen.append(p)
        agents.append(p)
    stdout, stderr = coord.communicate(timeout=120)
    assert coord.returncode == 0, stderr
    summary = json.loads(stdout)
    assert summary["exit"] == "budget" and summary["messages"]["lost_transport"] == 0
    for p in agents:  # each agent leaves by itself once the coordinator says stop
        assert p.wait(timeout=20) == 0, p.stderr.read() if p.stderr else ""
    run = json.loads((out / "run.json").read_text())
    assert run["process_group"] is None  # nothing was forked here
    # the pids are the agents' own claims, recorded but never signalled: nothing here forked them
    assert sorted(a["claimed_pid"] for a in run["agents"]) == sorted(p.pid for p in agents)
    assert all(a["pid"] is None for a in run["agents"])
    assert all(a["endpoint"].startswith("tcp://127.0.0.1:") for a in run["agents"])
