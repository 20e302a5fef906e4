"""Attacks on a running swarm, on loopback with real processes: the coordinator signals only
processes its own fork server started (coordinator._process_faults).

A stranger that joins a ``--no-launch`` coordinator under an agent's id and claims the pid of
an unrelated process (a ``sleep`` this test started) gets a crash and a pause fault: the
sleep is never stopped, continued or killed (the kernel's wait status of our own child says
so, not the coordinator's word), events.jsonl records each refusal with the claimed id and
pid, and the stranger is told to crash and pause itself instead. Hellos claiming pid -1, 0
or 1 (``kill`` would reach every process of the user or of the group) are refused.

Forged and junk data frames: an agent that runs our agent code but also publishes, at two
iterations, a frame under an epoch the coordinator never announced (2^32 - 1, valid
checksum), one with a sequence jump just under the refusal limit, one with a NaN state under
the next sequence number, junk bytes, a frame failing its checksum, an oversized one and one
from an agent id that does not exist. Its out-neighbours must refuse them all without any
effect: the final states equal those of a clean run with the same seed (the lockstep engine,
which runs the same agent core), and links.csv, summary.json and events.jsonl count exactly
what was sent.
"""

from __future__ import annotations

import contextlib
import csv
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zmq

from coordinator._api import load
from coordinator._api import run as run_scenario
from coordinator._run import RunOptions, execute
from node._wire import PROTOCOL, decode_control, encode_control
from tests.integration.test_robustness import Sockets, events, receive, sockets  # noqa: F401

pytestmark = pytest.mark.integration


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _scenario(path: Path, agents: int, body: str) -> Path:
    path.write_text(
        f"""
[swarm]
name = "attacked"
agents = {agents}
seed = 5
{body}

[topology]
shape = "ring"

[network]
transport = "tcp"
host = "127.0.0.1"
"""
    )
    return path


def _agent(processes: Any, endpoint: str, agent: int, claim_pid: int | None = None) -> Any:
    """``swarmrig node`` for one agent; with ``claim_pid``, a stranger running the same
    agent code whose hello claims that pid instead of its own."""
    if claim_pid is None:
        cmd = ["-m", "coordinator.cli", "node", "--join", endpoint, "--agent", str(agent)]
    else:
        code = (
            "import os, sys; import node._runtime as r; "
            f"os.getpid = lambda: {claim_pid}; sys.exit(r.main({endpoint!r}, {agent}))"
        )
        cmd = ["-c", code]
    p = subprocess.Popen(
        [sys.executable, *cmd],
        start_new_session=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    processes.groups.add(p.pid)
    processes.popen.append(p)
    return p


def rounds_scenario(tmp_path: Path, agents: int, iterations: int) -> tuple[Path, Any]:
    """A rounds-mode ring scenario that never gives a round up, and its clean run (the
    lockstep engine, same agent core): what an attacked run must end at."""
    body = (
        f'mode = "rounds"\niterations = {iterations}\n\n'
        # generous: a round given up on would change the states (not what is tested here)
        "[timing]\nround_timeout_ms = 600000.0\n"
    )
    sc = _scenario(tmp_path / "s.toml", agents, body)
    clean = run_scenario(sc, out=tmp_path / "clean", engine="lockstep")
    assert clean.summary["exit"] == "budget"
    return sc, clean


def start_script(processes: Any, code: str) -> subprocess.Popen:
    """``python -c code`` in its own process group, killed by the fixture's teardown."""
    p = subprocess.Popen(
        [sys.executable, "-c", code], start_new_session=True, stderr=subprocess.PIPE, text=True
    )
    processes.groups.add(p.pid)
    processes.popen.append(p)
    return p


def final_states(run_dir: Path, agents: int, iterations: int) -> np.ndarray:
    """Every agent's final state, each checked to have run all ``iterations``."""
    finals = json.loads((run_dir / "final_states.json").read_text())
    assert [f["iteration"] for f in finals] == [iterations] * agents, finals
    return np.asarray([f["x"] for f in finals])


class _Coordinator(threading.Thread):
    """A ``--no-launch`` coordinator run through the Python API in a thread, with a join
    deadline generous enough for agents started slowly on a loaded machine."""

    def __init__(self, scenario: Path, out: Path) -> None:
        super().__init__(daemon=True)
        self.endpoint = f"tcp://127.0.0.1:{_free_port()}"
        self.options = RunOptions(
            out=out, listen=self.endpoint, launch_local=False, handshake_timeout=300.0
        )
        self.swarm = load(scenario)
        self.out = out
        self.result: Any = None
        self.error: BaseException | None = None
        self.start()
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline:  # bound (run.json names it): agents may come
            assert self.is_alive(), self.error
            with contextlib.suppress(FileNotFoundError, json.JSONDecodeError):
                if json.loads((out / "run.json").read_text()).get("coordinator"):
                    return
            time.sleep(0.02)
        raise AssertionError(f"{out}/run.json never named the coordinator's endpoint")

    def run(self) -> None:
        try:
            self.result = execute(self.swarm, self.options)
        except BaseException as exc:  # reported by finish()
            self.error = exc

    def finish(self) -> Any:
        self.join(300.0)
        assert not self.is_alive(), "the coordinator did not end"
        assert self.error is None, repr(self.error)
        assert self.result.exit_code == 0, self.result.summary["exit"]
        return self.result


def _state(pid: int) -> str:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("State:"):
            return line.split()[1]
    raise AssertionError(f"/proc/{pid}/status has no State line")


@pytest.fixture
def bystander() -> Any:
    """An unrelated process of ours whose pid a stranger will claim."""
    p = subprocess.Popen(["sleep", "600"])
    try:
        yield p
    finally:
        p.kill()
        p.wait(timeout=10)


def test_a_stranger_claiming_another_pid_gets_no_signal(processes, bystander, tmp_path):
    n, victim = 3, 0
    sc = _scenario(
        tmp_path / "s.toml",
        n,
        'mode = "async"\nseconds = 3.0\n\n[timing]\nperiod_ms = 5.0\n\n'
        '[[fault]]\nkind = "pause"\nagents = [0]\nstart_s = 0.3\nduration_s = 0.5\n\n'
        '[[fault]]\nkind = "crash"\nagents = [0]\nstart_s = 1.2\n',
    )
    out = tmp_path / "run"
    coord = _Coordinator(sc, out)
    stranger = _agent(processes, coord.endpoint, victim, claim_pid=bystander.pid)
    honest = [_agent(processes, coord.endpoint, i) for i in range(1, n)]
    coord.finish()

    # The bystander: alive, sleeping, and the kernel has no stop, continue or exit to report.
    assert bystander.poll() is None
    assert _state(bystander.pid) == "S", _state(bystander.pid)
    flags = os.WNOHANG | os.WUNTRACED | os.WCONTINUED
    assert os.waitpid(bystander.pid, flags) == (0, 0)

    ev = events(out)
    refused = [e for e in ev if e["event"] == "signal-refused"]
    assert [e["action"] for e in refused] == ["pause", "resume", "crash"], refused
    for e in refused:
        assert e["agent"] == victim and e["claimed_pid"] == bystander.pid, e
        assert e["instead"] == "directive" and "not started by this coordinator" in e["reason"]
    # ... and the stranger was told to do it itself: it paused, resumed, then killed itself.
    assert stranger.wait(timeout=30) == -signal.SIGKILL, stranger.stderr.read()[-2000:]
    crash = next(e for e in ev if e["event"] == "crash")
    assert crash["agent"] == victim and crash["pid"] is None and crash["directive"] is True
    for p in honest:
        assert p.wait(timeout=30) == 0, p.stderr.read()[-2000:]
    run = json.loads((out / "run.json").read_text())
    entry = run["agents"][victim]
    assert entry["pid"] is None and entry["claimed_pid"] == bystander.pid, entry


def test_hellos_claiming_pid_minus_one_zero_or_one_are_refused(
    processes,
    sockets,  # noqa: F811 (the fixture imported above)
    tmp_path,
):
    n = 3
    sc = _scenario(tmp_path / "s.toml", n, 'mode = "rounds"\niterations = 50\n')
    out = tmp_path / "run"
    coord = _Coordinator(sc, out)
    for pid in (-1, 0, 1):
        d = sockets.socket(zmq.DEALER)
        d.connect(coord.endpoint)
        hello = {"host": "intruder", "pid": pid, "version": "0.1.0", "protocol": PROTOCOL}
        d.send(encode_control("hello", agent=0, **hello))
        refusal = decode_control(receive(d, f"refusal of pid {pid}"))
        assert refusal["t"] == "refuse" and f"pid {pid}" in refusal["reason"], refusal
    # The refused hellos took no slot: the real agents join and the run completes.
    agents = [_agent(processes, coord.endpoint, i) for i in range(n)]
    coord.finish()
    for p in agents:
        assert p.wait(timeout=30) == 0, p.stderr.read()[-2000:]
    refused = [e for e in events(out) if e["event"] == "hello-refused"]
    assert [(e["agent"], e["pid"]) for e in refused] == [(0, -1), (0, 0), (0, 1)], refused
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget" and summary["refused_peers"] == 3, summary


def test_an_agent_started_by_hand_crashes_and_rejoins_by_itself(processes, tmp_path):
    # Nothing forked it, so nothing here may signal it: it ends its own incarnation and joins
    # again after restart_after_s, under a new epoch, in the same process.
    n, k = 3, 1
    sc = _scenario(
        tmp_path / "s.toml",
        n,
        'mode = "async"\nseconds = 3.0\n\n[timing]\nperiod_ms = 5.0\n\n'
        '[[fault]]\nkind = "crash"\nagents = [1]\nstart_s = 0.5\nrestart_after_s = 0.5\n'
        'restart_state = "last"\n',
    )
    out = tmp_path / "run"
    coord = _Coordinator(sc, out)
    agents = [_agent(processes, coord.endpoint, i) for i in range(n)]
    coord.finish()
    for p in agents:
        assert p.wait(timeout=30) == 0, p.stderr.read()[-2000:]
    ev = events(out)
    names = [e["event"] for e in ev]
    order = [names.index(x) for x in ("signal-refused", "crash", "restart", "agent-rejoined")]
    assert order == sorted(order), names
    rejoined = next(e for e in ev if e["event"] == "agent-rejoined")
    assert rejoined["agent"] == k and rejoined["epoch"] == 1 and rejoined["state"] == "last"
    assert rejoined["claimed_pid"] == agents[k].pid and rejoined["pid"] is None
    assert "agent-lost" not in names and "agent-failed" not in names, names
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget", summary["exit"]
    run = json.loads((out / "run.json").read_text())
    assert run["agents"][k]["epoch"] == 1


#: the iterations at which the injector publishes its forged frames
INJECT_AT = (20, 40)
FORGED_PER_ROUND = 3  # unannounced epoch, sequence jump, NaN state (each on every out-link)
JUNK_PER_ROUND = 4  # junk bytes, bad checksum, oversized, unknown sender (each receiver)
INJECTOR = """
import random, sys
import numpy as np
import node._runtime as r
from node._wire import MAX_DATA_FRAME

rnd = random.Random(7)
publish = r.Node.publish


def forging_publish(self, payload, iteration):
    if iteration in {inject_at}:
        lay, t = self.rx.layout, self.clock()
        zero = {{k: np.zeros(n) for k, n in self.sizes.items()}}
        nan = {{k: np.full(n, np.nan) for k, n in self.sizes.items()}}
        good = lay.encode(self.agent, self.epoch, self.seq, iteration, t, zero)
        for frame in (
            lay.encode(self.agent, 2**32 - 1, self.seq, iteration, t, zero),
            lay.encode(self.agent, self.epoch, self.seq + (1 << 20) - 1, iteration, t, zero),
            lay.encode(self.agent, self.epoch, self.seq, iteration, t, nan),
            bytes(rnd.randrange(256) for _ in range(rnd.randrange(1, 300))),
            good[:-1] + bytes([good[-1] ^ 0x55]),
            b"\\x00" * (MAX_DATA_FRAME + 1),
            lay.encode(99, 0, 0, iteration, t, zero),
        ):
            self.pub.send(frame)
    publish(self, payload, iteration)


r.Node.publish = forging_publish
sys.exit(r.main({endpoint!r}, {agent}))
"""


def test_forged_and_junk_data_frames_are_counted_and_change_nothing(processes, tmp_path):
    n, v, iterations = 4, 2, 60
    sc, clean = rounds_scenario(tmp_path, n, iterations)

    out = tmp_path / "run"
    coord = _Coordinator(sc, out)
    code = INJECTOR.format(inject_at=set(INJECT_AT), endpoint=coord.endpoint, agent=v)
    injector = start_script(processes, code)
    agents = [_agent(processes, coord.endpoint, i) for i in range(n) if i != v]
    result = coord.finish()
    for p in [*agents, injector]:
        assert p.wait(timeout=30) == 0, p.stderr.read()[-2000:]
    assert result.summary["exit"] == "budget" and result.summary["verdict"] != "diverged"

    np.testing.assert_allclose(
        final_states(out, n, iterations),
        final_states(clean.run_dir, n, iterations),
        rtol=0,
        atol=1e-9,
    )

    rounds = len(INJECT_AT)
    outs = sorted(load(sc).topology.out_neighbours(v))
    with (out / "links.csv").open() as f:
        rows = {(int(r["from"]), int(r["to"])): r for r in csv.DictReader(f)}
    for (src, dst), row in rows.items():
        expected = FORGED_PER_ROUND * rounds if src == v else 0
        assert int(row["forged"]) == expected, (src, dst, row)
        assert int(row["rejected"]) == 0 and int(row["lost_transport"]) == 0, row
    messages = json.loads((out / "summary.json").read_text())["messages"]
    assert messages["forged"] == FORGED_PER_ROUND * rounds * len(outs), messages
    assert messages["unattributed"] == JUNK_PER_ROUND * rounds * len(outs), messages
    refused = [e for e in events(out) if e["event"] == "data-refused"]
    assert len(refused) == 1, refused
    assert refused[0]["forged_by_link"] == [[v, o, FORGED_PER_ROUND * rounds] for o in outs]
    assert refused[0]["unattributed_by_agent"] == {str(o): JUNK_PER_ROUND * rounds for o in outs}
