"""A seeded, bounded attacker against a running swarm (rounds mode, loopback TCP, real
processes): junk and forged data frames from inside the swarm and a control flood from
outside it, at once. The agents must end where a clean run with the same seed ends (the
lockstep engine, same agent core: final states equal to 1e-9), and every attack frame must
be counted where the user reads the run: links.csv, summary.json and events.jsonl.

The data attacker runs our agent code (it is agent 2, and publishes its genuine frames
too) and, at iterations drawn from the seed, adds a subset drawn from the seed of: a frame
under an epoch never announced (2^32 - 1, valid checksum), a sequence jump just under the
refusal limit, a NaN state, junk bytes, a frame failing its checksum, an oversized frame
and a frame from an agent id that does not exist. Halfway through, it waits at an
iteration (answering the coordinator meanwhile) while the test floods the control endpoint
with a seeded mix of one-byte frames, random bytes, frames with a 1 MB type field,
three-frame envelopes and well-formed messages from a peer that never joined. The flood
ends with a hello the coordinator must refuse; the same connection delivers in order, so
once that refusal is in events.jsonl every flood frame has been read, and the attacker is
let go. Nothing here is timed: the test waits for files, then checks what they say.
"""

from __future__ import annotations

import csv
import json
import random
import time

import msgpack
import numpy as np
import pytest
import zmq

from coordinator._api import load
from node._wire import PROTOCOL, encode_control
from tests.integration.test_attacks import (
    _agent,
    _Coordinator,
    final_states,
    rounds_scenario,
    start_script,
)
from tests.integration.test_robustness import events

pytestmark = pytest.mark.integration

SEED = 2026
N, ATTACKER, ITERATIONS = 5, 2, 80
#: the attacker waits here for the control flood to be read
HOLD_AT = 40
#: the frame kinds, in the order the attacker sends them; the first three are attributed
#: to the attacker's links ("forged"), the other four to no sender ("unattributed")
KINDS = ("epoch", "jump", "nan", "junk", "checksum", "oversized", "stranger")
FORGED_KINDS = 3
#: control flood frames, by kind (bounded: a few thousand)
FLOOD = {"byte": 2000, "random": 1000, "big-type": 5, "envelope": 300, "pong": 300}

ATTACKER_CODE = """
import json, os, random, sys, time
import numpy as np
import node._runtime as r
from node._wire import MAX_DATA_FRAME

plan = {{int(k): v for k, v in json.loads({plan!r}).items()}}
rnd = random.Random({seed})
publish = r.Node.publish


def attacking_publish(self, payload, iteration):
    if iteration == {hold_at}:
        open({held!r}, "w").close()
        while not os.path.exists({release!r}):
            if self.control_tick():  # answers the coordinator's pings and beats meanwhile
                break
            time.sleep(0.01)
    kinds = plan.get(iteration, ())
    if kinds:
        lay, t = self.rx.layout, self.clock()
        zero = {{k: np.zeros(n) for k, n in self.sizes.items()}}
        nan = {{k: np.full(n, np.nan) for k, n in self.sizes.items()}}
        good = lay.encode(self.agent, self.epoch, self.seq, iteration, t, zero)
        frames = {{
            "epoch": lambda: lay.encode(self.agent, 2**32 - 1, self.seq, iteration, t, zero),
            "jump": lambda: lay.encode(
                self.agent, self.epoch, self.seq + (1 << 20) - 1, iteration, t, zero
            ),
            "nan": lambda: lay.encode(self.agent, self.epoch, self.seq, iteration, t, nan),
            "junk": lambda: bytes(rnd.randrange(256) for _ in range(rnd.randrange(1, 300))),
            "checksum": lambda: good[:-1] + bytes([good[-1] ^ 0x55]),
            "oversized": lambda: b"\\x00" * (MAX_DATA_FRAME + 1),
            "stranger": lambda: lay.encode(99, 0, 0, iteration, t, zero),
        }}
        for kind in kinds:
            self.pub.send(frames[kind]())
    publish(self, payload, iteration)


r.Node.publish = attacking_publish
sys.exit(r.main({endpoint!r}, {agent}))
"""


def attack_plan(rng: random.Random) -> dict[int, list[str]]:
    """Iterations (from the seed) at which the attacker adds frames, and which: each kind
    at most once per iteration, so that no forged frame ever continues another's sequence."""
    plan: dict[int, list[str]] = {}
    for it in range(3, ITERATIONS - 5):
        if it != HOLD_AT and rng.random() < 0.2:
            chosen = [k for k in KINDS if rng.random() < 0.6]
            if chosen:
                plan[it] = chosen
    return plan


def flood_frames(rng: random.Random) -> list[list[bytes]]:
    """The control flood as multipart messages (each refused by the coordinator)."""
    out: list[list[bytes]] = []
    out += [[b"\x00"] for _ in range(FLOOD["byte"])]
    out += [[rng.randbytes(rng.randrange(1, 200))] for _ in range(FLOOD["random"])]
    out += [[msgpack.packb({"t": "x" * (1 << 20)})] for _ in range(FLOOD["big-type"])]
    out += [[b"a", b"b"] for _ in range(FLOOD["envelope"])]  # three frames at the ROUTER
    pong = encode_control("pong", seq=1, t_coord=0.0, t_node=0.0)
    out += [[pong] for _ in range(FLOOD["pong"])]
    rng.shuffle(out)
    return out


def wait_for(what: str, check, timeout: float = 240.0) -> None:
    """Until ``check()``; the deadline only keeps a broken run from hanging the suite."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.02)
    raise AssertionError(f"never: {what}")


def test_a_seeded_attacker_changes_no_state_and_every_attack_frame_is_counted(processes, tmp_path):
    rng = random.Random(SEED)
    plan = attack_plan(rng)
    flood = flood_frames(rng)
    assert plan and len(flood) == sum(FLOOD.values())
    sc, clean = rounds_scenario(tmp_path, N, ITERATIONS)

    out = tmp_path / "run"
    coord = _Coordinator(sc, out)
    held, release = tmp_path / "held", tmp_path / "release"
    code = ATTACKER_CODE.format(
        plan=json.dumps(plan),
        seed=SEED,
        hold_at=HOLD_AT,
        held=str(held),
        release=str(release),
        endpoint=coord.endpoint,
        agent=ATTACKER,
    )
    attacker = start_script(processes, code)
    agents = [_agent(processes, coord.endpoint, i) for i in range(N) if i != ATTACKER]

    # the control flood, while the swarm stands at HOLD_AT
    def at_hold() -> bool:
        assert attacker.poll() is None, attacker.stderr.read()[-3000:] if attacker.stderr else ""
        return held.exists()

    wait_for(f"the attacker reached iteration {HOLD_AT}", at_hold)
    ctx = zmq.Context()
    try:
        dealer = ctx.socket(zmq.DEALER)
        dealer.setsockopt(zmq.LINGER, 0)
        dealer.setsockopt(zmq.IDENTITY, b"chaos-flooder")
        dealer.connect(coord.endpoint)
        for parts in flood:
            dealer.send_multipart(parts)  # blocking: the ROUTER's bound pushes back
        marker = encode_control(
            "hello", agent=0, host="chaos-marker", pid=4242, version="0", protocol=PROTOCOL
        )
        dealer.send(marker)

        def marker_refused() -> bool:
            return any(
                e["event"] == "hello-refused" and e.get("host") == "chaos-marker"
                for e in events(out)
            )

        wait_for("the flood's closing hello refused", marker_refused)
        dealer.close()
    finally:
        ctx.term()
    release.touch()

    result = coord.finish()
    for p in [*agents, attacker]:
        assert p.wait(timeout=60) == 0, p.stderr.read()[-2000:] if p.stderr else p
    summary = result.summary
    assert summary["exit"] == "budget" and summary["verdict"] != "diverged", summary["exit"]

    # no state changed: the clean run's, to 1e-9
    np.testing.assert_allclose(
        final_states(out, N, ITERATIONS),
        final_states(clean.run_dir, N, ITERATIONS),
        rtol=0,
        atol=1e-9,
    )

    # every data attack frame counted, per link, in the summary and in events.jsonl
    outs = sorted(load(sc).topology.out_neighbours(ATTACKER))
    forged = sum(1 for kinds in plan.values() for k in kinds if KINDS.index(k) < FORGED_KINDS)
    unattributed = sum(len(kinds) for kinds in plan.values()) - forged
    with (out / "links.csv").open() as f:
        rows = {(int(r["from"]), int(r["to"])): r for r in csv.DictReader(f)}
    for (src, dst), row in rows.items():
        assert int(row["forged"]) == (forged if src == ATTACKER else 0), (src, dst, row)
        assert int(row["rejected"]) == 0 and int(row["lost_transport"]) == 0, row
    messages = summary["messages"]
    assert messages["forged"] == forged * len(outs), (messages, forged)
    assert messages["unattributed"] == unattributed * len(outs), (messages, unattributed)
    written = events(out)
    (refused,) = [e for e in written if e["event"] == "data-refused"]
    assert refused["forged_by_link"] == [[ATTACKER, o, forged] for o in outs], refused
    assert refused["unattributed_by_agent"] == {str(o): unattributed for o in outs}, refused

    # every control flood frame counted (and the closing hello), with events.jsonl bounded
    assert summary["refused_control"] == len(flood) + 1, (summary["refused_control"], len(flood))
    on_disk = json.loads((out / "summary.json").read_text())
    assert on_disk["refused_control"] == summary["refused_control"]
    counted = [e for e in written if e["event"] == "refusals-counted"]
    assert counted and counted[-1]["final"] and counted[-1]["total"] == len(flood) + 1, counted
    assert (out / "events.jsonl").stat().st_size < 1 << 20
    assert not any(e["event"] in ("agent-lost", "agent-missed-heartbeat") for e in written)
