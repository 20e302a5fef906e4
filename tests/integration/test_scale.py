"""Scale on real processes: 128 and 256 agents with the default options, `check` on large
scenarios, a swarm larger than the machine holds, an agent that misses the heartbeat."""

from __future__ import annotations

import json
import resource
import signal
import time
from pathlib import Path

import pytest

from coordinator._capacity import default_heartbeat_timeout
from coordinator._limits import AGENTS_MAX
from coordinator._rundir import read_events
from node._errors import EXIT_COORDINATOR_SILENT
from tests.run_dir_spec import RUN_FILES

pytestmark = pytest.mark.integration

#: hang guard for a coordinator (not a pass/fail threshold)
GUARD_S = 600.0


def ring(path: Path, agents: int, *, iterations: int = 6, mode: str = "rounds") -> Path:
    budget = f"iterations = {iterations}" if mode == "rounds" else "seconds = 30.0"
    path.write_text(
        f"""
[swarm]
name = "ring-{agents}"
agents = {agents}
mode = "{mode}"
{budget}
seed = 5

[topology]
shape = "ring"
"""
    )
    return path


@pytest.mark.parametrize("agents", [128, 256])
def test_large_swarms_start_and_finish_with_the_defaults(processes, tmp_path, agents):
    out = tmp_path / "run"
    p = processes.start("run", str(ring(tmp_path / "s.toml", agents)), "--out", str(out), "--quiet")
    processes.watch_run_dir(out)
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 0, stderr[-3000:]
    for name in RUN_FILES:
        assert (out / name).exists(), name
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget" and summary["agents"] == agents
    run = json.loads((out / "run.json").read_text())
    assert run["heartbeat_timeout_s"] == pytest.approx(default_heartbeat_timeout(agents))
    finals = json.loads((out / "final_states.json").read_text())
    assert [f["source"] for f in finals] == ["final report"] * agents


def test_check_output_stays_short_for_large_swarms(processes, tmp_path):
    big = ring(tmp_path / "big.toml", 1500)
    p = processes.start("check", str(big))
    stdout, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 0, stderr
    lines = stdout.splitlines()
    # the resolved scenario (about 40 lines) and some 25 lines of facts, whatever the size
    assert len(lines) < 120, len(lines)
    assert max(len(ln) for ln in lines) < 300, max(lines, key=len)[:300]
    assert "(1500 entries)" in stdout  # a long vector is summarized, its length given

    over = ring(tmp_path / "over.toml", AGENTS_MAX + 904)  # 5000 agents
    p = processes.start("check", str(over))
    stdout, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 2 and not stdout
    assert str(AGENTS_MAX) in stderr and len(stderr.splitlines()) <= 3, stderr


def _few_processes() -> None:
    # ulimit -u 16: fewer threads than this user already runs, so no agent fits
    resource.setrlimit(resource.RLIMIT_NPROC, (16, resource.getrlimit(resource.RLIMIT_NPROC)[1]))


def test_a_swarm_larger_than_the_machine_holds_is_refused_before_anything_starts(
    processes, tmp_path
):
    out = tmp_path / "run"
    scenario = ring(tmp_path / "s.toml", 12)
    p = processes.start("run", str(scenario), "--out", str(out), preexec_fn=_few_processes)
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 2, stderr
    assert "[swarm].agents = 12, but this machine can hold 0 agent processes" in stderr, stderr
    assert "ulimit -u 16" in stderr and "memory:" in stderr and "per agent" in stderr, stderr
    assert not out.exists()  # nothing written, nothing started


def test_an_agent_that_misses_the_heartbeat_says_so_and_so_does_the_coordinator(
    processes, tmp_path
):
    out = tmp_path / "run"
    scenario = ring(tmp_path / "s.toml", 4, mode="async")
    p = processes.start(
        "run", str(scenario), "--out", str(out), "--quiet", "--heartbeat-timeout", "1"
    )
    processes.watch_run_dir(out)
    deadline = time.monotonic() + GUARD_S
    events = out / "events.jsonl"
    while not (events.exists() and any(e["event"] == "go" for e in read_events(events))):
        assert p.poll() is None and time.monotonic() < deadline, "no go event"
        time.sleep(0.02)
    p.send_signal(signal.SIGSTOP)  # the coordinator stalls: no heartbeat
    logs = [out / "telemetry" / f"agent-{i}.log" for i in range(4)]
    try:
        while not all("coordinator silent for 1.0 s" in f.read_text() for f in logs):
            assert time.monotonic() < deadline, [f.read_text() for f in logs]
            time.sleep(0.05)
    finally:
        p.send_signal(signal.SIGCONT)
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 3, stderr
    run = json.loads((out / "run.json").read_text())
    assert "missed the coordinator's heartbeat: no word for 1.0 s" in run["exit"], run["exit"]
    events = read_events(out / "events.jsonl")
    kinds = [e["event"] for e in events]
    assert "coordinator-stalled" in kinds and "agent-missed-heartbeat" in kinds, kinds
    stalled = next(e for e in events if e["event"] == "coordinator-stalled")
    assert stalled["stalled_s"] > 1.0 and stalled["heartbeat_timeout_s"] == 1.0
    lost = [e for e in events if e["event"] == "agent-lost"]
    assert lost and all(e["status"] == EXIT_COORDINATOR_SILENT for e in lost), lost
