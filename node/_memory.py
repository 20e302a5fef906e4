"""An in-memory synchronous driver: moves every outbox to the inboxes along the graph.

For tests of the pure cores and for quick studies. ``deliver(src, dst, k)`` decides whether
the round-k message on link src->dst arrives (default: always). The full lockstep runner with
the fault models lives in the coordinator; this is the minimal helper for testing a pure step (DEVELOPERS.md, "Adding an algorithm").
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from node._algorithm import Algorithm, Received

__all__ = ["run_in_memory"]


def run_in_memory(
    algorithms: Sequence[Algorithm],
    iterations: int,
    deliver: Callable[[int, int, int], bool] | None = None,
    on_step: Callable[[int, list[Any]], None] | None = None,
) -> list[Any]:
    """Run ``iterations`` synchronous rounds; return the final states (index = agent id)."""
    by_id = {a.spec.id: a for a in algorithms}
    states: dict[int, Any] = {}
    outbox: dict[int, dict] = {}
    for i, a in by_id.items():
        states[i], outbox[i] = a.init()
    latest: dict[int, dict[int, Received]] = {i: {} for i in by_id}
    for k in range(iterations):
        for i, a in by_id.items():
            inbox = latest[i]
            for j, r in list(inbox.items()):
                if r.fresh:
                    inbox[j] = Received(r.iteration, r.payload, False)
            for j in a.spec.in_neighbours:
                if deliver is None or deliver(j, i, k):
                    inbox[j] = Received(k, outbox[j], True)
        new_out = {}
        for i, a in by_id.items():
            states[i], new_out[i] = a.step(states[i], dict(latest[i]), k)
        outbox = new_out
        if on_step is not None:
            on_step(k, [states[i] for i in sorted(states)])
    return [states[i] for i in sorted(states)]
