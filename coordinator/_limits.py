"""What the runtime can do: the bounds the scenario loader enforces, each with its reason.

A number beyond one of these would crash an agent (a poll timeout that does not fit), end
in a float overflow (F* = inf), call a healthy run "diverged", or ask for a message larger
than the codec carries. The scenario loader refuses it with the key, the bound and the
reason (:func:`why`). How much this machine holds (memory, processes) is checked apart,
before anything starts; these bounds hold on every machine.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from node._links import DELAY_MAX_MS
from node._runtime import DIVERGED
from node._wire import MAX_CONTROL_FRAME, MAX_DATA_FRAME
from topologies._errors import ScenarioError

__all__ = [
    "AGENTS_MAX",
    "DELAY_MAX_MS",
    "DIMENSION_MAX",
    "ITERATIONS_MAX",
    "MAGNITUDE_MAX",
    "PERIOD_MS_MIN",
    "POLL_MS_MAX",
    "QUADRATIC_DIMENSION_MAX",
    "SAMPLE_NUMBERS_MAX",
    "WHY",
    "check_waits",
]

#: Agents in one swarm. The coordinator builds dense agents x agents matrices (the graph's
#: Laplacian spectrum, the mixing weights, the priority table): at 4096 agents each holds
#: 16.8 million numbers (128 MiB) and its spectrum takes minutes; the swarm runs one OS
#: process per agent.
AGENTS_MAX = 4096

#: One wait of an agent's loop, in ms: a ZeroMQ poll timeout, kept to a signed 32-bit count
#: of milliseconds (about 24.8 days) so that it converts on every platform.
POLL_MS_MAX = 2**31 - 1

#: Shortest async period, in ms: an agent's loop waits in whole milliseconds of poll, so a
#: shorter period only spins; below one microsecond a seconds budget counts more rounds than
#: iteration numbers hold exactly.
PERIOD_MS_MIN = 1e-3

#: Iterations and iteration windows: telemetry and metrics hold iteration numbers as
#: float64, exact up to 2**53.
ITERATIONS_MAX = 2**53

#: Scale of targets and initial states (the norm of a vector): an agent whose state's norm
#: reaches DIVERGED (1e12) is counted as diverged, so a scenario's own scale stays a factor
#: 1000 below it.
MAGNITUDE_MAX = DIVERGED / 1000.0

# Bytes per float64 in msgpack (a marker byte and eight bytes), and room for everything else
# a frame holds besides its arrays.
_NUMBER_BYTES = 9
_FRAME_ROOM = 4096

#: Dimension of the decision vector: a data frame carries up to two vectors of this length
#: and a priority vector of one entry per agent (8 bytes a number) in at most MAX_DATA_FRAME
#: bytes (1 MiB).
DIMENSION_MAX = (MAX_DATA_FRAME - _FRAME_ROOM - 8 * (AGENTS_MAX + 1)) // 16 // 1000 * 1000

#: Dimension of a quadratic objective: each agent's plan carries its d x d curvature matrix
#: in one control frame of at most MAX_CONTROL_FRAME bytes (64 MiB); half of it is kept for
#: the rest of the plan.
QUADRATIC_DIMENSION_MAX = math.isqrt(MAX_CONTROL_FRAME // 2 // _NUMBER_BYTES) // 100 * 100

#: Numbers of local data per agent (samples x (dimension + 1)) of logistic and Huber
#: objectives: they travel in the agent's plan, one control frame (half of it, as above).
SAMPLE_NUMBERS_MAX = MAX_CONTROL_FRAME // 2 // _NUMBER_BYTES

#: The reason given with each bound, in the words of the error message.
WHY = {
    "agents": (
        "the coordinator builds dense agents x agents matrices for the graph spectrum, the"
        " mixing weights and the priorities, and starts one OS process per agent"
    ),
    "poll": (
        "an agent waits for its next iteration in one poll, whose timeout is a 32-bit count"
        f" of milliseconds: at most {POLL_MS_MAX} ms, about 24.8 days"
    ),
    "iterations": "iteration numbers are kept as float64 in telemetry and metrics, exact up to 2**53",
    "magnitude": (
        f"an agent whose state's norm reaches {DIVERGED:g} counts as diverged, and the"
        " scenario's own scale stays 1000 times below that"
    ),
    "dimension": (
        f"a data frame carries up to two vectors of this length in at most {MAX_DATA_FRAME} bytes"
    ),
    "quadratic_dimension": (
        "each agent's plan carries its d x d curvature matrix in one control frame of at most"
        f" {MAX_CONTROL_FRAME >> 20} MiB"
    ),
    "samples": (
        "each agent's local data, samples x (dimension + 1) numbers, travels in its plan, one"
        f" control frame of at most {MAX_CONTROL_FRAME >> 20} MiB"
    ),
}


def check_waits(
    source: str,
    timing: Mapping[str, Any],
    overrides: Mapping[int, Mapping[str, Any]],
    faults: Sequence[Mapping[str, Any]],
    n: int,
) -> None:
    """Async mode: every agent's longest wait, period * speed * slow factor * (1 + jitter),
    must fit one poll (:data:`POLL_MS_MAX`).

    The error blames the key that pushed the wait over and gives its bound with the other
    keys as they are. Raises :class:`ScenarioError`.
    """
    poll, top = WHY["poll"], POLL_MS_MAX
    period, jitter, spread = timing["period_ms"], timing["jitter"], timing["speed_spread"]
    per = period * (1.0 + jitter)
    drawn = 1.0 + spread  # speeds are drawn in [1 - s, 1 + s]
    if per * drawn > top:
        raise ScenarioError(
            f"{source}: [timing].period_ms: expected a number <= {top / ((1.0 + jitter) * drawn):g}"
            f" with jitter = {jitter:g} and speed_spread = {spread:g} ({poll}), got {period!r}"
        )
    speed = {i: overrides.get(i, {}).get("speed", drawn) for i in range(n)}
    for i, o in overrides.items():
        if "speed" in o and per * o["speed"] > top:
            raise ScenarioError(
                f"{source}: [[agent]] id={i}: speed: expected a number <= {top / per:g} with"
                f" [timing].period_ms = {period:g} and jitter = {jitter:g} ({poll}),"
                f" got {o['speed']!r}"
            )
    for f in faults:
        if f["kind"] != "slow":
            continue
        slowest = max(f["agents"], key=lambda i: speed[i])
        factor = f["params"]["factor"]
        if per * speed[slowest] * factor > top:
            raise ScenarioError(
                f"{source}: [[fault]] #{f['index']}: factor: expected a number <="
                f" {top / (per * speed[slowest]):g} for agent {slowest} with [timing].period_ms"
                f" = {period:g} ({poll}), got {factor!r}"
            )
