"""Keyed swarms refuse strangers: real sockets on loopback, real agent processes.

A stranger (a key of its own), a wrong key (a listed public key without its secret, or a
wrong coordinator key), a plaintext peer, a replayed hello (the bytes a genuine agent sent,
captured by a relay and re-sent on another connection) and an authenticated agent claiming
another agent's id try the coordinator; strangers and a listed key that is not a subscriber
try an agent's data socket. Every try must be refused, counted and logged with the peer's
address, and the run's states must be those of a clean keyed run with the same seed
(rounds mode is deterministic: DEVELOPERS.md, "Rounds mode and faults").
"""

from __future__ import annotations

import json
import os
import select
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zmq
from zmq.utils.monitor import recv_monitor_message

import coordinator
from coordinator._keys import make_keys
from coordinator._rundir import read_telemetry
from node._security import load_agent_keys, read_secret
from node._wire import PROTOCOL, decode_control, encode_control

pytestmark = pytest.mark.integration

N = 4
ITERATIONS = 300
TRIES = 3
WAIT_S = 120.0  # only a bound on waiting for events; nothing here is timed
HELLO = {"host": "intruder", "pid": 4242424, "version": "0.1.0", "protocol": PROTOCOL}
_END = (
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
    | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
    | zmq.EVENT_HANDSHAKE_FAILED_AUTH
    | zmq.EVENT_DISCONNECTED
    | zmq.EVENT_HANDSHAKE_SUCCEEDED
)


def scenario(path: Path) -> Path:
    path.write_text(
        f"""
[swarm]
name = "keyed-ring"
agents = {N}
seed = 11
mode = "rounds"
iterations = {ITERATIONS}
[topology]
shape = "ring"
[objective]
kind = "quadratic"
[algorithm]
name = "dgd"
step = 0.1
[telemetry]
every_iterations = 10
[network]
transport = "tcp"
"""
    )
    return path


@pytest.fixture
def ctx() -> Iterator[zmq.Context]:
    c = zmq.Context()
    yield c
    c.destroy(linger=0)


@pytest.fixture(scope="module")
def keys(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_keys(tmp_path_factory.mktemp("keys") / "k", agents=N)


def final_states(run_dir: Path) -> np.ndarray:
    xs = []
    for i in range(N):
        batches = read_telemetry(run_dir / "telemetry" / f"agent-{i}.msgpack")
        finals = [b["final"] for b in batches if "final" in b]
        assert len(finals) == 1, f"{run_dir}: agent {i} has {len(finals)} final reports"
        assert finals[0]["iteration"] == ITERATIONS
        xs.append(finals[0]["state"]["x"])
    return np.asarray(xs)


def events(run_dir: Path) -> list[dict[str, Any]]:
    try:
        text = (run_dir / "events.jsonl").read_text()
    except FileNotFoundError:
        return []
    return [json.loads(line) for line in text.splitlines() if line.endswith("}")]


def wait_events(run_dir: Path, what: str, count: int, **match: Any) -> list[dict[str, Any]]:
    deadline = time.monotonic() + WAIT_S
    while True:
        found = [
            e
            for e in events(run_dir)
            if e["event"] == what and all(e.get(k) == v for k, v in match.items())
        ]
        if len(found) >= count or time.monotonic() > deadline:
            return found
        time.sleep(0.05)


def attacker(
    ctx: zmq.Context,
    kind: int,
    endpoint: str,
    public: bytes | None = None,
    secret: bytes | None = None,
    server: bytes | None = None,
) -> tuple[zmq.Socket, zmq.Socket]:
    """One try: a socket that connects once (no reconnection) and a monitor on it."""
    s = ctx.socket(kind)
    s.linger = 0
    s.setsockopt(zmq.RECONNECT_IVL, -1)
    if public is not None:
        s.curve_publickey, s.curve_secretkey, s.curve_serverkey = public, secret, server
    if kind == zmq.SUB:
        s.setsockopt(zmq.SUBSCRIBE, b"")
    mon = s.get_monitor_socket(_END)
    s.connect(endpoint)
    return s, mon


def refused(s: zmq.Socket, mon: zmq.Socket, what: str) -> None:
    """Wait for the attacker's connection to end without a completed handshake."""
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        if mon.poll(100):
            ev = recv_monitor_message(mon)
            assert ev["event"] != zmq.EVENT_HANDSHAKE_SUCCEEDED, f"{what}: got through"
            break
    else:
        raise AssertionError(f"{what}: its connection neither failed nor ended")
    assert not s.poll(0), f"{what}: received something"
    s.close(linger=0)
    mon.close(linger=0)


class Relay:
    """A TCP relay that records what the client sends (to capture a genuine handshake)."""

    def __init__(self, upstream: int) -> None:
        self.server = socket.create_server(("127.0.0.1", 0))
        self.port = self.server.getsockname()[1]
        self.upstream = upstream
        self.sent = bytearray()
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def run(self) -> None:
        client, _ = self.server.accept()
        up = socket.create_connection(("127.0.0.1", self.upstream))
        with client, up:
            while not self.stop.is_set():
                ready, _, _ = select.select([client, up], [], [], 0.05)
                for r in ready:
                    data = r.recv(65536)
                    if not data:
                        return
                    if r is client:
                        self.sent += data
                        up.sendall(data)
                    else:
                        client.sendall(data)

    def close(self) -> bytes:
        self.stop.set()
        self.thread.join(timeout=10)
        self.server.close()
        return bytes(self.sent)


def captured_hello(ctx: zmq.Context, keys: Path) -> bytes:
    """The bytes agent 0 sends to open a session with the coordinator key and say hello."""
    c_public, c_secret = read_secret(keys / "coordinator.key_secret")
    agent = load_agent_keys(keys, 0)
    stand_in = ctx.socket(zmq.ROUTER)  # holds the coordinator's key: the handshake completes
    stand_in.linger = 0
    stand_in.curve_server = True
    stand_in.curve_secretkey, stand_in.curve_publickey = c_secret, c_public
    port = stand_in.bind_to_random_port("tcp://127.0.0.1")
    relay = Relay(port)
    d = ctx.socket(zmq.DEALER)
    d.linger = 0
    d.curve_publickey, d.curve_secretkey, d.curve_serverkey = (
        agent.public,
        agent.secret,
        agent.coordinator,
    )
    d.connect(f"tcp://127.0.0.1:{relay.port}")
    d.send(encode_control("hello", agent=0, **HELLO))
    assert stand_in.poll(WAIT_S * 1000), "the genuine hello never arrived"
    _, frame = stand_in.recv_multipart()
    assert decode_control(frame)["agent"] == 0
    d.close(linger=0)
    stand_in.close(linger=0)
    data = relay.close()
    assert len(data) > 64 + 200, "captured less than a greeting, HELLO and INITIATE"
    return data


def replay(port: int, data: bytes) -> None:
    """Send captured bytes on a new connection; return when the coordinator hangs up."""
    with socket.create_connection(("127.0.0.1", port)) as s:
        s.settimeout(WAIT_S)
        try:
            s.sendall(data)
            while s.recv(65536):
                pass
        except (ConnectionResetError, BrokenPipeError):
            pass  # hung up on us: what we wait for


def wait_file(path: Path, proc: subprocess.Popen) -> dict[str, Any]:
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        try:
            return json.loads(path.read_text())
        except (FileNotFoundError, json.JSONDecodeError):
            assert proc.poll() is None, f"coordinator exited: {proc.communicate()}"
            time.sleep(0.05)
    raise AssertionError(f"{path} never appeared")


def test_strangers_are_refused_counted_logged_and_change_nothing(
    tmp_path: Path, keys: Path, ctx: zmq.Context, processes
) -> None:
    scn = scenario(tmp_path / "keyed.toml")
    clean_dir = tmp_path / "clean"
    processes.watch_run_dir(clean_dir)
    clean = coordinator.run(scn, out=clean_dir, keys=keys)
    assert clean.exit_code == 0, clean.summary["exit"]
    assert clean.summary["refused_peers"] == 0

    out = tmp_path / "attacked"
    coord = processes.start(
        "run",
        str(scn),
        "--no-launch",
        "--listen",
        "tcp://127.0.0.1:*",
        "--keys",
        str(keys),
        "--join-timeout",
        "600",
        "--quiet",
        "--out",
        str(out),
    )
    run_json = wait_file(out / "run.json", coord)
    endpoint = run_json["coordinator"]["endpoint"]
    port = int(endpoint.rsplit(":", 1)[1])
    assert run_json["security"]["curve"] is True
    c_public = load_agent_keys(keys, 0).coordinator
    a1 = load_agent_keys(keys, 1)

    # -- the control channel ------------------------------------------------------------
    data = captured_hello(ctx, keys)
    control = 0
    for t in range(TRIES):
        stranger = zmq.curve_keypair()
        tries = {
            "stranger": (*stranger, c_public),
            "listed key without its secret": (a1.public, zmq.curve_keypair()[1], c_public),
            "wrong coordinator key": (a1.public, a1.secret, zmq.curve_keypair()[0]),
            "plaintext": (None, None, None),
        }
        for what, (pub, sec, srv) in tries.items():
            s, mon = attacker(ctx, zmq.DEALER, endpoint, pub, sec, srv)
            s.send(encode_control("hello", agent=t % N, **HELLO), zmq.NOBLOCK)
            refused(s, mon, what)
            control += 1
        replay(port, data)
        control += 1
    logged = wait_events(out, "peer-refused", control, by="coordinator")
    assert len(logged) == control, logged

    # an authenticated agent may not join under another agent's id
    d, mon = attacker(ctx, zmq.DEALER, endpoint, a1.public, a1.secret, c_public)
    d.send(encode_control("hello", agent=0, **HELLO))
    assert d.poll(WAIT_S * 1000), "no answer to a hello under a wrong id"
    answer = decode_control(d.recv())
    assert answer["t"] == "refuse" and "agent-1" in answer["reason"], answer
    d.close(linger=0)
    mon.close(linger=0)
    wrong_id = wait_events(out, "hello-refused", 1)
    assert len(wrong_id) == 1 and "must present key 'agent-0'" in wrong_id[0]["reason"]

    # -- the data channel of agent 0 (its subscribers are 1 and 3) ------------------------
    for i in range(N - 1):
        processes.start("node", "--join", endpoint, "--agent", str(i), "--keys", str(keys))
    bound = wait_events(out, "agent-bound", N - 1)
    assert len(bound) == N - 1, bound
    pub0 = next(e["endpoint"] for e in bound if e["agent"] == 0)
    a0_public = load_agent_keys(keys, 0).public
    a2 = load_agent_keys(keys, 2)
    data_tries = {
        "stranger": (*zmq.curve_keypair(), a0_public),
        "listed key that is not a subscriber": (a2.public, a2.secret, a0_public),
        "listed key without its secret": (a1.public, zmq.curve_keypair()[1], a0_public),
        "plaintext": (None, None, None),
    }
    for what, (pub, sec, srv) in data_tries.items():
        s, mon = attacker(ctx, zmq.SUB, pub0, pub, sec, srv)
        refused(s, mon, f"data: {what}")
    by_agent = wait_events(out, "peer-refused", len(data_tries), by="agent 0")
    assert len(by_agent) == len(data_tries), by_agent

    # -- the run goes on as if nobody had knocked ------------------------------------------
    processes.start("node", "--join", endpoint, "--agent", str(N - 1), "--keys", str(keys))
    _, stderr = coord.communicate(timeout=600)
    assert coord.returncode == 0, stderr
    summary = json.loads((out / "summary.json").read_text())
    total = control + 1 + len(data_tries)
    assert summary["refused_peers"] == total, summary["refused_peers"]
    for e in logged + by_agent:
        # the kernel's address of the connection, or the IP from the ZAP request
        assert e["address"].startswith("127.0.0.1") or e["address"] == "unknown", e
        assert e["reason"], e
    zap_denied = [e for e in logged + by_agent if e["reason"].startswith("key refused")]
    assert len(zap_denied) == TRIES + 2, zap_denied  # stranger x TRIES, two on data
    assert all(e["address"].startswith("127.0.0.1") for e in zap_denied), zap_denied
    resolved = sum(e["address"] != "unknown" for e in logged + by_agent)
    print(f"addresses resolved: {resolved} of {len(logged) + len(by_agent)}")
    np.testing.assert_array_equal(final_states(out), final_states(clean_dir))
    assert summary["messages"]["lost_transport"] == 0
    assert summary["messages"]["sent"] == clean.summary["messages"]["sent"]


def test_an_agent_without_keys_gets_no_plan(
    tmp_path: Path, keys: Path, ctx: zmq.Context, processes
) -> None:
    """A real agent process started without --keys never gets a plan, and says why."""
    scn = scenario(tmp_path / "keyed.toml")
    out = tmp_path / "run"
    coord = processes.start(
        "run",
        str(scn),
        "--no-launch",
        "--listen",
        "tcp://127.0.0.1:*",
        "--keys",
        str(keys),
        "--join-timeout",
        "600",
        "--quiet",
        "--out",
        str(out),
    )
    endpoint = wait_file(out / "run.json", coord)["coordinator"]["endpoint"]
    plain = processes.start("node", "--join", endpoint, "--agent", "0", "--heartbeat-timeout", "2")
    _, err = plain.communicate(timeout=WAIT_S)
    assert plain.returncode == 7, err  # README: 7, it missed the coordinator's heartbeat
    assert "coordinator silent" in err, err
    refusals = wait_events(out, "peer-refused", 1, by="coordinator")
    # which side notices the mechanism mismatch first varies: either way it is a refusal
    assert refusals and refusals[0]["reason"].startswith("handshake"), refusals
    # and a keyed agent facing a coordinator key it does not know says which check failed
    other = make_keys(tmp_path / "other", agents=N)
    wrong = processes.start(
        "node",
        "--join",
        endpoint,
        "--agent",
        "0",
        "--keys",
        str(other),
        "--heartbeat-timeout",
        "2",
    )
    _, err = wrong.communicate(timeout=WAIT_S)
    assert wrong.returncode == 7 and "handshake(s) with 127.0.0.1" in err, err
    assert not (out / "summary.json").exists()


def test_listen_beyond_loopback_without_keys_warns(tmp_path: Path, processes) -> None:
    scn = scenario(tmp_path / "open.toml")
    p = processes.start(
        "run", str(scn), "--no-launch", "--listen", "tcp://0.0.0.0:*", "--join-timeout", "1"
    )
    _, err = p.communicate(timeout=WAIT_S)
    assert "warning: --listen tcp://0.0.0.0:* without --keys" in err, err
    assert p.returncode == 3, err


def test_hello_with_another_version_is_refused_naming_both(
    tmp_path: Path, ctx: zmq.Context, processes
) -> None:
    scn = scenario(tmp_path / "v.toml")
    out = tmp_path / "run"
    coord = processes.start(
        "run",
        str(scn),
        "--no-launch",
        "--listen",
        "tcp://127.0.0.1:*",
        "--join-timeout",
        "600",
        "--quiet",
        "--out",
        str(out),
    )
    endpoint = wait_file(out / "run.json", coord)["coordinator"]["endpoint"]
    for version, protocol in (("9.9.9", PROTOCOL), ("0.1.0", PROTOCOL + 1)):
        d = ctx.socket(zmq.DEALER)
        d.linger = 0
        d.connect(endpoint)
        hello = {**HELLO, "version": version, "protocol": protocol}
        d.send(encode_control("hello", agent=0, **hello))
        assert d.poll(WAIT_S * 1000), "no answer to a hello of another version"
        answer = decode_control(d.recv())
        assert answer["t"] == "refuse", answer
        assert f"swarmrig {version} (protocol {protocol})" in answer["reason"], answer
        assert f"swarmrig 0.1.0 (protocol {PROTOCOL})" in answer["reason"], answer
        d.close(linger=0)
    assert len(wait_events(out, "hello-refused", 2)) == 2
    os.killpg(coord.pid, 2)
    coord.communicate(timeout=WAIT_S)


def test_the_bench_keyed_message_path_moves_every_message() -> None:
    """The message paths `swarmrig bench` compares (CURVE and plaintext) lose nothing."""
    from coordinator._bench import message_path

    for curve in (False, True):
        r = message_path(5000, node_path=True, transport="tcp", curve=curve)
        assert (r["delivered"], r["lost_transport"], r["rejected"]) == (5000, 0, 0), (curve, r)


def test_an_inventory_without_keys_warns_and_host_keys_need_keys(tmp_path: Path, processes) -> None:
    """An inventory listening beyond loopback without --keys warns like --listen; an inventory
    naming host key directories in a run without --keys is refused before anything starts."""
    scn = tmp_path / "open.toml"
    scn.write_text(
        scenario(tmp_path / "s.toml").read_text().replace('"tcp"', '"tcp"\nhost = "0.0.0.0"')
    )
    inv = tmp_path / "hosts.toml"
    inv.write_text(
        'coordinator = "tcp://10.213.9.1:5570"\n\n[[host]]\nname = "rover-a"\n'
        f'ssh = "lab@rover-a.local"\nagents = {list(range(N))}\nkeys = "/home/lab/keys"\n'
    )
    out = tmp_path / "run"
    p = processes.start("run", str(scn), "--inventory", str(inv), "--out", str(out), "--quiet")
    _, err = p.communicate(timeout=WAIT_S)
    assert "warning: hosts.toml listens on tcp://0.0.0.0:5570 without --keys" in err, err
    assert "hosts.toml: [[host]] name='rover-a': keys = '/home/lab/keys', but this run" in err
    assert p.returncode == 2, err
    assert not out.exists()  # refused before the run directory was written
