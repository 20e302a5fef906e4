"""``swarmrig bench``: what this machine can hold, measured now.

Every figure is measured in this call: spawn time (until every agent is ready), rounds-mode
swarm iterations per second (agent iterations of the whole swarm per second of run phase),
the node's message path (encode -> PUB -> SUB -> decode, validate, account, fault
decision) next to raw pyzmq moving the same bytes between two processes, and the cost of
CURVE: a ring and the message path over TCP, keyed and plaintext, as a ratio.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from coordinator._bare_ring import bare_ring_rate

__all__ = [
    "batch_rate",
    "bench",
    "curve_rounds_rate",
    "message_path",
    "print_bench",
    "rounds_rate",
    "spawn_time",
]


def _scenario(n: int, mode: str = "rounds", iterations: int = 1, shape: str = "ring") -> dict:
    return {
        "swarm": {
            "name": f"bench-{shape}-{n}",
            "agents": n,
            "dimension": 2,
            "seed": 1,
            "mode": mode,
            "iterations": iterations,
        },
        "topology": {"shape": shape},
        "objective": {"kind": "quadratic"},
        "algorithm": {"name": "dgd", "step": 0.1},
        "telemetry": {"every_iterations": max(1, iterations // 20)},
    }


def _run(scenario: dict, curve: bool = False) -> dict[str, Any]:
    from coordinator._api import run

    root = Path(tempfile.mkdtemp(prefix="swarmrig-bench-"))
    try:
        keys = None
        if curve:
            from coordinator._keys import make_keys

            keys = make_keys(root / "keys", agents=int(scenario["swarm"]["agents"]))
        res = run(scenario, out=root / "run", keys=keys)
        out = dict(res.summary)
        out["handshake_s"] = json.loads((root / "run" / "run.json").read_text()).get("handshake_s")
        if res.exit_code != 0:
            raise RuntimeError(f"bench run failed: {res.summary['exit']}")
        return out
    finally:
        shutil.rmtree(root, ignore_errors=True)


def spawn_time(n: int) -> float:
    """Seconds from the start of the launch until all ``n`` agents reported ready."""
    return float(_run(_scenario(n, iterations=1, shape="ring"))["handshake_s"])


def rounds_rate(n: int, iterations: int) -> float:
    """Rounds mode on a ring of ``n``: agent iterations per second of the run phase."""
    return float(_run(_scenario(n, iterations=iterations))["iterations_per_s"])


def curve_rounds_rate(n: int, iterations: int, curve: bool) -> float:
    """Rounds mode on a ring of ``n`` over loopback TCP, every channel with CURVE (fresh keys,
    ZAP allow-lists) or plaintext: agent iterations per second of the run phase."""
    sc = _scenario(n, iterations=iterations)
    sc["swarm"]["name"] = f"bench-{'curve' if curve else 'plain'}-ring-{n}"
    sc["network"] = {"transport": "tcp"}
    return float(_run(sc, curve=curve)["iterations_per_s"])


def batch_rate(n: int, rounds: int, seeds: int = 1, shape: str = "ring") -> float:
    """The batch engine (DGD, ``seeds`` seeds in one block): agent iterations of every seed
    per second of the joint round loop (run directories written, not timed)."""
    from coordinator._batch import run_batch

    sc = _scenario(n, iterations=rounds, shape=shape)
    if shape == "random-geometric":
        # well above the connectivity radius sqrt(ln n / (pi n)) of a random geometric graph
        # in the unit square (Penrose 1997; from memory)
        sc["topology"]["radius"] = float(np.sqrt(2.0 * np.log(n) / (np.pi * n)) * 1.6)
    summaries = run_batch(sc, seeds=list(range(1, seeds + 1)))
    for s in summaries:
        if s["exit"] != "budget":
            raise RuntimeError(f"bench batch run failed: {s['exit']}")
    return sum(s["iterations_total"] for s in summaries) / summaries[0]["run_s"]


def _sender(
    endpoint: str,
    ctl_endpoint: str,
    frames: list[bytes] | None,
    count: int,
    encode: bool,
    curve: tuple[bytes, bytes, bytes] | None = None,
) -> None:
    from node._security import DATA_DOMAIN, Gatekeeper, curve_server
    from node._wire import DataLayout

    encode = DataLayout({"x": 2}).encoder(0, 0)  # what an agent's publish uses
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.SNDHWM, 0)
    pub.setsockopt(zmq.LINGER, -1)
    gate = None
    if curve is not None:  # an agent's data PUB of a keyed swarm: CURVE server, ZAP allow-list
        public, secret, subscriber = curve
        gate = Gatekeeper(ctx)
        gate.allow(DATA_DOMAIN, {subscriber: "bench"})
        curve_server(pub, public, secret, DATA_DOMAIN)
    pub.bind(endpoint)
    ctl = ctx.socket(zmq.PAIR)
    ctl.connect(ctl_endpoint)
    ctl.recv()  # the receiver is subscribed
    x = np.zeros(2)
    payload = {"x": x}
    send = pub.send
    if encode:
        clock = time.monotonic
        for seq in range(count):
            send(encode(seq, seq, clock(), payload))
    else:
        assert frames is not None
        frame = frames[0]
        for _ in range(count):
            send(frame)
    ctl.recv()  # the receiver has everything
    pub.close()
    ctl.close()
    if gate is not None:
        gate.stop()
    ctx.term()


def message_path(
    count: int,
    *,
    node_path: bool,
    fault: dict | None = None,
    transport: str = "ipc",
    curve: bool = False,
) -> dict[str, Any]:
    """Move ``count`` messages one way between two processes; messages per second received.

    ``node_path``: the sender encodes each message as an agent does and the receiver runs
    every frame through the agent's Receiver (decode, validate, account, fault decision);
    otherwise both sides move the same pre-encoded bytes with plain pyzmq calls. ``curve``:
    the PUB and SUB are set up as in a keyed swarm (CURVE, the PUB's ZAP allow-list).
    """
    from node._receiver import Receiver
    from node._security import curve_client
    from node._wire import encode_data

    keys = None
    if curve:
        server, client = zmq.curve_keypair(), zmq.curve_keypair()
        keys = (server[0], server[1], client[0])

    tmp = tempfile.mkdtemp(prefix="swarmrig-msg-")
    if transport == "ipc":
        endpoint = f"ipc://{tmp}/p"
    else:
        import socket

        with socket.socket() as probe:
            probe.bind(("127.0.0.1", 0))
            endpoint = f"tcp://127.0.0.1:{probe.getsockname()[1]}"
    frame = encode_data(0, 0, 0, 0, 0.0, {"x": np.zeros(2)})
    pid = os.fork()
    if pid == 0:  # the child never touches the parent's contexts
        code = 0
        try:
            _sender(endpoint, f"ipc://{tmp}/ctl", [frame], count, node_path, keys)
        except BaseException:
            code = 1
        os._exit(code)
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.RCVHWM, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    ctl = ctx.socket(zmq.PAIR)
    ctl.bind(f"ipc://{tmp}/ctl")
    mon = None
    if keys is not None:
        curve_client(sub, client[0], client[1], server[0])
        mon = sub.get_monitor_socket(zmq.EVENT_HANDSHAKE_SUCCEEDED)
    sub.connect(endpoint)
    if mon is not None:  # the CURVE handshake first, then the subscription can travel
        if not mon.poll(60_000):
            raise RuntimeError("bench: the CURVE handshake did not complete within 60 s")
        sub.disable_monitor()
        mon.close(linger=0)
    rx = Receiver(1, [0], {"x": 2}, seed=1, mode="async", period_s=0.001)
    rx.inlinks[0].set_epoch(0)
    if fault is not None:
        rx.add_fault({"fault": fault, "from": [0]})
    time.sleep(0.3)  # subscription established (slow joiner)
    ctl.send(b"go")
    recv = sub.recv
    first = recv()
    t0 = time.perf_counter()
    if node_path:
        # exactly what an agent does with its data socket: batches through its Receiver
        from node._runtime import receive_batch

        rx.on_frame(first, 0.0)
        got = 1
        poller = zmq.Poller()
        poller.register(sub, zmq.POLLIN)
        while got < count:
            n = receive_batch(sub, rx, 0.0)
            if n == 0:
                poller.poll(100)
            got += n
    else:
        for _ in range(count - 1):
            recv()
    dt = time.perf_counter() - t0
    ctl.send(b"done")
    os.waitpid(pid, 0)
    sub.close()
    ctl.close()
    ctx.term()
    shutil.rmtree(tmp, ignore_errors=True)
    out: dict[str, Any] = {"messages": count, "msgs_per_s": (count - 1) / dt}
    if node_path:
        c = rx.inlinks[0].counters[0]
        out.update(
            delivered=c.delivered,
            dropped_injected=c.dropped_injected,
            lost_transport=c.lost_transport,
            rejected=c.rejected,
            held=c.held,
            max_seq=c.max_seq,
        )
    return out


def _median(values: list[float]) -> float:
    return float(np.median(values))


def bench(
    quick: bool = False, repeats: int = 3, progress: Callable[[int, int, str], None] | None = None
) -> dict[str, Any]:
    """Every figure of ``swarmrig bench`` (``quick``: smaller sizes, for a smoke test).

    Each figure is the median of ``repeats`` measurements, all of which are reported too:
    on a small shared machine one measurement alone can be off by a factor of two. The raw
    and the node message paths are measured alternately, so that both see the same machine.
    ``progress(done, total, what)`` is called before each measurement.
    """
    sizes = (8, 16) if quick else (32, 64, 128)
    rounds = 300 if quick else 4000
    count = 50_000 if quick else 1_000_000
    reps = 1 if quick else repeats
    total = reps * (len(sizes) + 2 + 2 + 3 + 3 + 4)
    done = 0

    def step(what: str) -> None:
        nonlocal done
        if progress is not None:
            progress(done, total, what)
        done += 1

    spawn_all: dict[int, list[float]] = {n: [] for n in sizes}
    for n in sizes:
        for _ in range(reps):
            step(f"spawn time, {n} agents")
            spawn_all[n].append(spawn_time(n))
    rates_all: dict[int, list[float]] = {n: [] for n in (8, 32)}
    for n in (8, 32):
        for _ in range(reps):
            step(f"rounds rate, ring of {n}, {rounds} rounds")
            rates_all[n].append(rounds_rate(n, rounds))
    bare_all: dict[int, list[float]] = {n: [] for n in (8, 32)}
    for n in (8, 32):
        for _ in range(reps):
            step(f"bare pyzmq ring of {n}, {rounds} rounds")
            bare_all[n].append(bare_ring_rate(n, rounds))
    batch_rounds = 300 if quick else 2000
    batch_cases = {
        "ring-32": (32, 1, "ring"),
        "ring-32-x16-seeds": (32, 16, "ring"),
        "random-geometric-1024": (256 if quick else 1024, 1, "random-geometric"),
    }
    batch_all: dict[str, list[float]] = {name: [] for name in batch_cases}
    for name, (n, seeds, shape) in batch_cases.items():
        for _ in range(reps):
            step(f"batch engine, {name}, {batch_rounds} rounds")
            batch_all[name].append(batch_rate(n, batch_rounds, seeds, shape))
    loss = {
        "index": 0,
        "kind": "loss",
        "params": {"rate": 0.01},
        "start_s": None,
        "end_s": None,
        "start_iteration": None,
        "end_iteration": None,
    }
    raw_all, node_all, fault_all = [], [], []
    node = faulty = None
    for _ in range(reps):
        step(f"raw pyzmq, {count} messages")
        raw_all.append(message_path(count, node_path=False)["msgs_per_s"])
        step(f"node message path, {count} messages")
        node = message_path(count, node_path=True)
        node_all.append(node["msgs_per_s"])
        step(f"node message path with a loss fault, {count} messages")
        faulty = message_path(count, node_path=True, fault=loss)
        fault_all.append(faulty["msgs_per_s"])
    # The cost of CURVE, plaintext and keyed measured alternately (same machine, same call):
    # a ring over loopback TCP (every channel keyed), and the node message path over TCP.
    curve_all: dict[str, list[float]] = {"plain": [], "curve": []}
    path_all: dict[str, list[float]] = {"plain": [], "curve": []}
    curve_ring, curve_rounds = 8, (300 if quick else 2000)
    for _ in range(reps):
        for mode in ("plain", "curve"):
            step(f"rounds rate, ring of {curve_ring} over TCP, {mode}, {curve_rounds} rounds")
            curve_all[mode].append(curve_rounds_rate(curve_ring, curve_rounds, mode == "curve"))
        for mode in ("plain", "curve"):
            step(f"node message path over TCP, {mode}, {count} messages")
            m = message_path(count, node_path=True, transport="tcp", curve=mode == "curve")
            path_all[mode].append(m["msgs_per_s"])
    if progress is not None:
        progress(total, total, "done")
    assert node is not None and faulty is not None
    curve_rates = {mode: _median(v) for mode, v in curve_all.items()}
    curve_paths = {mode: _median(v) for mode, v in path_all.items()}
    raw_m, node_m, fault_m = _median(raw_all), _median(node_all), _median(fault_all)
    process_32 = _median(rates_all[32])
    bare = {n: _median(v) for n, v in bare_all.items()}
    batch = {name: _median(v) for name, v in batch_all.items()}
    return {
        "batch_iterations_per_s": batch,
        "batch_rounds": batch_rounds,
        "batch_ratio_to_processes_32": {name: r / process_32 for name, r in batch.items()},
        "spawn_s": {n: _median(v) for n, v in spawn_all.items()},
        "rounds_iterations_per_s": {n: _median(v) for n, v in rates_all.items()},
        "rounds_iterations": rounds,
        "bare_ring_iterations_per_s": bare,
        "rounds_ratio_to_bare_ring": {n: _median(rates_all[n]) / bare[n] for n in bare},
        "message_path_msgs_per_s": node_m,
        "raw_zmq_msgs_per_s": raw_m,
        "message_path_ratio": node_m / raw_m,
        "message_path": {**node, "msgs_per_s": node_m},
        "fault_layer": {
            "fault": "loss rate 0.01 on the link",
            **faulty,
            "msgs_per_s": fault_m,
            "extra_us_per_message": (1.0 / fault_m - 1.0 / node_m) * 1e6,
        },
        "curve": {
            "ring": curve_ring,
            "rounds": curve_rounds,
            "transport": "tcp (loopback)",
            "rounds_iterations_per_s": curve_rates,
            "rounds_ratio": curve_rates["curve"] / curve_rates["plain"],
            "message_path_msgs_per_s": curve_paths,
            "message_path_ratio": curve_paths["curve"] / curve_paths["plain"],
        },
        "samples": {
            "curve_rounds_iterations_per_s": curve_all,
            "curve_message_path_msgs_per_s": path_all,
            "spawn_s": spawn_all,
            "batch_iterations_per_s": batch_all,
            "bare_ring_iterations_per_s": bare_all,
            "rounds_iterations_per_s": rates_all,
            "raw_zmq_msgs_per_s": raw_all,
            "message_path_msgs_per_s": node_all,
            "fault_layer_msgs_per_s": fault_all,
        },
        "repeats": reps,
        "cpus": os.cpu_count(),
    }


def print_bench(res: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.table import Table

    t = Table(title=f"swarmrig bench (median of {res['repeats']})", show_header=True)
    t.add_column("measure")
    t.add_column("value", justify="right")
    for n, s in res["spawn_s"].items():
        t.add_row(f"spawn {n} agents until all ready", f"{s:.2f} s")
    for n, r in res["rounds_iterations_per_s"].items():
        t.add_row(
            f"rounds mode, ring of {n} ({res['rounds_iterations']} rounds)",
            f"{r:,.0f} swarm iterations/s",
        )
    for n, r in res["bare_ring_iterations_per_s"].items():
        t.add_row(
            f"bare pyzmq ring of {n} (no swarmrig code)",
            f"{r:,.0f} swarm iterations/s (rounds mode at {res['rounds_ratio_to_bare_ring'][n]:.2f})",
        )
    for name, r in res["batch_iterations_per_s"].items():
        ratio = res["batch_ratio_to_processes_32"][name]
        t.add_row(
            f"batch engine, DGD, {name} ({res['batch_rounds']} rounds)",
            f"{r:,.0f} swarm iterations/s ({ratio:,.0f}x processes at 32)",
        )
    t.add_row("raw pyzmq, one way", f"{res['raw_zmq_msgs_per_s']:,.0f} msg/s")
    t.add_row("node message path, one way", f"{res['message_path_msgs_per_s']:,.0f} msg/s")
    t.add_row("  ratio to raw", f"{res['message_path_ratio']:.2f}")
    mp = res["message_path"]
    t.add_row("  messages / lost in transport", f"{mp['messages']:,} / {mp['lost_transport']}")
    fl = res["fault_layer"]
    t.add_row(
        "with a 1% loss fault",
        f"{fl['msgs_per_s']:,.0f} msg/s (+{fl['extra_us_per_message']:.2f} µs per message)",
    )
    cv = res["curve"]
    rr, mp_ = cv["rounds_iterations_per_s"], cv["message_path_msgs_per_s"]
    t.add_row(
        f"CURVE, rounds mode, ring of {cv['ring']} over TCP ({cv['rounds']} rounds)",
        f"{rr['curve']:,.0f} vs {rr['plain']:,.0f} plaintext ({cv['rounds_ratio']:.2f})",
    )
    t.add_row(
        "CURVE, node message path over TCP",
        f"{mp_['curve']:,.0f} vs {mp_['plain']:,.0f} msg/s ({cv['message_path_ratio']:.2f})",
    )
    Console().print(t)
