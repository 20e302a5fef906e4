"""Per-link fault models: purity, windows, combination rules, Gilbert–Elliott state, codec."""

from __future__ import annotations

import random

import msgpack
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from node._links import (
    DELIVER,
    Decision,
    LinkFault,
    LinkModel,
    corrupt_bytes,
    validate_fault_params,
)
from node._rng import stream_key, uniform
from topologies._errors import ScenarioError


def loss(index: int = 0, rate: float = 0.3, **window: float | int) -> LinkFault:
    return LinkFault(index=index, kind="loss", params={"rate": rate}, **window)


def burst(index: int = 0, p_enter: float = 0.1, p_leave: float = 0.3, **kw: object) -> LinkFault:
    extra = {k: kw.pop(k) for k in ("loss_good", "loss_bad") if k in kw}
    return LinkFault(
        index=index,
        kind="burst-loss",
        params={"p_enter": p_enter, "p_leave": p_leave, **extra},
        **kw,  # type: ignore[arg-type]
    )


def const_delay(index: int, ms: float, **kw: object) -> LinkFault:
    return LinkFault(index=index, kind="delay", params={"distribution": "constant", "ms": ms, **kw})


def drops(model: LinkModel, seqs: range) -> set[int]:
    return {s for s in seqs if not model.decide(s, s, 0.0).deliver}


# --------------------------------------------------------------------- purity, fast path


def test_no_faults_returns_the_shared_deliver() -> None:
    m = LinkModel(3, 0, 1)
    assert all(m.decide(s, s, s * 0.01) is DELIVER for s in range(100))
    assert Decision(True, 1, 0.0, False, False, None) == DELIVER


def test_inactive_or_silent_faults_return_deliver() -> None:
    m = LinkModel(3, 0, 1, [loss(rate=1.0, start_s=5.0), loss(index=1, rate=0.0)])
    assert all(m.decide(s, s, 1.0) is DELIVER for s in range(100))


def test_same_seed_same_decisions_whatever_the_call_order() -> None:
    faults = [
        loss(0, 0.2),
        burst(1, 0.05, 0.4, loss_good=0.01, loss_bad=0.8),
        LinkFault(
            index=2, kind="delay", params={"distribution": "lognormal", "median_ms": 3, "sigma": 1}
        ),
        LinkFault(index=3, kind="duplicate", params={"rate": 0.1}),
        LinkFault(index=4, kind="corrupt", params={"rate": 0.1}),
    ]
    links = [(0, 1), (1, 0), (1, 2), (2, 0)]
    calls = [(link, s) for link in links for s in range(400)]

    def run(order: list) -> dict:
        models = {link: LinkModel(11, *link, faults) for link in links}
        return {(link, s): models[link].decide(s, s // 4, s * 0.001) for link, s in order}

    in_order = run(calls)
    shuffled = calls[:]
    random.Random(5).shuffle(shuffled)  # interleaves links and goes back and forth in seq
    assert run(shuffled) == in_order
    # different links of the same run do not drop the same messages
    assert {s for (lk, s), d in in_order.items() if lk == (0, 1) and not d.deliver} != {
        s for (lk, s), d in in_order.items() if lk == (1, 0) and not d.deliver
    }


def test_different_seed_gives_different_drop_sets() -> None:
    a = drops(LinkModel(1, 0, 1, [loss()]), range(500))
    b = drops(LinkModel(2, 0, 1, [loss()]), range(500))
    again = drops(LinkModel(1, 0, 1, [loss()]), range(500))
    assert a == again
    assert a != b


def test_decision_uses_the_documented_key() -> None:
    # the loss draw is uniform(stream_key(seed, src, dst, index, purpose 1), seq) < rate
    m = LinkModel(9, 4, 2, [loss(index=6, rate=0.5)])
    key = stream_key(9, 4, 2, 6, 1)
    expected = {s for s in range(300) if uniform(key, s) < 0.5}
    assert drops(m, range(300)) == expected


def test_a_fault_draws_do_not_depend_on_the_other_faults() -> None:
    alone = drops(LinkModel(4, 0, 1, [loss(index=2)]), range(1000))
    with_delay = LinkModel(4, 0, 1, [const_delay(0, 1.0), loss(index=2)])
    assert drops(with_delay, range(1000)) == alone


# --------------------------------------------------------------------- windows


def test_time_window_is_half_open_on_now_s() -> None:
    f = loss(rate=1.0, start_s=1.0, end_s=2.0)
    m = LinkModel(0, 0, 1, [f])
    for now, inside in [(0.0, False), (0.999, False), (1.0, True), (1.5, True), (2.0, False)]:
        assert f.active(0, now) is inside
        assert m.decide(7, 0, now).deliver is not inside


def test_iteration_window_tests_the_message_iteration_not_the_clock() -> None:
    f = loss(rate=1.0, start_iteration=10, end_iteration=20)
    m = LinkModel(0, 0, 1, [f])
    for it in (0, 9, 20, 100):
        assert m.decide(it, it, 15.0).deliver
    for it in (10, 15, 19):
        assert not m.decide(it, it, 0.0).deliver
        assert not m.decide(it, it, 1e6).deliver


def test_open_ended_window_lasts_until_the_end() -> None:
    m = LinkModel(0, 0, 1, [loss(rate=1.0, start_iteration=5)])
    assert m.decide(0, 4, 0.0).deliver
    assert not m.decide(0, 10**9, 0.0).deliver


def test_outage_drops_exactly_inside_its_window() -> None:
    m = LinkModel(0, 0, 1, [LinkFault(index=3, kind="outage", start_s=2.0, end_s=3.0)])
    times = [i * 0.01 for i in range(500)]
    dropped = [t for s, t in enumerate(times) if not m.decide(s, s, t).deliver]
    assert dropped == [t for t in times if 2.0 <= t < 3.0]
    assert m.decide(0, 0, 2.5) == Decision(False, 1, 0.0, False, False, 3)


# --------------------------------------------------------------------- combination rules


def test_delays_add_and_fifo_propagates() -> None:
    m = LinkModel(0, 0, 1, [const_delay(0, 5.0), const_delay(1, 3.0, fifo=True)])
    d = m.decide(0, 0, 0.0)
    assert d.deliver
    assert d.delay_s == pytest.approx(0.008, abs=1e-15)
    assert d.fifo
    assert d.cause == 0


def test_duplicate_and_corrupt_and_delay_combine() -> None:
    m = LinkModel(
        0,
        0,
        1,
        [
            LinkFault(index=4, kind="corrupt", params={"rate": 1.0}),
            LinkFault(index=2, kind="duplicate", params={"rate": 1.0}),
            const_delay(7, 2.0),
        ],
    )
    assert [f.index for f in m.faults] == [2, 4, 7]
    assert m.decide(5, 0, 0.0) == Decision(True, 2, 0.002, True, False, 2)


def test_drop_wins_and_cause_is_the_first_dropping_fault() -> None:
    outage = LinkFault(index=5, kind="outage")
    m = LinkModel(
        0,
        0,
        1,
        [outage, const_delay(0, 4.0), loss(index=3, rate=1.0), loss(index=1, rate=0.0)],
    )
    assert m.decide(1, 0, 0.0) == Decision(False, 1, 0.0, False, False, 3)
    m.remove(3)
    assert m.decide(1, 0, 0.0).cause == 5


def test_add_replaces_same_index_and_remove_is_idempotent() -> None:
    m = LinkModel(0, 0, 1)
    m.add(loss(index=1, rate=1.0))
    m.add(loss(index=1, rate=0.0))
    assert m.faults == (loss(index=1, rate=0.0),)
    assert m.decide(0, 0, 0.0) is DELIVER
    assert m.remove(1) is True
    assert m.remove(1) is False
    assert m.faults == ()


# --------------------------------------------------------------------- Gilbert–Elliott state


def chain_reference(seed: int, src: int, dst: int, index: int, p: float, r: float, n: int):
    """States 0..n-1 recomputed here from the documented keys (purpose 6 = transitions)."""
    key = stream_key(seed, src, dst, index, 6)
    bad, out = False, [False]
    for s in range(1, n):
        u = uniform(key, s)
        bad = u >= r if bad else u < p
        out.append(bad)
    return out


def test_ge_state_is_independent_of_call_pattern_and_skipped_seqs() -> None:
    n = 5000
    states = chain_reference(8, 2, 3, 1, 0.1, 0.3, n)
    assert any(states) and not all(states)
    expected = {s for s in range(n) if states[s]}  # loss_bad = 1, loss_good = 0

    def model() -> LinkModel:
        return LinkModel(8, 2, 3, [burst(1, 0.1, 0.3)])

    assert drops(model(), range(n)) == expected
    sparse = model()  # transport lost most seqs: only every 37th is seen
    assert {s for s in range(0, n, 37) if not sparse.decide(s, 0, 0.0).deliver} == {
        s for s in expected if s % 37 == 0
    }
    jumbled = model()  # forwards, backwards across checkpoints, repeats
    order = list(range(n)) + list(range(n))
    random.Random(2).shuffle(order)
    assert all(jumbled.decide(s, 0, 0.0).deliver is (s not in expected) for s in order)


def test_ge_chain_advances_outside_its_window() -> None:
    n = 3000
    always = drops(LinkModel(5, 0, 1, [burst(0, 0.05, 0.2)]), range(n))
    windowed = LinkModel(5, 0, 1, [burst(0, 0.05, 0.2, start_iteration=1000, end_iteration=2000)])
    got = {s for s in range(n) if not windowed.decide(s, s, 0.0).deliver}
    assert got == {s for s in always if 1000 <= s < 2000}
    # a fault added later (a directive mid-run) lands on the same states
    late = LinkModel(5, 0, 1)
    for s in range(1500):
        late.decide(s, s, 0.0)
    late.add(burst(0, 0.05, 0.2))
    assert {s for s in range(1500, n) if not late.decide(s, s, 0.0).deliver} == {
        s for s in always if s >= 1500
    }


def test_ge_rejects_negative_seq() -> None:
    m = LinkModel(0, 0, 1, [burst()])
    m.decide(10, 0, 0.0)
    with pytest.raises(ValueError, match="non-negative"):
        m.decide(-1, 0, 0.0)


# --------------------------------------------------------------------- corrupt_bytes


def test_corrupt_bytes_changes_one_to_three_bytes_deterministically() -> None:
    frame = bytes(range(64))
    counts = set()
    for seq in range(300):
        out = corrupt_bytes(frame, 1234, seq)
        assert out == corrupt_bytes(frame, 1234, seq)
        assert len(out) == len(frame)
        changed = sum(a != b for a, b in zip(out, frame, strict=True))
        assert 1 <= changed <= 3
        counts.add(changed)
    assert counts == {1, 2, 3}
    assert corrupt_bytes(frame, 1234, 0) != corrupt_bytes(frame, 1235, 0)


@given(st.binary(max_size=40), st.integers(0, 2**64 - 1), st.integers(0, 2**40))
def test_corrupt_bytes_always_changes_the_frame(frame: bytes, key: int, seq: int) -> None:
    out = corrupt_bytes(frame, key, seq)
    assert out != frame
    assert out == corrupt_bytes(frame, key, seq)


def test_link_corrupt_frame_is_pure() -> None:
    a, b = LinkModel(3, 0, 1), LinkModel(3, 0, 1)
    assert a.corrupt_frame(b"hello world", 9) == b.corrupt_frame(b"hello world", 9)
    assert a.corrupt_frame(b"hello world", 9) != LinkModel(3, 1, 0).corrupt_frame(b"hello world", 9)


# --------------------------------------------------------------------- validation and wire


def test_params_defaults_are_filled() -> None:
    assert validate_fault_params("burst-loss", {"p_enter": 0.1, "p_leave": 1}, "f") == {
        "p_enter": 0.1,
        "p_leave": 1.0,
        "loss_good": 0.0,
        "loss_bad": 1.0,
    }
    assert validate_fault_params("delay", {"distribution": "constant", "ms": 2}, "f") == {
        "distribution": "constant",
        "ms": 2.0,
        "jitter_ms": 0.0,
        "fifo": False,
    }


@pytest.mark.parametrize(
    ("kind", "params", "match"),
    [
        (
            "loss",
            {"rate": 1.5},
            r"^scenario.toml: \[\[fault\]\] #2: rate: expected a number in \[0, 1\], got 1.5$",
        ),
        ("loss", {}, r"#2: rate: missing; expected a number in \[0, 1\]$"),
        ("loss", {"rate": True}, r"#2: rate: expected a number in \[0, 1\], got true$"),
        ("loss", {"rate": 0.1, "p": 2}, r"#2: p: unknown parameter for loss"),
        ("burst-loss", {"p_enter": 0.0, "p_leave": 0.5}, r"p_enter: expected a number in \(0, 1\]"),
        ("delay", {"distribution": "gamma"}, r"distribution: expected one of constant"),
        (
            "delay",
            {"distribution": "uniform", "low_ms": 3, "high_ms": 1},
            r"high_ms: expected a number >= low_ms = 3, got 1$",
        ),
        (
            "delay",
            {"distribution": "normal", "mean_ms": 3, "sd_ms": 0},
            r"sd_ms: expected a number > 0, got 0",
        ),
        (
            "delay",
            {"distribution": "pareto", "scale_ms": 1, "shape": 2, "ms": 3},
            r"#2: ms: unknown",
        ),
        (
            "delay",
            {"distribution": "constant", "ms": 1, "fifo": 1},
            r"fifo: expected true or false",
        ),
        ("outage", {"rate": 0.5}, r"rate: unknown parameter for outage; expected only: none"),
        ("crash", {}, r"#2: kind: expected one of loss"),
    ],
)
def test_bad_params_name_the_key(kind: str, params: dict, match: str) -> None:
    with pytest.raises(ScenarioError, match=match):
        validate_fault_params(kind, params, "scenario.toml: [[fault]] #2")


@pytest.mark.parametrize(
    ("window", "match"),
    [
        ({"start_s": 1.0, "start_iteration": 3}, "not both"),
        ({"end_s": 2.0}, r"end_s: given without start_s"),
        ({"start_iteration": 5, "end_iteration": 4}, r"end_iteration: expected at least"),
        ({"start_iteration": 1.5}, r"start_iteration: expected a non-negative integer"),
        ({"start_s": -1.0}, r"start_s: expected a non-negative number"),
    ],
)
def test_bad_windows(window: dict, match: str) -> None:
    with pytest.raises(ScenarioError, match=match):
        loss(**window)


def test_wire_round_trip_through_msgpack() -> None:
    faults = [
        loss(0, 0.25, start_s=1.0, end_s=4.5),
        burst(1, 0.2, 0.5, loss_good=0.1, start_iteration=3),
        const_delay(2, 1.5, jitter_ms=0.5, fifo=True),
        LinkFault(index=3, kind="outage", start_iteration=1, end_iteration=9),
    ]
    for f in faults:
        wire = msgpack.unpackb(msgpack.packb(f.to_wire()))
        assert LinkFault.from_wire(wire) == f


def test_from_wire_rejects_malformed_directives() -> None:
    with pytest.raises(ScenarioError, match="directive from agent 3: unknown key 'extra'"):
        LinkFault.from_wire(
            {"index": 0, "kind": "outage", "extra": 1}, where="directive from agent 3"
        )
    with pytest.raises(ScenarioError, match="missing key 'kind'"):
        LinkFault.from_wire({"index": 0})
    with pytest.raises(ScenarioError, match=r"fault directive: \[\[fault\]\] #0: rate"):
        LinkFault.from_wire({"index": 0, "kind": "loss", "params": {"rate": -1}})
    with pytest.raises(ScenarioError, match="expected a mapping"):
        LinkFault.from_wire([1, 2])  # type: ignore[arg-type]


# --------------------------------------------------------------------- properties

rates = st.floats(0.0, 1.0)
probs = st.floats(0.01, 1.0)
windows = st.one_of(
    st.just({}),
    st.builds(lambda a, d: {"start_s": a, "end_s": a + d}, st.floats(0, 5), st.floats(0, 5)),
    st.builds(
        lambda a, d: {"start_iteration": a, "end_iteration": a + d},
        st.integers(0, 50),
        st.integers(0, 50),
    ),
)
delay_params = st.one_of(
    st.builds(lambda ms: {"distribution": "constant", "ms": ms}, st.floats(0, 100)),
    st.builds(
        lambda lo, w: {"distribution": "uniform", "low_ms": lo, "high_ms": lo + w},
        st.floats(0, 50),
        st.floats(0, 50),
    ),
    st.builds(
        lambda m, s: {"distribution": "normal", "mean_ms": m, "sd_ms": s},
        st.floats(-50, 50),
        st.floats(0.01, 30),
    ),
    st.builds(
        lambda m, s: {"distribution": "lognormal", "median_ms": m, "sigma": s},
        st.floats(0.01, 50),
        st.floats(0, 3),
    ),
    st.builds(
        lambda c, a: {"distribution": "pareto", "scale_ms": c, "shape": a},
        st.floats(0.01, 50),
        st.floats(0.2, 5),
    ),
).flatmap(
    lambda p: st.builds(
        lambda j, f: {**p, "jitter_ms": j, "fifo": f}, st.floats(0, 5), st.booleans()
    )
)
kinds_params = st.one_of(
    st.tuples(
        st.sampled_from(["loss", "duplicate", "corrupt"]), st.builds(lambda r: {"rate": r}, rates)
    ),
    st.tuples(
        st.just("burst-loss"),
        st.builds(
            lambda p, r, g, b: {"p_enter": p, "p_leave": r, "loss_good": g, "loss_bad": b},
            probs,
            probs,
            rates,
            rates,
        ),
    ),
    st.tuples(st.just("delay"), delay_params),
    st.tuples(st.just("outage"), st.just({})),
)


@st.composite
def fault_lists(draw: st.DrawFn) -> list[LinkFault]:
    specs = draw(st.lists(st.tuples(kinds_params, windows), max_size=4))
    return [LinkFault(index=i, kind=k, params=p, **w) for i, ((k, p), w) in enumerate(specs)]


calls = st.lists(
    st.tuples(st.integers(0, 3000), st.integers(0, 100), st.floats(0, 10)), min_size=1, max_size=30
)


@settings(max_examples=150, deadline=None)
@given(st.integers(0, 2**32), fault_lists(), calls)
def test_decisions_are_pure_and_well_formed(seed: int, faults: list, seq_calls: list) -> None:
    first = LinkModel(seed, 1, 2, faults)
    got = [first.decide(*c) for c in seq_calls]
    again = [first.decide(*c) for c in reversed(seq_calls)][::-1]
    fresh = [LinkModel(seed, 1, 2, faults).decide(*c) for c in seq_calls]
    assert got == again == fresh
    for d in got:
        assert d.copies in (1, 2)
        assert d.delay_s >= 0.0
        if not d.deliver:
            assert d.cause is not None
            assert d == Decision(False, 1, 0.0, False, False, d.cause)
        elif d.cause is None:
            assert d is DELIVER
