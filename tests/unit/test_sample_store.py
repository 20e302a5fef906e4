"""The coordinator's sample store: flat in memory however many samples arrive; the results
read every sample back from the telemetry files, converted exactly as they arrived."""

from __future__ import annotations

import gc
import tracemalloc
from pathlib import Path

import numpy as np

import coordinator
from coordinator._metrics import metric_series
from coordinator._run import VERSION, Coordinator, RunOptions
from coordinator._samples import SampleTail, full_records
from node._wire import PROTOCOL

AGENTS = 3
BATCH = 20  # samples per telemetry batch, as an agent sends every batch_ms


def coordinator_with_agents(tmp_path: Path) -> Coordinator:
    swarm = coordinator.load(
        {
            "swarm": {"name": "store", "agents": AGENTS, "seed": 3, "seconds": 1.0},
            "topology": {"shape": "ring"},
        }
    )
    coord = Coordinator(swarm, RunOptions(out=tmp_path / "run", launch_local=False))
    for i in range(AGENTS):  # the handshake's bookkeeping, no sockets (router is None)
        hello = {"t": "hello", "agent": i, "host": "here", "pid": 1000 + i}
        coord.on_hello(f"id{i}".encode(), {**hello, "version": VERSION, "protocol": PROTOCOL})
    coord.t_go = 100.0
    for a in coord.agents:
        a.offset = 0.25 * a.id  # node clock minus coordinator clock
    return coord


def feed(coord: Coordinator, batches: int, start: int, rng: np.random.Generator) -> None:
    d = coord.s.dimension
    for b in range(batches):
        for a in coord.agents:
            samples = []
            for k in range(BATCH):
                it = start + b * BATCH + k
                x = rng.normal(size=d).tolist()
                t_node = 100.0 + a.offset + 0.001 * it + 1e-7 * a.id
                samples.append([it, t_node, x, None, float(rng.random()), None])
            coord.on_telemetry(a, {"samples": samples, "links": {}, "counters": {}})


def held_bytes() -> int:
    gc.collect()
    return tracemalloc.get_traced_memory()[0]


def test_the_store_does_not_grow_with_the_run(tmp_path: Path) -> None:
    coord = coordinator_with_agents(tmp_path)
    rng = np.random.default_rng(4)
    tracemalloc.start()
    try:
        feed(coord, 50, 0, rng)  # N = 1000 samples per agent
        after_n = held_bytes()
        feed(coord, 450, 50 * BATCH, rng)  # 10 N
        after_10n = held_bytes()
    finally:
        tracemalloc.stop()
        coord.dir.close()
    # A list of samples would hold about 9 N more samples of d floats each (hundreds of kB
    # here); the tail holds two per incarnation. Generous: 64 kB for allocator noise.
    per_sample = 8 * (coord.s.dimension + 6)
    assert after_10n - after_n < 64 * 1024, (after_n, after_10n, per_sample)
    for a in coord.agents:
        r = a.record
        assert isinstance(r.samples, SampleTail) and len(r.samples) == 500 * BATCH
        assert r.samples[-1][0] == 500 * BATCH - 1 and r.samples[0][0] == 0


def test_the_results_see_every_sample_exactly_as_it_arrived(tmp_path: Path) -> None:
    coord = coordinator_with_agents(tmp_path)
    rng = np.random.default_rng(5)
    kept: dict[int, list[tuple]] = {a.id: [] for a in coord.agents}
    original = coord.on_telemetry

    def keep_too(a, msg):  # what a list in memory would have held
        for s in msg["samples"]:
            kept[a.id].append(
                (int(s[0]), float(s[1]) - a.offset - coord.t_go, s[2], s[3], s[4], s[5])
            )
        original(a, msg)

    coord.on_telemetry = keep_too  # type: ignore[method-assign]
    try:
        feed(coord, 30, 0, rng)
    finally:
        coord.dir.close()
    records = full_records(
        [r for a in coord.agents for r in a.records], coord.dir.path / "telemetry"
    )
    for r in records:
        assert r.samples == kept[r.agent]  # bit for bit, times converted the same way
    sw = coord.swarm
    from_file = metric_series(
        records, AGENTS, sw.objectives, sw.intended, sw.reference, by_iteration=False, gap=coord.gap
    )
    in_memory = [
        type(r)(agent=r.agent, epoch=r.epoch, offset=r.offset, samples=kept[r.agent])
        for r in records
    ]
    assert from_file == metric_series(
        in_memory,
        AGENTS,
        sw.objectives,
        sw.intended,
        sw.reference,
        by_iteration=False,
        gap=coord.gap,
    )
