"""The coordinator's inbound control traffic under load: bounded queues, bounded work per
loop turn, and a bounded record of what was refused.

A peer that floods the control endpoint must not be able to starve the loop (heartbeats and
the fault timeline run between turns), fill the coordinator's memory (the ROUTER's inbound
queue is bounded per connection) or fill the disk (events.jsonl gets the first few refusals
of each kind and sender, every peer-supplied field cut short, and the rest is counted).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import zmq

__all__ = [
    "CONTROL_RCVHWM",
    "TURN_MESSAGES",
    "TURN_S",
    "RefusalLog",
    "clip",
    "take_turn",
]

#: messages queued per connection on the control ROUTER before libzmq stops reading that
#: connection (a legitimate agent sends a telemetry batch every batch_ms: a thousand is
#: many seconds of backlog). Common practice, not from a source.
CONTROL_RCVHWM = 1000
#: at most this many control messages are handled in one loop turn ...
TURN_MESSAGES = 512
#: ... or for this long (s), whichever comes first; then heartbeats and the timeline run
TURN_S = 0.02

#: a peer-supplied value written to events.jsonl is cut to this many characters
FIELD_LIMIT = 200
#: lines written per (event, reason, sender) before repeats are only counted
FIRST_PER_KEY = 10
#: refusal lines written in a whole run before every further one is only counted
MAX_LINES = 1000
#: distinct (event, reason, sender) keys counted one by one; beyond, pooled as "(other)"
MAX_KEYS = 1024
#: seconds between two summary lines while refusals are being suppressed
SUMMARY_EVERY_S = 5.0
#: keys listed in a summary line (the most frequent ones)
SUMMARY_KEYS = 10


def clip(value: Any, limit: int = FIELD_LIMIT) -> Any:
    """A value fit for one events.jsonl field: numbers and None as they are, anything
    else as text of at most ``limit`` characters (saying how much was cut)."""
    if value is None or isinstance(value, bool | int | float):
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) >= 1 << 63:
            return clip(str(value), limit)
        return value
    if isinstance(value, bytes | bytearray | memoryview):
        text = bytes(value[: limit // 2 + 1]).hex()
        n = len(value)
        return text[:limit] + (f"... ({n} bytes)" if 2 * n > limit else "")
    text = value if isinstance(value, str) else repr(value)
    if len(text) <= limit:
        return text
    return text[:limit] + f"... ({len(text)} characters)"


class RefusalLog:
    """Refused control traffic into events.jsonl, bounded in lines and in line length.

    ``write(event, fields)`` writes one line. Each refusal has a key (event, reason, sender);
    the first :data:`FIRST_PER_KEY` of a key are written (fields clipped), up to
    :data:`MAX_LINES` in all; the others are counted, and while any are, a
    ``refusals-counted`` line says so every :data:`SUMMARY_EVERY_S` seconds and once at the
    end (:meth:`close`), with the totals and the most frequent keys.
    """

    def __init__(
        self,
        write: Callable[..., None],
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._write = write
        self._clock = clock
        self.counts: dict[tuple[str, str, str], int] = {}
        self.total = 0
        self.by_event: dict[str, int] = {}
        self.lines = 0
        self.suppressed = 0
        self._summarised = 0
        self._next_summary = clock() + SUMMARY_EVERY_S

    def refuse(self, event: str, why: str, sender: Any, /, **fields: Any) -> None:
        """Count one refusal (``why``: its reason, ``sender``: the peer's identity or None);
        write it if its key has not been written often yet."""
        sender_s = clip(sender, 64) if sender is not None else "?"
        key = (event, str(clip(why, 100)), str(sender_s))
        if key not in self.counts and len(self.counts) >= MAX_KEYS:
            key = (event, "(other)", "(other)")
        seen = self.counts.get(key, 0)
        self.counts[key] = seen + 1
        self.total += 1
        self.by_event[event] = self.by_event.get(event, 0) + 1
        if seen < FIRST_PER_KEY and self.lines < MAX_LINES:
            self.lines += 1
            clipped = {k: clip(v) for k, v in fields.items()}
            if sender is not None:
                clipped["sender"] = sender_s
            self._write(event, **clipped)
        else:
            self.suppressed += 1
        self.tick()

    def tick(self) -> None:
        """Write a summary line when refusals were suppressed since the last one and its
        time has come (called every loop turn)."""
        if self.suppressed == self._summarised or self._clock() < self._next_summary:
            return
        self.summary(final=False)

    def close(self) -> None:
        """The last summary line, if anything was ever suppressed."""
        if self.suppressed:
            self.summary(final=True)

    def summary(self, *, final: bool) -> None:
        self._summarised = self.suppressed
        self._next_summary = self._clock() + SUMMARY_EVERY_S
        top = sorted(self.counts.items(), key=lambda kv: -kv[1])[:SUMMARY_KEYS]
        self._write(
            "refusals-counted",
            final=final,
            total=self.total,
            written=self.lines,
            suppressed=self.suppressed,
            by_event=dict(self.by_event),
            top=[{"event": e, "reason": r, "sender": s, "count": c} for (e, r, s), c in top],
        )


def take_turn(
    sock: zmq.Socket,
    handle: Callable[[bytes, bytes, str | None], None],
    on_bad_envelope: Callable[[bytes | None, int], None],
    *,
    keyed: bool,
    clock: Callable[[], float] = time.monotonic,
    limit: int = TURN_MESSAGES,
    seconds: float = TURN_S,
) -> int:
    """Handle what is queued on the ROUTER ``sock``, at most ``limit`` messages or
    ``seconds``; returns how many were taken. ``handle(ident, frame, user)`` gets each
    [identity, frame] message (``user``: the key name the sender authenticated with, keyed
    runs only); ``on_bad_envelope(ident, parts)`` any other shape."""
    end = clock() + seconds
    taken = 0
    while taken < limit:
        try:
            parts = sock.recv_multipart(zmq.NOBLOCK, copy=False)
        except zmq.Again:
            break
        taken += 1
        if len(parts) != 2:
            ident = parts[0].bytes if parts else None
            on_bad_envelope(ident, len(parts))
        else:
            user = parts[1].get("User-Id") if keyed else None
            handle(parts[0].bytes, parts[1].bytes, user)
        if clock() >= end:
            break
    return taken
