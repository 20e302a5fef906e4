"""The transport's own limit, for ``swarmrig bench``: a bare pyzmq ring, no swarmrig code.

One process per agent, PUB bound and SUB connected to both ring neighbours over ipc, a
blocking receive, msgpack tuples ``(sender, iteration, x)``, a warm-up until every agent has
heard both neighbours, then synchronous DGD rounds. The rounds-mode figure of the real
agents is reported as a ratio to this loop, measured in the same call.
"""

from __future__ import annotations

import multiprocessing as mp
import shutil
import tempfile
import time
from typing import Any

__all__ = ["bare_ring_rate"]


def _agent(i: int, n: int, rounds: int, folder: str, out: Any, ready: Any) -> None:
    import msgpack
    import numpy as np
    import zmq

    def addr(j: int) -> str:
        return f"ipc://{folder}/r{j}"

    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.bind(addr(i))
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    nbrs = ((i - 1) % n, (i + 1) % n)
    for j in nbrs:
        sub.connect(addr(j))
    target = np.random.default_rng(i).normal(size=2) * 10.0
    x = np.zeros(2)
    hello = msgpack.packb((i, -1, [0.0, 0.0]))
    heard: set[int] = set()
    while len(heard) < 2:  # warm-up: until both neighbours are heard (slow joiners)
        pub.send(hello)
        if sub.poll(5):
            while True:
                try:
                    m = msgpack.unpackb(sub.recv(zmq.NOBLOCK))
                except zmq.Again:
                    break
                if m[1] == -1:
                    heard.add(m[0])
    with ready.get_lock():
        ready.value += 1
    while ready.value < n:  # keep saying hello until every agent heard its neighbours
        pub.send(hello)
        time.sleep(0.002)
    for _ in range(20):
        pub.send(hello)
    pending: dict[tuple[int, int], Any] = {}
    t0 = time.perf_counter()
    for k in range(rounds):
        pub.send(msgpack.packb((i, k, x.tolist())))
        got = {j: pending.pop((j, k)) for j in nbrs if (j, k) in pending}
        while len(got) < 2:
            m = msgpack.unpackb(sub.recv())
            if m[1] == k:
                got[m[0]] = m[2]
            elif m[1] > k:
                pending[(m[0], m[1])] = m[2]
        mixed = x / 3.0 + sum(np.asarray(v) / 3.0 for v in got.values())
        x = mixed - 0.1 * (x - target)
    out.put(time.perf_counter() - t0)
    time.sleep(0.2)  # neighbours may still wait for this round's message
    pub.close(0)
    sub.close(0)
    ctx.term()


def bare_ring_rate(n: int, rounds: int, timeout_s: float = 120.0) -> float:
    """Swarm iterations per second of the bare ring of ``n`` agents (slowest agent's time)."""
    # fork, as the probe does: the bench holds no live ZeroMQ context when it calls this
    ctx = mp.get_context("fork")
    folder = tempfile.mkdtemp(prefix="swarmrig-bare-")
    out, ready = ctx.Queue(), ctx.Value("i", 0)
    procs = [
        ctx.Process(target=_agent, args=(i, n, rounds, folder, out, ready), daemon=True)
        for i in range(n)
    ]
    try:
        for p in procs:
            p.start()
        deadline = time.monotonic() + timeout_s
        times = [out.get(timeout=max(0.1, deadline - time.monotonic())) for _ in range(n)]
        for p in procs:
            p.join(timeout=5.0)
        return n * rounds / max(times)
    finally:
        for p in procs:
            if p.is_alive():
                p.kill()
                p.join(timeout=5.0)
        shutil.rmtree(folder, ignore_errors=True)
