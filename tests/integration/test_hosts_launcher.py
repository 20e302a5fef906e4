"""The launcher on test hosts: `swarmrig run --inventory` over ssh into network namespaces.

Three lab machines (tests/integration/_netns.py): the coordinator on ``coord``, three agents on
each of ``rover1`` and ``rover2``, each rover running its own OpenSSH server with throwaway
keys. Every test checks that no process of ours is left on any machine afterwards, also when
the coordinator is killed with SIGKILL or frozen with SIGSTOP (its machine gone silent).
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from coordinator._rundir import read_telemetry
from tests.conftest import SESSION_TAG
from tests.integration._netns import Lab, SshServer

pytestmark = pytest.mark.integration

PORT = 5570
AGENTS = {"rover1": [0, 1, 2], "rover2": [3, 4, 5]}


@pytest.fixture
def lab(processes, tmp_path) -> Iterator[tuple[Lab, dict[str, SshServer]]]:
    lab = Lab(["coord", "rover1", "rover2"])
    try:
        servers = {
            name: SshServer(lab[name], tmp_path / f"ssh-{name}", accept_env=SESSION_TAG)
            for name in AGENTS
        }
        yield lab, servers
    finally:
        lab.close()


def write_inventory(path: Path, lab: Lab, servers: dict[str, SshServer], **host_keys) -> Path:
    tag = f"SetEnv={SESSION_TAG}={os.environ[SESSION_TAG]}"
    lines = [
        f'coordinator = "tcp://{lab["coord"].address}:{PORT}"',
        f'listen = "tcp://{lab["coord"].address}:{PORT}"',
        "",
    ]
    for name, agents in AGENTS.items():
        opts = servers[name].client_options("-o", tag)
        python = host_keys.get("python", sys.executable)
        lines += [
            "[[host]]",
            f'name = "{name}"',
            f'ssh = "{servers[name].destination}"',
            f"agents = {agents}",
            f"python = {json.dumps(python)}",
            f"ssh_options = {json.dumps(opts)}",
            "",
        ]
    path.write_text("\n".join(lines))
    return path


def write_scenario(path: Path, budget: str) -> Path:
    path.write_text(
        f"""
[swarm]
name = "rovers"
agents = 6
seed = 11
mode = "async"
{budget}

[topology]
shape = "ring"

[timing]
period_ms = 5.0

[network]
transport = "tcp"
host = "0.0.0.0"
"""
    )
    return path


def start_coordinator(lab: Lab, processes, *args: str):
    p = lab["coord"].start(sys.executable, "-m", "coordinator.cli", "run", *args)
    processes.groups.add(p.pid)
    processes.popen.append(p)
    return p


def ours(lab: Lab, servers: dict[str, SshServer]) -> dict[str, set[int]]:
    """Processes on each rover other than its ssh server."""
    return {name: lab[name].pids() - {servers[name].proc.pid} for name in AGENTS}


def wait_until_empty(lab: Lab, servers: dict[str, SshServer], deadline_s: float) -> None:
    """Wait (event: the namespaces empty) with a generous deadline; fail naming leftovers."""
    deadline = time.monotonic() + deadline_s
    left = ours(lab, servers)
    while any(left.values()) and time.monotonic() < deadline:
        time.sleep(0.1)
        left = ours(lab, servers)
    desc = {
        name: [Path(f"/proc/{p}/cmdline").read_text().replace("\0", " ") for p in pids]
        for name, pids in left.items()
        if pids
    }
    assert not any(left.values()), f"processes left on the rovers: {desc}"


def wait_running(out: Path, coord, n: int, deadline_s: float = 90.0) -> dict:
    """Wait until every agent has sent telemetry of the run phase; return run.json."""
    deadline = time.monotonic() + deadline_s
    while time.monotonic() < deadline:
        assert coord.poll() is None, coord.communicate()[1]
        tel = [out / "telemetry" / f"agent-{i}.msgpack" for i in range(n)]
        if all(t.exists() and any(b.get("samples") for b in read_telemetry(t)) for t in tel):
            return json.loads((out / "run.json").read_text())
        time.sleep(0.05)
    raise AssertionError("the agents never all reported telemetry")


def test_a_swarm_runs_on_namespace_hosts_over_ssh_and_leaves_nothing(lab, processes, tmp_path):
    lab_, servers = lab
    inv = write_inventory(tmp_path / "hosts.toml", lab_, servers)
    scenario = write_scenario(tmp_path / "rovers.toml", "iterations = 300")
    out = tmp_path / "run"
    coord = start_coordinator(
        lab_, processes, str(scenario), "--inventory", str(inv), "--out", str(out), "--quiet",
        "--json",
    )  # fmt: skip
    stdout, stderr = coord.communicate(timeout=150)
    assert coord.returncode == 0, stderr
    summary = json.loads(stdout)
    assert summary["exit"] == "budget"
    assert summary["messages"]["lost_transport"] == 0
    run = json.loads((out / "run.json").read_text())
    # each agent ran on its machine: it advertised that machine's address
    for name, agents in AGENTS.items():
        for i in agents:
            assert run["agents"][i]["endpoint"].startswith(f"tcp://{lab_[name].address}:")
    assert [h["name"] for h in run["hosts"]] == list(AGENTS)
    assert all(h["server_pid"] for h in run["hosts"])
    for f in ("metrics.csv", "links.csv", "summary.json", "events.jsonl"):
        assert (out / f).exists(), f
    wait_until_empty(lab_, servers, 30.0)


def test_sigkill_of_the_coordinator_leaves_no_process_on_any_host(lab, processes, tmp_path):
    lab_, servers = lab
    inv = write_inventory(tmp_path / "hosts.toml", lab_, servers)
    scenario = write_scenario(tmp_path / "rovers.toml", "seconds = 120.0")
    out = tmp_path / "run"
    coord = start_coordinator(
        lab_, processes, str(scenario), "--inventory", str(inv), "--out", str(out), "--quiet"
    )
    run = wait_running(out, coord, 6)
    agent_pids = {a["pid"] for a in run["agents"]}
    on_rovers = set().union(*ours(lab_, servers).values())
    assert agent_pids <= on_rovers  # the agents really are on the rovers
    os.kill(coord.pid, signal.SIGKILL)
    coord.wait(timeout=10)
    wait_until_empty(lab_, servers, 60.0)


def test_a_frozen_coordinator_loses_its_agents_by_heartbeat_across_ssh(lab, processes, tmp_path):
    """SIGSTOP: the ssh sessions stay open, so only the heartbeat rules can clear the hosts."""
    lab_, servers = lab
    inv = write_inventory(tmp_path / "hosts.toml", lab_, servers)
    scenario = write_scenario(tmp_path / "rovers.toml", "seconds = 120.0")
    out = tmp_path / "run"
    coord = start_coordinator(
        lab_, processes, str(scenario), "--inventory", str(inv), "--out", str(out), "--quiet",
        "--heartbeat-timeout", "2",
    )  # fmt: skip
    wait_running(out, coord, 6)
    os.kill(coord.pid, signal.SIGSTOP)
    try:
        wait_until_empty(lab_, servers, 60.0)
    finally:
        os.kill(coord.pid, signal.SIGCONT)
    _, stderr = coord.communicate(timeout=60)
    assert coord.returncode == 3, stderr
    # every agent left by its own heartbeat rule, and said so; its words came back over ssh
    for i in range(6):
        log = (out / "telemetry" / f"agent-{i}.log").read_text()
        assert "coordinator silent for 2.0 s" in log, (i, log)
        host = "rover1" if i < 3 else "rover2"
        assert f"{host} agent {i}: agent {i}: coordinator silent" in stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["verdict"] == "failed"


def test_a_host_that_cannot_start_is_named_with_its_error(lab, processes, tmp_path):
    lab_, servers = lab
    inv = write_inventory(tmp_path / "hosts.toml", lab_, servers, python="/nonexistent/python3")
    scenario = write_scenario(tmp_path / "rovers.toml", "iterations = 50")
    out = tmp_path / "run"
    coord = start_coordinator(
        lab_, processes, str(scenario), "--inventory", str(inv), "--out", str(out), "--quiet"
    )
    _, stderr = coord.communicate(timeout=90)
    assert coord.returncode == 3, stderr
    run = json.loads((out / "run.json").read_text())
    assert "host rover1" in run["exit"] or "host rover2" in run["exit"]
    assert "/nonexistent/python3" in run["exit"]
    assert "rover1: " in stderr and "/nonexistent/python3" in stderr
    wait_until_empty(lab_, servers, 30.0)
