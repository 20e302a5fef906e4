"""Start and end events of link-fault windows that no directive marks, seen in telemetry.

Link faults given in iterations, and time windows armed from the start, are enforced by the
agents themselves (each message's iteration or time is tested against the window), so the
coordinator sends nothing when they begin or end. It still records both in events.jsonl,
when telemetry first shows them: ``fault-start`` when the first agent's samples reach the
window's start, ``fault-end`` when every agent still alive has passed its end. Each event
carries the window boundary (``iteration`` or ``at_s``), the agent and sample time that
showed it (``agent``, ``t_sample_s``, on the coordinator's clock) and, as every event, the
coordinator's time ``t_s`` when it was noticed (a telemetry batch after the fact).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = ["WindowEvents"]


@dataclass(slots=True)
class _Window:
    index: int
    kind: str
    #: "iteration" or "s"
    unit: str
    start: float
    end: float | None
    started: bool = False
    ended: bool = False
    #: agents seen at or past the end
    past_end: set[int] = field(default_factory=set)


class WindowEvents:
    """Feed it every agent's samples; it returns the events to write, each once."""

    def __init__(self, faults: Iterable[Mapping[str, Any]], n: int) -> None:
        self.n = n
        self.windows: list[_Window] = []
        for f in faults:
            if "agents" in f:  # process faults have events of their own
                continue
            if f.get("start_iteration") is not None:
                start = float(f["start_iteration"])
                dur = f.get("duration_iterations")
                unit = "iteration"
            elif float(f.get("start_s") or 0.0) == 0.0:
                # armed from the start (later time windows are sent as directives)
                start = 0.0
                dur = f.get("duration_s")
                unit = "s"
            else:
                continue
            self.windows.append(
                _Window(
                    index=int(f["index"]),
                    kind=str(f["kind"]),
                    unit=unit,
                    start=start,
                    end=None if dur is None else start + float(dur),
                )
            )

    def observe(
        self, agent: int, samples: Iterable[tuple[int, float]], dead: Iterable[int] = ()
    ) -> list[dict[str, Any]]:
        """Events that ``agent``'s new samples, (iteration, t_s) pairs, reveal; ``dead``:
        agents not expected to report any more (not waited for at the end of a window)."""
        out: list[dict[str, Any]] = []
        samples = list(samples)
        if not self.windows or not samples:
            return out
        gone = set(dead)
        for w in self.windows:
            if w.ended:
                continue
            for it, t in samples:
                key = float(it) if w.unit == "iteration" else float(t)
                if not w.started and key >= w.start:
                    w.started = True
                    out.append(self._event("fault-start", w, w.start, agent, t))
                if w.started and w.end is not None and key >= w.end:
                    w.past_end.add(agent)
                    if len(w.past_end | gone) >= self.n:
                        w.ended = True
                        out.append(self._event("fault-end", w, w.end, agent, t))
                        break
        return out

    @staticmethod
    def _event(name: str, w: _Window, at: float, agent: int, t: float) -> dict[str, Any]:
        where = {"iteration": int(at)} if w.unit == "iteration" else {"at_s": at}
        return {
            "event": name,
            "fault": w.index,
            "kind": w.kind,
            **where,
            "agent": agent,
            "t_sample_s": float(t),
        }
