"""The command line tried as a new user would: mistakes get one clear line and no traceback,
and a coordinator waiting for hand-started agents says where and how many have joined."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.integration

CLI = [sys.executable, "-m", "coordinator.cli"]


def _swarmrig(*args: str) -> subprocess.CompletedProcess[str]:
    """A command that starts no agent (each refuses before it would)."""
    return subprocess.run([*CLI, *args], capture_output=True, text=True, timeout=120)


def _one_clear_line(done: subprocess.CompletedProcess[str], expected: str) -> None:
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    assert done.stderr.strip().splitlines() == [f"swarmrig: error: {expected}"]


def test_listen_without_scheme_is_refused_before_a_run_directory_exists(tmp_path: Path) -> None:
    out = tmp_path / "run"
    done = _swarmrig("run", "--listen", "127.0.0.1:5575", "--out", str(out), "--quiet")
    _one_clear_line(
        done,
        "--listen 127.0.0.1:5575: expected tcp://HOST:PORT, e.g. tcp://0.0.0.0:5570"
        " (did you mean tcp://127.0.0.1:5575?)",
    )
    assert not out.exists()


def test_join_without_scheme_is_refused_without_a_traceback() -> None:
    done = _swarmrig("node", "--join", "localhost:5574", "--agent", "0")
    _one_clear_line(
        done,
        "--join localhost:5574: expected tcp://HOST:PORT, e.g. tcp://lab-pc:5570"
        " (did you mean tcp://localhost:5574?)",
    )


def test_no_launch_needs_listen(tmp_path: Path) -> None:
    done = _swarmrig("run", "--no-launch", "--out", str(tmp_path / "run"))
    _one_clear_line(
        done,
        "--no-launch waits for agents started on other machines; give them an endpoint to"
        " join with --listen tcp://0.0.0.0:PORT",
    )
    assert not (tmp_path / "run").exists()


def test_a_demo_typo_gets_a_suggestion() -> None:
    done = _swarmrig("run", "tidal-bouys", "--quiet")
    _one_clear_line(
        done,
        "tidal-bouys: cannot read the scenario file: No such file or directory"
        ' (did you mean the demo "tidal-buoys"?)',
    )
    done = _swarmrig("check", "depot-partiton")
    assert done.stderr.rstrip().endswith('(did you mean the demo "depot-partition"?)')


def test_check_into_a_closed_pipe_ends_quietly(tmp_path: Path) -> None:
    # 200 priority vectors print far more than a pipe buffers (64 KiB), so the writer does
    # meet the closed pipe
    n = 200
    rows = ",\n".join("[" + ", ".join(["0.005"] * n) + "]" for _ in range(n))
    scenario = tmp_path / "wide.toml"
    scenario.write_text(
        f'[swarm]\nagents = {n}\nseed = 1\n[topology]\nshape = "ring"\n'
        f"[priorities]\ninitial = [\n{rows}\n]\n"
    )
    p = subprocess.Popen(
        [*CLI, "check", str(scenario)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    assert p.stdout is not None and p.stderr is not None
    with p, p.stderr:
        try:
            assert p.stdout.readline().startswith("# swarmrig resolved")
            p.stdout.close()  # what `| head -1` does after its line
            err = p.stderr.read()
            code = p.wait(timeout=120)
        finally:
            p.kill()
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert code == 141  # 128 + SIGPIPE, as a shell reports a writer whose reader left


def test_no_launch_shows_the_endpoint_and_who_has_joined(processes, tmp_path: Path) -> None:
    n = 3
    scenario = tmp_path / "lab.toml"
    scenario.write_text(
        f"""
[swarm]
name = "hand-started"
agents = {n}
seed = 5
iterations = 100

[topology]
shape = "ring"

[network]
transport = "tcp"
host = "127.0.0.1"
"""
    )
    # the system picks the port (no race with other tests for a free one); the coordinator
    # says which it got
    coord = processes.start(
        "run",
        str(scenario),
        "--listen",
        "tcp://127.0.0.1:*",
        "--no-launch",
        "--join-timeout",
        "300",
        "--out",
        str(tmp_path / "run"),
        "--quiet",
        "--json",
    )
    assert coord.stderr is not None
    first = coord.stderr.readline()
    waiting = re.fullmatch(
        rf"swarmrig: waiting for {n} agents at (tcp://127\.0\.0\.1:\d+); start each with\n",
        first,
    )
    assert waiting, first
    endpoint = waiting[1]
    assert coord.stderr.readline() == f"  swarmrig node --join {endpoint} --agent ID\n"
    assert coord.stderr.readline() == f"joined 0 of {n}\n"
    for i in range(n):
        p = subprocess.Popen(
            # agents join one by one here; until go the coordinator may stay silent for longer
            # than the default 3 s on a loaded machine
            [*CLI, "node", "--join", endpoint, "--agent", str(i), "--heartbeat-timeout", "120"],
            start_new_session=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        processes.groups.add(p.pid)
        processes.popen.append(p)
        # the next agent starts only when the coordinator has counted this one
        assert coord.stderr.readline() == f"joined {i + 1} of {n}\n"
    stdout, stderr = coord.communicate(timeout=300)
    assert coord.returncode == 0, stderr
    summary = json.loads(stdout)
    assert summary["exit"] == "budget" and summary["agents"] == n
