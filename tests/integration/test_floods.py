"""Floods on real sockets (loopback and ipc only, bounded in count): the run goes on.

Control plane: a test DEALER sends 200,000 one-byte frames and ten frames with a 1 MB type
field to a running coordinator's ROUTER. Every agent keeps its heartbeat and finishes, the
coordinator's memory stays bounded, events.jsonl stays small and counts the refusals.
Data plane: a test socket sends 1 MiB subscriptions, oversized frames and many small
distinct subscriptions to an agent's PUB during a rounds-mode run; the agent survives with
bounded memory and the final states are those of the lockstep engine (the same seed gives
the same states however processes are scheduled: DEVELOPERS.md, "Rounds mode and faults").
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import psutil
import pytest
import zmq

import coordinator
from coordinator._inbox import MAX_LINES
from node._runtime import SUBSCRIPTION_MAX
from tests.integration.test_robustness import Sockets, events, finish, wait_running

pytestmark = pytest.mark.integration

#: one-byte frames of the control flood, and frames with a 1 MB type field among them
SMALL_FRAMES = 200_000
BIG_FRAMES = 10
BIG_TYPE = 1 << 20
#: the bounds the tests hold the tool to (generous: a loaded 2-core machine). Before the
#: bounded inbox the same flood grew the coordinator to 622 MB and events.jsonl to 917 MB.
COORDINATOR_RSS_MAX = 300 << 20
EVENTS_MAX = 1 << 20
AGENT_RSS_MAX = 200 << 20
#: the coordinator must stop by itself after this long (only keeps a hang from the suite)
RUN_DEADLINE_S = 300.0


#: start-up of a swarm on a loaded machine may take long; only a hang fails
START_DEADLINE_S = 120.0


@pytest.fixture
def sockets() -> Iterator[Sockets]:
    owner = Sockets()
    try:
        yield owner
    finally:
        owner.close()


def rss(pid: int) -> int:
    try:
        return psutil.Process(pid).memory_info().rss
    except psutil.NoSuchProcess:
        return 0


def write_scenario(path: Path, body: str) -> Path:
    path.write_text(body)
    return path


# ----------------------------------------------------------------------- control plane


def test_a_control_flood_starves_no_heartbeat_and_is_counted(
    processes: Any, sockets: Sockets, tmp_path: Path
) -> None:
    out = tmp_path / "run"
    processes.watch_run_dir(out)  # the swarm's own process group is killed at teardown
    scenario = write_scenario(
        tmp_path / "s.toml",
        """
[swarm]
name = "flood"
agents = 4
mode = "async"
seconds = 8.0
seed = 43

[topology]
shape = "ring"

[timing]
period_ms = 5.0
""",
    )
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    rj = wait_running(p, out, START_DEADLINE_S)
    dealer = sockets.socket(zmq.DEALER)
    dealer.connect(rj["coordinator"]["endpoint"])
    rnd = random.Random(9)  # fixed: the same flood every run
    big_at = set(rnd.sample(range(SMALL_FRAMES), BIG_FRAMES))
    big = msgpack.packb({"t": "x" * BIG_TYPE})
    sent, rss_max = 0, rss(p.pid)
    deadline = time.monotonic() + RUN_DEADLINE_S
    i = 0
    while i < SMALL_FRAMES and p.poll() is None and time.monotonic() < deadline:
        frame = big if i in big_at else bytes([rnd.randrange(256)])
        try:
            dealer.send(frame, zmq.NOBLOCK)
        except zmq.Again:  # our own queue is full: the coordinator holds us back
            dealer.poll(50, zmq.POLLOUT)
            continue
        sent += 1
        i += 1
        if i % 2000 == 0:
            rss_max = max(rss_max, rss(p.pid))
    while p.poll() is None and time.monotonic() < deadline:
        rss_max = max(rss_max, rss(p.pid))
        time.sleep(0.05)
    code, _, stderr = finish(p, timeout=RUN_DEADLINE_S)
    assert code == 0, stderr[-2000:]
    assert sent > 0
    assert rss_max < COORDINATOR_RSS_MAX, f"coordinator grew to {rss_max / 2**20:.0f} MiB"

    # every agent kept its heartbeat and finished
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget", summary["exit"]
    evs = events(out)
    kinds = {e["event"] for e in evs}
    assert not kinds & {"agent-lost", "agent-failed", "coordinator-error"}, kinds
    finals = json.loads((out / "final_states.json").read_text())
    assert len(finals) == 4 and all(f["x"] is not None for f in finals), finals
    for a in range(4):
        log = (out / "telemetry" / f"agent-{a}.log").read_text()
        assert "coordinator silent" not in log, log

    # events.jsonl stays small, every line short, and the refusals are counted
    size = (out / "events.jsonl").stat().st_size
    assert size < EVENTS_MAX, f"events.jsonl is {size} bytes"
    assert max(len(json.dumps(e)) for e in evs) < 4096
    rejected = [e for e in evs if e["event"] == "control-rejected"]
    assert 0 < len(rejected) <= MAX_LINES
    counted = [e for e in evs if e["event"] == "refusals-counted"]
    assert counted and counted[-1]["final"], counted[-1:]
    total = counted[-1]["total"]
    # what reached the coordinator was refused and counted: never more than was sent
    assert 0 < total <= sent, (total, sent)
    assert summary["refused_control"] == total
    assert counted[-1]["written"] + counted[-1]["suppressed"] == total
    assert counted[-1]["by_event"]["control-rejected"] == total


# -------------------------------------------------------------------------- data plane

ROUNDS = """
[swarm]
name = "subscription-flood"
agents = 3
seed = 47
iterations = {iterations}

[topology]
shape = "ring"

[objective]
kind = "quadratic"
spread = 5.0

[algorithm]
name = "dgd"
step = 0.05

[telemetry]
every_iterations = 100
"""
ITERATIONS = 8_000
#: 1 MiB subscriptions (one cost an agent 50 MB before), oversized frames, and small
#: distinct subscriptions just under the bound
HUGE_SUBSCRIPTIONS = 8
OVERSIZED_FRAMES = 8
SMALL_SUBSCRIPTIONS = 2000


def test_a_subscription_flood_leaves_the_agent_and_the_states_unchanged(
    processes: Any, sockets: Sockets, tmp_path: Path
) -> None:
    body = ROUNDS.format(iterations=ITERATIONS)
    scenario = write_scenario(tmp_path / "s.toml", body)
    # the states the run must end in: the lockstep engine, same scenario, in this process
    ref = coordinator.run(scenario, out=tmp_path / "lockstep", engine="lockstep")
    assert ref.exit_code == 0
    want = json.loads((tmp_path / "lockstep" / "final_states.json").read_text())

    out = tmp_path / "run"
    processes.watch_run_dir(out)
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    rj = wait_running(p, out, START_DEADLINE_S)
    victim = rj["agents"][0]
    pid, endpoint = int(victim["pid"]), victim["endpoint"]
    rss_max = rss(pid)
    rnd = random.Random(11)
    # A subscription in the second part of a message: with ONLY_FIRST_SUBSCRIBE our XSUB
    # passes it upstream as it is, without keeping a copy in its own subscription tree (a
    # 1 MiB one there crashes the sender's own libzmq when it is torn down). Without
    # SUBSCRIPTION_MAX, these eight grew a PUB's process to about 400 MB (measured).
    attack = [[b"\x02", b"\x01" + rnd.randbytes(1 << 20)] for _ in range(HUGE_SUBSCRIPTIONS)]
    attack += [[b"\x02" * (4 << 20)]] * OVERSIZED_FRAMES  # not a subscription, and huge
    attack += [
        [b"\x02", b"\x01" + rnd.randbytes(SUBSCRIPTION_MAX - 8)] for _ in range(SMALL_SUBSCRIPTIONS)
    ]
    # An XSUB sends its messages upstream as they are: subscriptions of any size and
    # anything else. libzmq reconnects it after each disconnection.
    xsub = sockets.socket(zmq.XSUB)
    xsub.setsockopt(zmq.ONLY_FIRST_SUBSCRIBE, 1)
    xsub.setsockopt(zmq.RECONNECT_IVL, 10)
    xsub.connect(endpoint)
    listener = sockets.socket(zmq.SUB)  # a well-behaved subscriber beside the attacker
    listener.setsockopt(zmq.SUBSCRIBE, b"")
    listener.connect(endpoint)
    deadline = time.monotonic() + RUN_DEADLINE_S
    for frame in attack:
        while p.poll() is None and time.monotonic() < deadline:
            try:
                xsub.send_multipart(frame, zmq.NOBLOCK)
                break
            except zmq.Again:
                xsub.poll(20, zmq.POLLOUT)
        rss_max = max(rss_max, rss(pid))
    # the agent still publishes after the attack: our listener hears it
    heard = 0
    while heard < 100 and p.poll() is None and time.monotonic() < deadline:
        if listener.poll(100):
            listener.recv()
            heard += 1
        rss_max = max(rss_max, rss(pid))
    assert heard == 100, "the attacked agent published nothing after the flood"
    code, _, stderr = finish(p, timeout=RUN_DEADLINE_S)
    assert code == 0, stderr[-2000:]
    assert rss_max < AGENT_RSS_MAX, f"the agent grew to {rss_max / 2**20:.0f} MiB"

    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget", summary["exit"]
    kinds = {e["event"] for e in events(out)}
    assert not kinds & {"agent-lost", "agent-failed", "coordinator-error"}, kinds
    got = json.loads((out / "final_states.json").read_text())
    assert len(got) == 3
    for a, b in zip(got, want, strict=True):
        np.testing.assert_array_equal(np.asarray(a["x"]), np.asarray(b["x"]))


def test_the_pub_socket_cuts_off_an_oversized_subscription() -> None:
    # The mechanism behind the test above, on one socket pair: a subscription message
    # above SUBSCRIPTION_MAX disconnects its sender (ZMQ_MAXMSGSIZE), one below it does not.
    from node._runtime import SUBSCRIPTION_HWM

    ctx = zmq.Context()
    try:
        pub = ctx.socket(zmq.PUB)
        pub.setsockopt(zmq.LINGER, 0)
        pub.setsockopt(zmq.MAXMSGSIZE, SUBSCRIPTION_MAX)
        pub.setsockopt(zmq.RCVHWM, SUBSCRIPTION_HWM)
        port = pub.bind_to_random_port("tcp://127.0.0.1")
        xsub = ctx.socket(zmq.XSUB)
        xsub.setsockopt(zmq.LINGER, 0)
        mon = xsub.get_monitor_socket(zmq.EVENT_CONNECTED | zmq.EVENT_DISCONNECTED)
        xsub.connect(f"tcp://127.0.0.1:{port}")

        def next_event() -> int:
            assert mon.poll(10_000), "no monitor event"
            return int(zmq.utils.monitor.recv_monitor_message(mon)["event"])

        assert next_event() == zmq.EVENT_CONNECTED
        xsub.send(b"\x01" + b"a" * (SUBSCRIPTION_MAX - 1))  # at the bound: kept
        xsub.send(b"\x01")
        # the empty subscription above reaches us: the connection is up
        for _ in range(200):
            pub.send(b"hello")
            if xsub.poll(50):
                break
        assert xsub.recv() == b"hello"
        xsub.send(b"\x01" + b"b" * SUBSCRIPTION_MAX)  # one byte over: cut off
        assert next_event() == zmq.EVENT_DISCONNECTED
        xsub.disable_monitor()
        for s in (mon, xsub, pub):
            s.close(linger=0)
    finally:
        ctx.term()
