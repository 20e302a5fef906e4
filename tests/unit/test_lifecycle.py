"""The node's life cycle: every legal move, and every other (phase, message) pair refused.

The expected table below is written out by hand from the rules (the design's handshake:
hello -> plan -> bound -> peers -> probes -> ready -> go -> run -> final -> stop), not read
from :data:`node._lifecycle.TRANSITIONS`, so a change to the module's table fails here.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from node._errors import ProtocolError
from node._lifecycle import Lifecycle, Phase
from node._wire import CONTROL_SCHEMA
from topologies._errors import SwarmrigError

J, P, C, R, S = Phase.JOINING, Phase.PLANNED, Phase.CONNECTING, Phase.RUNNING, Phase.STOPPING
STOPPED, FAILED = Phase.STOPPED, Phase.FAILED
LIVE = (J, P, C, R, S)

#: (phase, message type) -> next phase; every pair not listed must be refused
EXPECTED: dict[tuple[Phase, str], Phase] = {
    (J, "plan"): P,
    (J, "refuse"): FAILED,
    (P, "peers"): C,
    (C, "peers"): C,  # a restarted neighbour moved its endpoint while we probe
    (C, "go"): R,
    (R, "peers"): R,
    (S, "peers"): S,
}
for _phase in LIVE:
    EXPECTED[(_phase, "stop")] = STOPPED
    EXPECTED[(_phase, "ping")] = _phase
    EXPECTED[(_phase, "beat")] = _phase
for _phase in (C, R, S):
    EXPECTED[(_phase, "directive")] = _phase
    EXPECTED[(_phase, "process")] = _phase

#: every message type that exists, plus names that do not
KINDS = (*sorted(CONTROL_SCHEMA), "shout", "", "PLAN")
PAIRS = [(ph, kind) for ph in Phase for kind in KINDS]


def at(phase: Phase) -> Lifecycle:
    life = Lifecycle()
    life.phase = phase
    return life


def test_a_new_node_is_joining_and_live() -> None:
    life = Lifecycle()
    assert life.phase is J
    assert life.refused == 0
    assert life.live


@pytest.mark.parametrize(
    ("phase", "kind"),
    [pair for pair in PAIRS if pair in EXPECTED],
    ids=lambda v: v.value if isinstance(v, Phase) else v,
)
def test_legal_moves(phase: Phase, kind: str) -> None:
    life = at(phase)
    assert life.on_message(kind) is EXPECTED[(phase, kind)]
    assert life.phase is EXPECTED[(phase, kind)]
    assert life.refused == 0


@pytest.mark.parametrize(
    ("phase", "kind"),
    [pair for pair in PAIRS if pair not in EXPECTED],
    ids=lambda v: v.value if isinstance(v, Phase) else repr(v),
)
def test_illegal_pairs_are_refused_and_change_nothing(phase: Phase, kind: str) -> None:
    life = at(phase)
    with pytest.raises(ProtocolError) as info:
        life.on_message(kind)
    assert isinstance(info.value, SwarmrigError)
    text = str(info.value)
    assert repr(kind) in text, text
    assert repr(phase.value) in text, text
    assert life.phase is phase
    assert life.refused == 1


def test_agent_to_coordinator_types_are_refused_everywhere() -> None:
    # An agent never receives what it sends itself: a looped-back frame is refused.
    for kind in ("hello", "bound", "ready", "pong", "tel", "ack", "final", "failed"):
        for phase in Phase:
            with pytest.raises(ProtocolError):
                at(phase).on_message(kind)


def test_final_phases_accept_nothing() -> None:
    for phase in (STOPPED, FAILED):
        life = at(phase)
        for n, kind in enumerate(KINDS, start=1):
            with pytest.raises(ProtocolError):
                life.on_message(kind)
            assert life.phase is phase
            assert life.refused == n
        assert not life.live


def test_the_handshake_in_order() -> None:
    life = Lifecycle()
    for kind, phase in [
        ("ping", J),
        ("plan", P),
        ("beat", P),
        ("peers", C),
        ("directive", C),  # faults armed before go are allowed
        ("peers", C),
        ("go", R),
        ("process", R),
        ("peers", R),
    ]:
        assert life.on_message(kind) is phase
    life.finished()
    assert life.phase is S
    assert life.on_message("directive") is S
    assert life.on_message("stop") is STOPPED
    assert life.refused == 0
    assert not life.live


def test_a_refused_message_does_not_block_the_next_legal_one() -> None:
    life = Lifecycle()
    for kind in ("go", "peers", "directive", "hello"):
        with pytest.raises(ProtocolError):
            life.on_message(kind)
    assert life.phase is J
    assert life.refused == 4
    assert life.on_message("plan") is P
    assert life.refused == 4


def test_refuse_during_join_fails_the_node() -> None:
    life = Lifecycle()
    assert life.on_message("refuse") is FAILED
    assert not life.live


def test_refuse_after_the_plan_is_refused() -> None:
    # Once planned, a refusal is no longer the coordinator's answer to our hello.
    for phase in (P, C, R, S):
        life = at(phase)
        with pytest.raises(ProtocolError):
            life.on_message("refuse")
        assert life.phase is phase


def test_finished_only_from_running() -> None:
    life = at(R)
    life.finished()
    assert life.phase is S
    for phase in (J, P, C, S, STOPPED, FAILED):
        life = at(phase)
        with pytest.raises(ProtocolError, match=repr(phase.value)):
            life.finished()
        assert life.phase is phase


@pytest.mark.parametrize("phase", [*LIVE, FAILED], ids=lambda p: p.value)
def test_fail_from_any_live_phase(phase: Phase) -> None:
    life = at(phase)
    life.fail()
    assert life.phase is FAILED
    assert not life.live
    with pytest.raises(ProtocolError):
        life.on_message("stop")


@settings(max_examples=300, deadline=None)
@given(st.lists(st.sampled_from(KINDS), max_size=40))
def test_random_message_sequences_follow_the_table(kinds: list[str]) -> None:
    life = Lifecycle()
    phase, refused = J, 0
    for kind in kinds:
        nxt = EXPECTED.get((phase, kind))
        if nxt is None:
            with pytest.raises(ProtocolError):
                life.on_message(kind)
            refused += 1
        else:
            assert life.on_message(kind) is nxt
            phase = nxt
        assert life.phase is phase
        assert life.refused == refused
        assert life.live == (phase not in (STOPPED, FAILED))


@pytest.mark.parametrize("final", [Phase.STOPPED, Phase.FAILED])
def test_fail_leaves_a_final_phase_alone(final: Phase) -> None:
    life = Lifecycle()
    life.phase = final
    life.fail()
    assert life.phase is final
