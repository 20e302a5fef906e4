"""Junk on real sockets: the coordinator and an agent count it, drop it, and carry on.

Control plane: a test DEALER sends garbage to a running coordinator's ROUTER (found in
run.json) while a real swarm runs; the run must end normally with the junk on record.
Data plane: an in-process :class:`node._runtime.Node`, set up from a real plan, has its SUB
connected to a PUB socket of the test, which sends it garbage, oversized and old-epoch
frames; its receiver must count them and keep delivering valid frames.
"""

from __future__ import annotations

import csv
import json
import os
import random
import subprocess
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq

from coordinator._api import load
from node._lifecycle import Phase
from node._runtime import Node
from node._wire import (
    MAX_CONTROL_FRAME,
    MAX_DATA_FRAME,
    PROTOCOL,
    decode_control,
    encode_control,
    encode_data,
    encode_probe,
)

pytestmark = pytest.mark.integration

RECV_TIMEOUT_MS = 5000


# ---------------------------------------------------------------------------- fixtures


class Sockets:
    """Every socket a test opens, closed with linger 0 at teardown; the context must end."""

    def __init__(self) -> None:
        self.ctx = zmq.Context()
        self.open: list[zmq.Socket] = []

    def socket(self, kind: int) -> zmq.Socket:
        s = self.ctx.socket(kind)
        s.setsockopt(zmq.LINGER, 0)
        self.open.append(s)
        return s

    def close(self) -> None:
        for s in self.open:
            s.close(linger=0)
        self.ctx.term()  # hangs (and the fault-handler timeout fires) if a socket was left


@pytest.fixture
def sockets() -> Iterator[Sockets]:
    owner = Sockets()
    try:
        yield owner
    finally:
        owner.close()


def write_scenario(path: Path, seconds: float, agents: int = 4) -> Path:
    path.write_text(
        f"""
[swarm]
name = "junk"
agents = {agents}
mode = "async"
seconds = {seconds}
seed = 41

[topology]
shape = "ring"

[timing]
period_ms = 2.0
"""
    )
    return path


def wait_running(p: subprocess.Popen, out: Path, timeout: float = 20.0) -> dict[str, Any]:
    """run.json once the handshake is over (every agent joined); fail if the run ended."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if p.poll() is not None:
            raise AssertionError(f"coordinator exited with {p.returncode}: {p.communicate()}")
        try:
            rj = json.loads((out / "run.json").read_text())
        except (FileNotFoundError, json.JSONDecodeError):
            rj = {}
        if rj.get("exit") == "running":
            return rj
        time.sleep(0.02)
    raise AssertionError(f"{out}/run.json never said the run is running")


def finish(p: subprocess.Popen, timeout: float = 30.0) -> tuple[int, str, str]:
    stdout, stderr = p.communicate(timeout=timeout)
    return p.returncode, stdout, stderr


def events(out: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]


def receive(sock: zmq.Socket, what: str) -> bytes:
    assert sock.poll(RECV_TIMEOUT_MS), f"no {what} within {RECV_TIMEOUT_MS} ms"
    return sock.recv()


def assert_agents_unaffected(out: Path, n: int) -> None:
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "budget", summary["exit"]
    assert summary["verdict"] != "failed"
    kinds = {e["event"] for e in events(out)}
    assert not kinds & {"agent-failed", "agent-lost", "coordinator-error"}, kinds
    rj = json.loads((out / "run.json").read_text())
    assert [a["epoch"] for a in rj["agents"]] == [0] * n  # nobody was replaced
    with (out / "links.csv").open() as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 2 * n  # a ring: every directed link
    assert all(int(r["delivered"]) > 0 for r in rows)


# ----------------------------------------------------------------------- control plane

HELLO = {"host": "intruder", "pid": 4242424, "version": "0.1.0", "protocol": PROTOCOL}


def wire_junk() -> list[bytes]:
    """Frames the control codec must refuse (each one a control-rejected event)."""
    rnd = random.Random(8)  # fixed: the same junk every run
    junk = [bytes(rnd.randrange(256) for _ in range(rnd.randrange(1, 200))) for _ in range(10)]
    junk += [
        b"",
        msgpack.packb([1, 2, 3]),
        msgpack.packb({"agent": 0}),
        msgpack.packb({"t": "shout"}),
        msgpack.packb({"t": "hello", "agent": 0}),  # keys missing
        msgpack.packb({"t": "hello", "agent": True, **HELLO}),  # bool where an int belongs
        msgpack.packb({"t": "hello", "agent": 0, **HELLO, "role": "admin"}),  # extra key
        msgpack.packb({"t": "failed", "error": msgpack.ExtType(3, b"x")}),
        b"\x00" * (MAX_CONTROL_FRAME + 1),  # oversized
    ]
    return junk


def test_control_junk_is_recorded_and_the_run_completes(
    processes: Any, sockets: Sockets, tmp_path: Path
) -> None:
    out = tmp_path / "run"
    processes.watch_run_dir(out)  # the swarm's own process group is killed at teardown
    p = processes.start(
        "run", str(write_scenario(tmp_path / "s.toml", 2.5)), "--out", str(out), "--quiet"
    )
    rj = wait_running(p, out)
    endpoint = rj["coordinator"]["endpoint"]
    dealer = sockets.socket(zmq.DEALER)
    dealer.connect(endpoint)
    junk = wire_junk()
    for frame in junk:
        dealer.send(frame)
    dealer.send_multipart([b"two", b"frames"])  # not one of our agents' messages
    # Schema-valid messages from a peer that never joined are ignored, whatever they claim.
    dealer.send(encode_control("failed", error="diverged: agent 0 is lying"))
    dealer.send(encode_control("ready"))
    dealer.send(encode_control("bound", endpoint="tcp://127.0.0.1:9"))
    # A hello for an agent that does not exist, and one for an agent that is running.
    dealer.send(encode_control("hello", agent=99, **HELLO))
    refusal = decode_control(receive(dealer, "refusal of agent 99"))
    assert refusal["t"] == "refuse" and "99" in refusal["reason"], refusal
    dealer.send(encode_control("hello", agent=-1, **HELLO))
    refusal = decode_control(receive(dealer, "refusal of agent -1"))
    assert refusal["t"] == "refuse" and "-1" in refusal["reason"], refusal
    dealer.send(encode_control("hello", agent=0, **HELLO))
    refusal = decode_control(receive(dealer, "refusal of agent 0"))
    assert refusal["t"] == "refuse" and "already joined" in refusal["reason"], refusal

    code, _, stderr = finish(p)
    assert code == 0, stderr
    rejected = [e for e in events(out) if e["event"] == "control-rejected"]
    assert len(rejected) == len(junk), [e["error"] for e in rejected]
    assert any(f"{MAX_CONTROL_FRAME + 1} bytes" in e["error"] for e in rejected)
    assert_agents_unaffected(out, 4)


def test_refused_hellos_and_malformed_envelopes_are_recorded(
    processes: Any, sockets: Sockets, tmp_path: Path
) -> None:
    # A refusal and a message that is not one frame are junk like any other: they belong in
    # events.jsonl beside the control-rejected ones, so that an intrusion leaves a trace.
    out = tmp_path / "run"
    processes.watch_run_dir(out)  # the swarm's own process group is killed at teardown
    p = processes.start(
        "run", str(write_scenario(tmp_path / "s.toml", 2.0)), "--out", str(out), "--quiet"
    )
    endpoint = wait_running(p, out)["coordinator"]["endpoint"]
    dealer = sockets.socket(zmq.DEALER)
    dealer.connect(endpoint)
    dealer.send(encode_control("hello", agent=99, **HELLO))
    receive(dealer, "refusal of agent 99")
    dealer.send(encode_control("hello", agent=1, **HELLO))
    receive(dealer, "refusal of agent 1")
    dealer.send_multipart([b"two", b"frames"])
    code, _, stderr = finish(p)
    assert code == 0, stderr
    recorded = [e for e in events(out) if e["event"] not in ("go", "stop", "agent-bound")]
    assert len(recorded) == 3, recorded


def test_a_hello_from_a_peer_that_vanished_does_not_stop_the_run(
    processes: Any, tmp_path: Path
) -> None:
    # The refusal goes back to a peer that has already disconnected: with ROUTER_MANDATORY
    # the send fails (EHOSTUNREACH), and that must cost the coordinator nothing.
    out = tmp_path / "run"
    processes.watch_run_dir(out)  # the swarm's own process group is killed at teardown
    p = processes.start(
        "run", str(write_scenario(tmp_path / "s.toml", 1.5)), "--out", str(out), "--quiet"
    )
    endpoint = wait_running(p, out)["coordinator"]["endpoint"]
    ctx = zmq.Context()
    try:
        for agent in (99, 0, 99, 2, 99):
            d = ctx.socket(zmq.DEALER)
            d.setsockopt(zmq.LINGER, 1000)  # flush the hello, then go away at once
            d.connect(endpoint)
            d.send(encode_control("hello", agent=agent, **HELLO))
            d.close()
    finally:
        ctx.term()
    code, _, stderr = finish(p)
    errors = [e for e in events(out) if e["event"] == "coordinator-error"]
    assert code == 0 and not errors, (code, errors, stderr[-2000:])
    assert_agents_unaffected(out, 4)


# -------------------------------------------------------------------------- data plane


@pytest.fixture
def node(sockets: Sockets) -> Iterator[tuple[Node, zmq.Socket, zmq.Socket]]:
    """Agent 0 of a 3-ring, set up from a real plan, with its SUB on a PUB of ours.

    Yields (node, our PUB posing as in-neighbour 1, our ROUTER posing as the coordinator).
    """
    swarm = load(
        {
            "swarm": {"agents": 3, "mode": "async", "seconds": 1.0, "seed": 5},
            "topology": {"shape": "ring"},
        }
    )
    router = sockets.socket(zmq.ROUTER)
    router.bind("tcp://127.0.0.1:*")
    pub = sockets.socket(zmq.PUB)
    pub.setsockopt(zmq.SNDHWM, 0)
    pub.bind("tcp://127.0.0.1:*")
    n = Node(router.getsockopt(zmq.LAST_ENDPOINT).decode(), 0, heartbeat_timeout=30.0)
    try:
        n.setup(swarm.plan(0, 0))
        n.apply_peers({1: [pub.getsockopt(zmq.LAST_ENDPOINT).decode(), 0]})
        pump(n, lambda: sends_probe(pub) and n.rx.inlinks[1].heard, "in-neighbour 1 heard")
        yield n, pub, router
    finally:
        n.close()


def sends_probe(pub: zmq.Socket) -> bool:
    pub.send(encode_probe(1, 0, time.monotonic()))
    return True


def pump(n: Node, done: Callable[[], bool], what: str, timeout: float = 5.0) -> None:
    """Drain the node's data socket until ``done()``; fail naming ``what`` on timeout."""
    assert n.sub is not None
    deadline = time.monotonic() + timeout
    while not done():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for: {what}")
        if n.sub.poll(10):
            n.drain(time.monotonic())


def data(seq: int, *, epoch: int = 0, sender: int = 1) -> bytes:
    return encode_data(sender, epoch, seq, seq, time.monotonic(), {"x": np.array([seq, -seq])})


def test_garbage_on_the_data_socket_is_counted_and_valid_frames_still_arrive(
    node: tuple[Node, zmq.Socket, zmq.Socket],
) -> None:
    n, pub, _ = node
    rnd = random.Random(3)  # fixed junk
    good = data(0)
    flipped = bytearray(good)
    flipped[len(good) // 2] ^= 0x10
    junk = [bytes(rnd.randrange(256) for _ in range(rnd.randrange(0, 120))) for _ in range(20)]
    junk += [
        bytes(flipped),
        good[:-3],
        encode_data(1, 0, 0, 0, 0.0, {"x": np.zeros(5)}),  # wrong payload length
        encode_data(1, 0, 0, 0, 0.0, {"y": np.zeros(2)}),  # wrong payload key
        data(0, sender=7),  # not an in-neighbour of agent 0
        data(0, sender=0),  # ourselves
        b"\x00" * MAX_DATA_FRAME,  # at the bound: ZeroMQ passes it, the codec refuses it
    ]
    for f in junk:
        pub.send(f)
    for s in range(10):
        pub.send(data(s))

    def c() -> Any:
        return n.rx.inlinks[1].counters.get(0)

    pump(n, lambda: c() is not None and c().received == 10, "10 valid frames")
    assert n.rx.unattributed_rejected == len(junk)
    assert (c().delivered, c().rejected, c().lost_transport) == (10, 0, 0)
    box = n.rx.inbox()
    assert box[1].iteration == 9
    np.testing.assert_array_equal(box[1].payload["x"], [9.0, -9.0])
    assert n.counters()["unattributed_rejected"] == len(junk)


def test_old_epoch_and_replayed_frames_are_rejected_over_sockets(
    node: tuple[Node, zmq.Socket, zmq.Socket],
) -> None:
    n, pub, _ = node
    link = n.rx.inlinks[1]
    for s in range(5):
        pub.send(data(s, epoch=0))
    pub.send(data(0, epoch=1))  # an incarnation the coordinator has not announced: forged
    pump(n, lambda: 0 in link.counters and link.counters[0].received == 5, "5 frames")
    pump(n, lambda: link.forged == 1, "the unannounced frame")
    assert link.epoch == 0 and 1 not in link.counters
    # the coordinator's peer table announces the restart (same endpoint here)
    n.apply_peers({1: [pub.getsockopt(zmq.LAST_ENDPOINT).decode(), 1]})
    pub.send(data(0, epoch=1))  # the sender restarted
    for s in range(5, 8):
        pub.send(data(s, epoch=0))  # queued by the dead incarnation
    pub.send(data(0, epoch=1))  # a replay
    pub.send(data(1, epoch=1))

    def received(ep: int) -> int:
        c = link.counters.get(ep)
        return 0 if c is None else c.received

    pump(n, lambda: received(0) == 8 and received(1) == 3, "8 + 3 frames")
    old, new = link.counters[0], link.counters[1]
    assert (old.delivered, old.rejected) == (5, 3)
    assert (new.delivered, new.rejected) == (2, 1)
    assert link.epoch == 1 and link.forged == 1
    assert n.rx.inbox()[1].iteration == 1


def test_an_oversized_data_frame_is_refused_and_delivery_goes_on(
    node: tuple[Node, zmq.Socket, zmq.Socket],
) -> None:
    # A frame just above the codec's MAX_DATA_FRAME is still below the SUB socket's
    # ZMQ_MAXMSGSIZE (twice as large), so the connection stays up: the codec refuses the
    # frame, and the frames after it are delivered on the same connection. (No reconnect
    # happens or is needed here.) The link's accounting still closes.
    n, pub, _ = node
    pub.send(data(0))
    pump(n, lambda: 0 in n.rx.inlinks[1].counters, "the first frame")
    refused_before = n.counters()["unattributed_rejected"]
    pub.send(b"\x00" * (MAX_DATA_FRAME + 1))
    seq = [1]

    def delivered_again() -> bool:
        pub.send(data(seq[0]))
        seq[0] += 1
        time.sleep(0.005)
        return n.rx.inlinks[1].counters[0].delivered >= 2

    # (the timeout only keeps a broken node from hanging the suite)
    pump(n, delivered_again, "delivery after the oversized frame", timeout=60.0)
    # the oversized frame names no sender the codec could read: refused, counted once
    assert n.counters()["unattributed_rejected"] == refused_before + 1
    c = n.rx.inlinks[1].counters[0]
    assert c.received == c.delivered + c.rejected + c.dropped_injected + c.held
    assert c.max_seq + 1 == c.delivered + c.lost_transport


def test_an_oversized_data_frame_is_counted(node: tuple[Node, zmq.Socket, zmq.Socket]) -> None:
    # The design: "ZMQ_MAXMSGSIZE disconnects a peer that sends an oversized message; set it
    # generously and count the disconnects". Something in the node's counters must move.
    n, pub, _ = node
    pub.send(data(0))
    pump(n, lambda: 0 in n.rx.inlinks[1].counters, "the first frame")
    before = {k: v for k, v in n.counters().items() if k != "age"}
    pub.send(b"\x00" * (MAX_DATA_FRAME + 1))
    seq = [1]

    def delivered_again() -> bool:
        pub.send(data(seq[0]))
        seq[0] += 1
        time.sleep(0.005)
        return n.rx.inlinks[1].counters[0].delivered >= 2

    pump(n, delivered_again, "delivery after the oversized frame", timeout=60.0)
    after = {k: v for k, v in n.counters().items() if k != "age"}
    assert after != before, f"the oversized frame left no trace in {after}"


def test_control_junk_to_an_agent_is_refused_and_counted(
    node: tuple[Node, zmq.Socket, zmq.Socket],
) -> None:
    n, _, router = node
    # Let our ROUTER learn the node's identity, as the coordinator does from its hello.
    n.send_ctl("hello", agent=0, host="h", pid=os.getpid(), version="0.1.0", protocol=PROTOCOL)
    ident, hello = router.recv_multipart() if router.poll(RECV_TIMEOUT_MS) else (None, None)
    assert ident is not None, "no hello from the node"
    assert decode_control(hello)["agent"] == 0
    junk = [
        b"",
        b"\xc1\xc1",
        msgpack.packb([1, 2]),
        msgpack.packb({"t": "plan"}),  # lacks its key
        msgpack.packb({"t": "go", "start_node": True, "iteration": 0}),
        b"\x00" * (MAX_CONTROL_FRAME + 1),
        encode_control("go", start_node=0.0, iteration=0),  # does not fit 'joining'
        encode_control("peers", peers={}),  # neither does this
        encode_control("hello", agent=3, **HELLO),  # an agent never receives a hello
    ]
    for f in junk:
        router.send_multipart([ident, f])
    router.send_multipart([ident, encode_control("ping", seq=0, t_coord=1.0)])
    router.send_multipart([ident, encode_control("plan", plan={"agent": 0})])
    got = n.wait_ctl("plan")
    assert got["plan"] == {"agent": 0}
    assert n.refused_control == len(junk)
    assert n.life.phase is Phase.PLANNED
    assert n.life.refused == 3  # the three that decoded but did not fit the phase
    assert router.poll(RECV_TIMEOUT_MS), "no pong from the node"
    _, pong = router.recv_multipart()
    assert decode_control(pong)["seq"] == 0
