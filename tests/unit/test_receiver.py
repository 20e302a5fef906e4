"""The receiving side, sans IO: accounting per in-link and sender epoch, fault decisions,
release semantics, inboxes.

Expected counts come from a reference model written here from the rules in
:mod:`node._receiver`'s docstring, with fault decisions asked of an independent
:class:`node._links.LinkModel` built from the same seed; nothing is read back from the
receiver under test to compute what it should have done.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from node._links import LinkFault, LinkModel
from node._receiver import COUNTER_FIELDS, InLinkCounters, Receiver
from node._wire import DataLayout, encode_data, encode_probe

AGENT = 0
INS = (1, 2)
SIZES = {"x": 2}
SEED = 11
PERIOD = 0.01


def rx(
    mode: str = "async", period: float = PERIOD, seed: int = SEED, epoch: int | None = 0
) -> Receiver:
    """A receiver whose in-neighbours were announced under ``epoch`` (as the coordinator's
    peer table does before any data flows); None: nothing announced."""
    r = Receiver(AGENT, INS, SIZES, seed=seed, mode=mode, period_s=period)
    if epoch is not None:
        for j in INS:
            r.announce(j, epoch)
    return r


def frame(sender: int, seq: int, *, epoch: int = 0, it: int | None = None, t: float = 0.0) -> bytes:
    it = seq if it is None else it
    return encode_data(sender, epoch, seq, it, t, {"x": np.array([float(seq), float(it)])})


def counters(r: Receiver, sender: int, epoch: int = 0) -> InLinkCounters:
    return r.inlinks[sender].counters[epoch]


def identity_holds(c: InLinkCounters) -> bool:
    """Every frame that decoded is delivered, dropped by injection, rejected or held."""
    return c.received == c.delivered + c.dropped_injected + c.rejected + c.held


def arm(r: Receiver, fault: LinkFault, senders: tuple[int, ...] = INS) -> None:
    r.add_fault({"fault": fault.to_wire(), "from": list(senders)})


# ------------------------------------------------------------------- plain accounting


def test_in_order_frames_are_delivered_with_their_delays() -> None:
    r = rx()
    for s in range(5):
        r.on_frame(frame(1, s, t=1.0 + s), now=1.25 + s)
    c = counters(r, 1)
    assert (c.received, c.delivered, c.rejected, c.lost_transport, c.max_seq) == (5, 5, 0, 0, 4)
    assert list(c.delays) == pytest.approx([0.25] * 5)
    box = r.inbox()
    assert set(box) == {1}
    assert box[1].iteration == 4
    np.testing.assert_array_equal(box[1].payload["x"], [4.0, 4.0])
    assert r.unattributed_rejected == 0
    assert 2 not in r.inbox() and r.inlinks[2].counters == {}


def test_gaps_count_as_lost_in_transport() -> None:
    r = rx()
    for s in (0, 1, 2, 5, 6, 10):
        r.on_frame(frame(1, s), 0.0)
    c = counters(r, 1)
    assert (c.received, c.delivered, c.lost_transport, c.max_seq) == (6, 6, 5, 10)
    assert identity_holds(c)


def test_a_late_first_frame_counts_the_seqs_before_it_and_records_where_it_started() -> None:
    # A receiver that joins late: the coordinator subtracts first_seq (see _metrics).
    r = rx()
    r.on_frame(frame(1, 500), 0.0)
    c = counters(r, 1)
    assert (c.first_seq, c.lost_transport, c.max_seq, c.delivered) == (500, 500, 500, 1)


def test_replays_are_rejected() -> None:
    r = rx()
    for s in (0, 1, 1, 0, 2, 2):
        r.on_frame(frame(1, s), 0.0)
    c = counters(r, 1)
    assert (c.received, c.delivered, c.rejected, c.lost_transport) == (6, 3, 3, 0)
    assert r.inbox()[1].iteration == 2
    assert identity_holds(c)


def test_a_late_frame_is_not_also_counted_lost() -> None:
    # Arrival order 0, 2, 1: seq 1 was seen (and refused as reordered), so it is not one of
    # the "sequence numbers never seen" that count as lost in transport. Otherwise the
    # coordinator's sent = delivered + dropped + lost + rejected + in flight counts it twice.
    r = rx()
    for s in (0, 2, 1):
        r.on_frame(frame(1, s), 0.0)
    c = counters(r, 1)
    sent = 3
    accounted = c.delivered + c.dropped_injected + c.lost_transport + c.rejected + c.held
    assert accounted == sent, (c.delivered, c.lost_transport, c.rejected)


def test_a_newer_epoch_switches_and_old_epoch_frames_are_rejected() -> None:
    r = rx()
    for s in range(3):
        r.on_frame(frame(1, s, epoch=0), 0.0)
    r.on_frame(frame(1, 0, epoch=1, it=6), 0.0)  # not announced yet: forged, ignored
    assert r.inlinks[1].epoch == 0 and r.inlinks[1].forged == 1 and 1 not in r.inlinks[1].counters
    assert r.announce(1, 1)  # the coordinator's peer table: the sender restarted
    r.on_frame(frame(1, 0, epoch=1, it=7), 0.0)  # the restarted sender starts at seq 0
    assert r.inlinks[1].epoch == 1
    assert r.inbox()[1].iteration == 7
    r.on_frame(frame(1, 3, epoch=0), 0.0)  # queued by the dead incarnation
    r.on_frame(frame(1, 1, epoch=1, it=8), 0.0)
    old, new = counters(r, 1, 0), counters(r, 1, 1)
    assert (old.received, old.delivered, old.rejected) == (4, 3, 1)
    assert (new.received, new.delivered, new.rejected, new.lost_transport) == (2, 2, 0, 0)
    assert r.inbox()[1].iteration == 8
    assert set(r.link_report()[1]) == {0, 1}
    assert identity_holds(old) and identity_holds(new)


def test_the_peer_table_epoch_refuses_older_frames() -> None:
    r = rx(epoch=None)
    r.announce(1, 2)
    r.on_frame(frame(1, 0, epoch=1), 0.0)  # an incarnation never heard, gone already
    r.on_frame(frame(1, 1, epoch=1), 0.0)
    r.on_frame(frame(1, 0, epoch=3), 0.0)  # one not announced yet
    assert r.inlinks[1].counters == {} and r.inlinks[1].forged == 3
    assert r.inbox() == {}
    assert not r.inlinks[1].heard
    r.on_frame(frame(1, 0, epoch=2), 0.0)
    assert counters(r, 1, 2).delivered == 1
    assert r.inlinks[1].heard


def test_garbage_and_unknown_senders_are_unattributed() -> None:
    r = rx()
    good = frame(1, 0)
    bad = bytearray(good)
    bad[-1] ^= 0xFF
    junk = [
        b"",
        b"\x00" * 4,
        bytes(bad),  # checksum
        good[:-1],  # truncated
        good + b"\x00",  # longer
        b"\x00" * (1 << 20 + 1),  # oversized
        encode_data(1, 0, 0, 0, 0.0, {"x": np.zeros(3)}),  # wrong payload length
        encode_data(1, 0, 0, 0, 0.0, {"y": np.zeros(2)}),  # wrong key
        frame(7, 0),  # not an in-neighbour
        frame(AGENT, 0),  # ourselves
        encode_probe(9, 0, 0.0),  # a probe from a stranger
    ]
    for f in junk:
        r.on_frame(f, 0.0)
    assert r.unattributed_rejected == len(junk)
    assert all(link.counters == {} for link in r.inlinks.values())
    assert r.inbox() == {}
    r.on_frame(good, 0.0)  # and the link still works
    assert counters(r, 1).delivered == 1


def test_probes_mark_a_link_heard_and_are_not_counted() -> None:
    r = rx()
    assert not r.all_heard()
    r.on_frame(encode_probe(1, 0, 0.0), 0.0)
    assert r.inlinks[1].heard and not r.inlinks[2].heard
    r.inlinks[2].set_epoch(3)
    r.on_frame(encode_probe(2, 2, 0.0), 0.0)  # an older incarnation's probe
    assert not r.inlinks[2].heard
    r.on_frame(encode_probe(2, 3, 0.0), 0.0)
    assert r.all_heard()
    assert all(link.counters == {} for link in r.inlinks.values())
    assert r.unattributed_rejected == 0


def test_inbox_freshness() -> None:
    r = rx()
    r.on_frame(frame(1, 0), 0.0)
    r.on_frame(frame(2, 0), 0.0)
    assert {j: m.fresh for j, m in r.inbox().items()} == {1: True, 2: True}
    assert {j: m.fresh for j, m in r.inbox().items()} == {1: False, 2: False}
    r.on_frame(frame(2, 1), 0.0)
    box = r.inbox()
    assert {j: m.fresh for j, m in box.items()} == {1: False, 2: True}
    assert box[2].iteration == 1 and box[1].iteration == 0
    r.on_frame(frame(2, 1), 0.0)  # a replay does not freshen anything
    assert not r.inbox()[2].fresh


def test_rounds_mode_holds_until_release() -> None:
    r = rx("rounds")
    r.on_frame(frame(1, 0, it=4), 0.0)
    c = counters(r, 1)
    assert (c.held, c.delivered) == (1, 0)
    assert r.inbox() == {}
    r.release(3.0, 0.0)
    assert r.inbox() == {} and c.held == 1
    r.release(4.0, 0.5)
    assert (c.held, c.delivered) == (0, 1)
    assert r.inbox()[1].iteration == 4
    assert identity_holds(c)


# ----------------------------------------------------------------- faults vs LinkModel

FAULTS = {
    "loss": LinkFault(index=0, kind="loss", params={"rate": 0.3}),
    "duplicate": LinkFault(index=0, kind="duplicate", params={"rate": 0.4}),
    "corrupt": LinkFault(index=0, kind="corrupt", params={"rate": 0.25}),
    "outage": LinkFault(index=0, kind="outage", params={}, start_iteration=20, end_iteration=45),
    "burst": LinkFault(index=0, kind="burst-loss", params={"p_enter": 0.1, "p_leave": 0.3}),
    "delay": LinkFault(
        index=0, kind="delay", params={"distribution": "uniform", "low_ms": 0.0, "high_ms": 35.0}
    ),
    "timed-loss": LinkFault(index=0, kind="loss", params={"rate": 0.6}, start_s=0.2, end_s=0.5),
}


@dataclass
class Expected:
    """What the rules say one (link, epoch) should count."""

    received: int = 0
    accepted: int = 0  # delivered or held
    dropped_injected: int = 0
    rejected: int = 0
    duplicated: int = 0
    max_seq: int = -1
    first_seq: int | None = None
    seen: set[int] = field(default_factory=set)

    @property
    def lost_transport(self) -> int:
        """Sequence numbers below the highest one seen that were never seen."""
        return self.max_seq + 1 - len(self.seen)


@dataclass
class Model:
    """The receiver's rules, independently: decisions from a LinkModel of our own."""

    faults: list[LinkFault]
    seed: int = SEED
    start: float = 0.0
    links: dict[tuple[int, int], Expected] = field(default_factory=dict)
    epoch: dict[int, int] = field(default_factory=dict)
    unattributed: int = 0
    forged: dict[int, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.models = {j: LinkModel(self.seed, j, AGENT, self.faults) for j in INS}
        for j in INS:  # announced as rx() does
            self.announce(j, 0)

    def frame(self, sender: int, epoch: int, seq: int, it: int, now: float) -> None:
        if sender not in INS:
            self.unattributed += 1
            return
        announced = self.epoch.get(sender, -1)
        if epoch > announced or (epoch < announced and (sender, epoch) not in self.links):
            self.forged[sender] = self.forged.get(sender, 0) + 1
            return
        e = self.links.setdefault((sender, epoch), Expected())
        if e.first_seq is None:
            e.first_seq = seq
        e.received += 1
        e.seen.add(seq)
        if seq <= e.max_seq:
            e.rejected += 1
            return
        e.max_seq = seq
        if epoch < self.epoch[sender]:
            e.rejected += 1
            return
        d = self.models[sender].decide(seq, it, now - self.start)
        if not d.deliver:
            e.dropped_injected += 1
        elif d.corrupt:
            e.rejected += 1
        else:
            e.accepted += 1
            e.duplicated += d.copies - 1

    def announce(self, sender: int, epoch: int) -> None:
        if epoch > self.epoch.get(sender, -1):
            self.epoch[sender] = epoch

    def check(self, r: Receiver, released: bool) -> None:
        assert r.unattributed_rejected == self.unattributed
        assert r.forged_by_link() == {j: n for j, n in self.forged.items() if n}
        got = {(j, ep) for j, link in r.inlinks.items() for ep in link.counters}
        assert got == set(self.links)
        for (j, ep), e in self.links.items():
            c = r.inlinks[j].counters[ep]
            assert identity_holds(c), c
            assert (c.received, c.dropped_injected, c.rejected, c.duplicated) == (
                e.received,
                e.dropped_injected,
                e.rejected,
                e.duplicated,
            ), (j, ep, c, e)
            assert (c.lost_transport, c.max_seq, c.first_seq) == (
                e.lost_transport,
                e.max_seq,
                e.first_seq,
            )
            assert c.delivered + c.held == e.accepted
            assert len(c.delays) == c.delivered
            if released:
                assert c.held == 0


@pytest.mark.parametrize("mode", ["async", "rounds"])
@pytest.mark.parametrize("name", sorted(FAULTS))
def test_counters_match_link_model_decisions(mode: str, name: str) -> None:
    fault = FAULTS[name]
    r = rx(mode)
    arm(r, fault)
    model = Model([fault])
    now = 0.0
    for k in range(80):
        now = 0.01 * k
        for j in INS:
            seq = k if j == 1 else 2 * k  # link 2 loses every other frame in transport
            r.on_frame(frame(j, seq, it=k, t=now), now)
            model.frame(j, 0, seq, k, now)
        r.release(float(k) if mode == "rounds" else now, now)
        model.check(r, released=False)
    r.release(math.inf, now + 10.0)
    model.check(r, released=True)
    totals = {f: sum(getattr(counters(r, j), f) for j in INS) for f in COUNTER_FIELDS}
    # the fault acted at all (so the comparison above compared something)
    acted = {
        "loss": "dropped_injected",
        "burst": "dropped_injected",
        "outage": "dropped_injected",
        "timed-loss": "dropped_injected",
        "duplicate": "duplicated",
        "corrupt": "rejected",
    }
    if name in acted:
        assert totals[acted[name]] > 0
    assert counters(r, 2).lost_transport == 79


def test_outage_drops_exactly_its_window() -> None:
    r = rx("rounds")
    arm(r, FAULTS["outage"], (1,))
    for k in range(60):
        r.on_frame(frame(1, k), 0.0)
        r.on_frame(frame(2, k), 0.0)
        r.release(float(k), 0.0)
        assert (r.inbox()[1].iteration == k) == (not 20 <= k < 45)
    assert counters(r, 1).dropped_injected == 25
    assert counters(r, 2).dropped_injected == 0


def test_duplicates_are_counted_apart_and_never_delivered() -> None:
    for mode in ("async", "rounds"):
        r = rx(mode)
        arm(r, LinkFault(index=0, kind="duplicate", params={"rate": 1.0}), (1,))
        for k in range(10):
            r.on_frame(frame(1, k), 0.0)
            r.release(float(k), 0.0)
        c = counters(r, 1)
        assert (c.received, c.delivered, c.duplicated, c.held) == (10, 10, 10, 0), mode
        assert len(c.delays) == 10


def test_same_seed_same_counts_other_seed_other_counts() -> None:
    def report(seed: int) -> dict[int, Any]:
        r = rx(seed=seed)
        arm(r, FAULTS["loss"])
        for k in range(200):
            for j in INS:
                r.on_frame(frame(j, k), 0.0)
        return {j: row[0][:9] for j, row in r.link_report().items()}

    assert report(5) == report(5)
    assert report(5) != report(6)


# -------------------------------------------------------------------- release semantics


@pytest.mark.parametrize(
    ("delay_ms", "period_ms"),
    [(0.5, 1.0), (1.0, 1.0), (2.5, 1.0), (9.0, 3.0), (18.0, 6.0), (30.0, 10.0), (51.0, 17.0)],
)
def test_rounds_mode_shows_iteration_k_at_round_k_plus_whole_periods(
    delay_ms: float, period_ms: float
) -> None:
    # lag = the whole round periods in the delay, computed exactly (the delays here are exact
    # multiples or clear fractions of the period, so float division must not lose a round).
    lag = math.floor(Fraction(delay_ms) / Fraction(period_ms))
    r = rx("rounds", period=period_ms / 1000.0)
    arm(r, LinkFault(index=0, kind="delay", params={"distribution": "constant", "ms": delay_ms}))
    k = 5
    r.on_frame(frame(1, 0, it=k), 0.0)
    for bound in range(k + lag):
        r.release(float(bound), 0.0)
        assert r.inbox() == {}, f"visible at round {bound}, expected {k + lag}"
    r.release(float(k + lag), 0.0)
    assert r.inbox()[1].iteration == k


def test_async_mode_releases_by_time() -> None:
    r = rx("async")
    fault = FAULTS["delay"]
    arm(r, fault, (1,))
    model = LinkModel(SEED, 1, AGENT, [fault])
    arrivals = []
    for s in range(30):
        now = 1.0 + 0.002 * s
        r.on_frame(frame(1, s, t=now), now)
        arrivals.append(now + model.decide(s, s, now).delay_s)
    c = counters(r, 1)
    assert c.delivered == 0 and c.held == 30
    visible = 0
    for bound in sorted(arrivals):
        r.release(bound - 1e-9, bound)
        assert c.delivered == visible
        r.release(bound, bound)
        visible = sum(a <= bound for a in arrivals)
        assert c.delivered == visible
    # the recorded delay is arrival plus injected delay minus send time, not the step time
    assert sorted(c.delays) == pytest.approx(
        sorted(a - (1.0 + 0.002 * s) for s, a in enumerate(arrivals))
    )


def test_async_mode_without_delay_is_visible_at_once() -> None:
    r = rx("async")
    r.on_frame(frame(1, 0), 0.0)
    assert counters(r, 1).delivered == 1
    assert r.inbox()[1].iteration == 0


def _release_order(fifo: bool, mode: str) -> list[int]:
    r = rx(mode)
    arm(
        r,
        LinkFault(
            index=0,
            kind="delay",
            params={"distribution": "uniform", "low_ms": 0.0, "high_ms": 60.0, "fifo": fifo},
        ),
        (1,),
    )
    seen = []
    for k in range(200):
        now = PERIOD * k
        r.on_frame(frame(1, k, t=now), now)
        r.release(float(k) if mode == "rounds" else now, now)
        m = r.inbox().get(1)
        if m is not None and m.fresh:
            seen.append(m.iteration)
    return seen


@pytest.mark.parametrize("mode", ["async", "rounds"])
def test_fifo_keeps_the_order_and_without_it_messages_overtake(mode: str) -> None:
    ordered = _release_order(True, mode)
    assert len(ordered) > 50
    assert ordered == sorted(ordered)
    mixed = _release_order(False, mode)
    assert mixed != sorted(mixed)  # delays up to 6 periods do reorder a link


# ------------------------------------------------------------------------- properties

events = st.lists(
    st.one_of(
        st.tuples(
            st.just("frame"),
            st.sampled_from((1, 2, 2, 1, 9)),  # mostly in-neighbours, sometimes a stranger
            st.integers(0, 2),  # epoch
            st.integers(0, 12),  # seq
            st.integers(0, 12),  # iteration
        ),
        st.tuples(st.just("next"), st.sampled_from(INS)),  # the next seq: the common case
        st.tuples(st.just("garbage"), st.binary(max_size=12)),
        st.tuples(st.just("probe"), st.sampled_from((1, 2, 9)), st.integers(0, 2)),
        st.tuples(st.just("release"), st.integers(0, 14)),
        st.tuples(st.just("announce"), st.sampled_from(INS), st.integers(0, 2)),
    ),
    max_size=60,
)


@settings(max_examples=300, deadline=None)
@given(
    events,
    st.sampled_from(["async", "rounds"]),
    st.sampled_from([None, *sorted(FAULTS)]),
    st.booleans(),
)
def test_accounting_identity_and_model_under_random_frame_sequences(
    evs: list[tuple[Any, ...]], mode: str, fault_name: str | None, fast_layout: bool
) -> None:
    faults = [] if fault_name is None else [FAULTS[fault_name]]
    r = rx(mode)
    for f in faults:
        arm(r, f)
    model = Model(faults)
    layout = DataLayout(SIZES)
    encode = layout.encode if fast_layout else encode_data
    next_seq = {j: 0 for j in INS}
    now = 0.0
    for ev in evs:
        now += 0.01
        if ev[0] in ("frame", "next"):
            if ev[0] == "frame":
                _, j, ep, seq, it = ev
            else:
                j = ev[1]
                ep, seq, it = model.epoch.get(j, 0), next_seq[j], next_seq[j]
            next_seq.setdefault(j, 0)
            next_seq[j] = max(next_seq[j], seq + 1)
            r.on_frame(encode(j, ep, seq, it, now, {"x": np.array([1.0, 2.0])}), now)
            model.frame(j, ep, seq, it, now)
        elif ev[0] == "garbage":
            # at most 12 bytes with a wrong checksum: never a valid frame
            data = ev[1]
            r.on_frame(data + b"\x00\x00\x00\x00" if len(data) > 4 else data, now)
            model.unattributed += 1
        elif ev[0] == "probe":
            _, j, ep = ev
            r.on_frame(encode_probe(j, ep, now), now)
            if j not in INS:
                model.unattributed += 1
        elif ev[0] == "announce":
            _, j, ep = ev
            r.announce(j, ep)
            model.announce(j, ep)
        else:
            r.release(float(ev[1]) if mode == "rounds" else now, now)
        model.check(r, released=False)
    r.release(math.inf, now + 1.0)
    model.check(r, released=True)
    for j, per in r.link_report().items():
        for ep, row in per.items():
            assert dict(zip(COUNTER_FIELDS, row[:9], strict=True)) == {
                f: getattr(r.inlinks[j].counters[ep], f) for f in COUNTER_FIELDS
            }


def _snapshot(r: Receiver) -> Any:
    box = {j: (m.iteration, m.payload["x"].tolist(), m.fresh) for j, m in r.inbox().items()}
    links = {
        j: (link.epoch, link.last_iter, link.heard, link.stale, len(link.pending))
        for j, link in r.inlinks.items()
    }
    forged = r.forged_by_link()
    return r.link_report(with_delays=True), r.unattributed_rejected, forged, box, links


step_kinds = st.sampled_from(("next", "next", "next", "gap", "replay", "old", "bad", "probe"))
batch_steps = st.one_of(
    st.lists(st.tuples(st.sampled_from((1, 2, 9)), step_kinds), min_size=32, max_size=80),
    # clean batches: consecutive frames of open links, which take the numpy shortcut
    st.lists(st.tuples(st.sampled_from((1, 2)), st.just("next")), min_size=32, max_size=80),
)


def _batch_frames(steps: list[tuple[int, str]], warmup: int) -> list[bytes]:
    layout = DataLayout(SIZES)
    seq = {1: 0, 2: 0, 9: 0}
    frames = []
    for j in (1, 2):  # the first frames take the long path and open the links
        for _ in range(warmup):
            frames.append(layout.encode(j, 1, seq[j], seq[j], 0.5, {"x": np.ones(2)}))
            seq[j] += 1
    for j, what in steps:
        ep = 0 if what == "old" else 1
        if what == "gap":
            seq[j] += 2
        if what == "replay":
            seq[j] = max(0, seq[j] - 1)
        f = layout.encode(j, ep, seq[j], seq[j], 0.25 * seq[j], {"x": np.full(2, seq[j])})
        if what == "bad":
            f = f[:-1] + bytes([f[-1] ^ 1])
        if what == "probe":
            f = encode_probe(j, 1, 0.0)
        frames.append(f)
        seq[j] += 1
    return frames


@settings(max_examples=200, deadline=None)
@given(batch_steps, st.sampled_from([None, "loss", "delay"]), st.integers(0, 3))
def test_a_batch_counts_like_frame_by_frame(
    steps: list[tuple[int, str]], fault_name: str | None, warmup: int
) -> None:
    # on_frames takes a numpy shortcut for clean batches; the outcome must not differ.
    one, batch = rx("async", epoch=1), rx("async", epoch=1)
    for r in (one, batch):
        if fault_name is not None:
            arm(r, FAULTS[fault_name], (2,))
    frames = _batch_frames(steps, warmup)
    for f in frames:
        one.on_frame(f, 2.0)
    half = len(frames) // 2
    batch.on_frames(frames[:half], 2.0)
    batch.on_frames(frames[half:], 2.0)
    assert _snapshot(batch) == _snapshot(one)


def test_a_clean_batch_takes_the_shortcut() -> None:
    # So that the comparison above compares the shortcut and not the fallback with itself.
    r = rx("async", epoch=1)
    frames = _batch_frames([(1 + k % 2, "next") for k in range(40)], warmup=1)
    r.on_frames(frames[:2], 2.0)  # short: frame by frame, opens both links
    calls = []
    plain = r.on_frame
    r.on_frame = lambda f, now: (calls.append(f), plain(f, now))  # type: ignore[method-assign]
    r.on_frames(frames[2:], 2.0)
    assert calls == []
    assert counters(r, 1, 1).delivered == 21 and counters(r, 2, 1).delivered == 21


@pytest.mark.parametrize("jump", [2**40, 2**20, 2**20 - 1, 1025])
def test_an_implausible_sequence_jump_is_refused_and_the_link_keeps_working(jump: int) -> None:
    # A checksum is not authentication: one frame claiming seq + jump must not turn every
    # later real frame into a "replay".
    r = rx()
    sender = INS[0]
    for s in range(5):
        r.on_frame(frame(sender, s), 0.0)
    r.on_frame(frame(sender, 4 + jump), 0.0)
    for s in range(5, 10):
        r.on_frame(frame(sender, s), 0.0)
    c = counters(r, sender)
    assert c.rejected == 0 and c.delivered == 10 and c.max_seq == 9 and c.lost_transport == 0
    assert r.inlinks[sender].forged == 1
    assert identity_holds(c)


def test_forged_jumps_a_round_apart_do_not_confirm_each_other() -> None:
    # A forger who sends seq + J in one round and seq + 1 + J in the next: the real frame
    # between them continued the real sequence, so the second forged frame does not
    # "continue" the first (it did, before: the link then refused every real frame).
    r = rx()
    for s in range(3):
        r.on_frame(frame(1, s), 0.0)
    jump = (1 << 20) - 1
    for s in range(3, 8):
        r.on_frame(frame(1, s - 1 + jump), 0.0)  # the forged one, just before the real one
        r.on_frame(frame(1, s), 0.0)
    c = counters(r, 1)
    assert (c.max_seq, c.delivered, c.rejected, c.lost_transport) == (7, 8, 0, 0)
    assert r.inlinks[1].forged == 5
    assert identity_holds(c)


def test_a_long_real_gap_is_taken_once_the_next_frame_continues_it() -> None:
    # A partition can really skip thousands of messages: the first frame after it is
    # refused, the next one confirms the jump, and the refused one counts as lost.
    r = rx()
    for s in range(3):
        r.on_frame(frame(1, s), 0.0)
    r.on_frame(frame(1, 5000), 0.0)
    assert counters(r, 1).max_seq == 2 and r.inlinks[1].forged == 1
    r.on_frame(frame(1, 5001), 0.0)
    c = counters(r, 1)
    assert (c.max_seq, c.delivered, c.lost_transport, r.inlinks[1].forged) == (5001, 4, 4998, 0)
    assert r.inbox()[1].iteration == 5001
    assert identity_holds(c)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_a_non_finite_state_is_a_refused_frame_that_changes_nothing(bad: float) -> None:
    for layout in (DataLayout(SIZES).encode, encode_data):
        r = rx()
        r.on_frame(frame(1, 0), 0.0)
        before = (counters(r, 1).as_list(), r.inlinks[1].last_iter, r.inbox()[1].iteration)
        r.on_frame(layout(1, 0, 1, 1, 0.0, {"x": np.array([bad, 1.0])}), 0.0)
        box = r.inbox()[1]
        after = (counters(r, 1).as_list(), r.inlinks[1].last_iter, box.iteration)
        assert after == before and not box.fresh  # nothing new to see
        assert r.inlinks[1].forged == 1
        r.on_frame(frame(1, 1), 0.0)  # the real frame of that sequence number is taken
        assert counters(r, 1).delivered == 2 and r.inbox()[1].iteration == 1
