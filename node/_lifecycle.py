"""The node's life as one explicit state machine.

Rules:

* Every control message type an agent may receive is listed, per state, in
  :data:`TRANSITIONS`: ``(state, message type) -> next state``. Anything else is refused
  with a :class:`~node._errors.ProtocolError` naming the state and the message, counted by
  the runtime, and never half-applied: the state does not change.
* ``ping``, ``beat``, ``directive`` and ``process`` keep the state they arrive in
  (:data:`STAY`), in every state where they are allowed.
* ``stop`` is legal in every live state; FAILED and STOPPED are final.
"""

from __future__ import annotations

from enum import Enum

from node._errors import ProtocolError

__all__ = ["STAY", "TRANSITIONS", "Lifecycle", "Phase"]


class Phase(Enum):
    JOINING = "joining"  # hello sent, waiting for the plan
    PLANNED = "planned"  # data socket bound, waiting for the peer table
    CONNECTING = "connecting"  # probing in-neighbours (slow joiners), waiting for go
    RUNNING = "running"
    STOPPING = "stopping"  # final report sent, waiting for the coordinator's stop
    STOPPED = "stopped"
    FAILED = "failed"


J, P, C, R, S = Phase.JOINING, Phase.PLANNED, Phase.CONNECTING, Phase.RUNNING, Phase.STOPPING

TRANSITIONS: dict[tuple[Phase, str], Phase] = {
    (J, "plan"): P,
    (J, "refuse"): Phase.FAILED,
    (P, "peers"): C,
    (C, "peers"): C,  # a restarted neighbour moved its data endpoint
    (C, "go"): R,
    (R, "peers"): R,
    (S, "peers"): S,
}
for _phase in (J, P, C, R, S):
    TRANSITIONS[(_phase, "stop")] = Phase.STOPPED
#: message types that leave the state as it is, and the states that accept them
STAY: dict[str, frozenset[Phase]] = {
    "ping": frozenset({J, P, C, R, S}),
    "beat": frozenset({J, P, C, R, S}),
    "directive": frozenset({C, R, S}),
    "process": frozenset({C, R, S}),
}


class Lifecycle:
    """Current phase plus the legal moves; local events (done, failed) have their own calls."""

    __slots__ = ("phase", "refused")

    def __init__(self) -> None:
        self.phase = Phase.JOINING
        #: control messages refused because they did not fit the phase
        self.refused = 0

    def on_message(self, kind: str) -> Phase:
        """Apply a received control message type; raise ProtocolError if it does not fit."""
        stay = STAY.get(kind)
        if stay is not None:
            if self.phase in stay:
                return self.phase
        else:
            nxt = TRANSITIONS.get((self.phase, kind))
            if nxt is not None:
                self.phase = nxt
                return nxt
        self.refused += 1
        raise ProtocolError(f"control message {kind!r} does not fit phase {self.phase.value!r}")

    def finished(self) -> None:
        """The budget is spent and the final report sent."""
        if self.phase is not R:
            raise ProtocolError(f"cannot finish from phase {self.phase.value!r}")
        self.phase = S

    def fail(self) -> None:
        """Something broke locally; STOPPED and FAILED are final and stay as they are."""
        if self.live:
            self.phase = Phase.FAILED

    @property
    def live(self) -> bool:
        return self.phase not in (Phase.STOPPED, Phase.FAILED)
