"""Telemetry samples during a run: on disk, not in the coordinator's memory.

Every batch an agent sends is appended to telemetry/agent-<id>.msgpack as it arrives (with
the clock offset and go time it was converted with). During the run the coordinator needs
only each incarnation's first and last sample (iterations reached, restart state, the live
view), so that is all a :class:`SampleTail` holds, however long the run. The results read
the samples back from the files (:func:`full_records`) and compute exactly what they
computed from memory: the same conversion of the same numbers.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from coordinator._metrics import AgentRecord
from coordinator._rundir import read_telemetry

__all__ = ["SampleTail", "full_records"]


class SampleTail:
    """The samples of one incarnation as far as the run needs them: the first, the last and
    how many; indexing takes 0 and -1 only. The full list is in the telemetry file."""

    __slots__ = ("_count", "_first", "_last")

    def __init__(self) -> None:
        self._first: tuple | None = None
        self._last: tuple | None = None
        self._count = 0

    def append(self, sample: tuple) -> None:
        if self._first is None:
            self._first = sample
        self._last = sample
        self._count += 1

    def __len__(self) -> int:
        return self._count

    def __bool__(self) -> bool:
        return self._count > 0

    def __getitem__(self, i: int) -> tuple:
        if not self._count:
            raise IndexError("no samples yet")
        if i == 0 or i == -self._count:
            return self._first  # type: ignore[return-value]
        if i == -1 or i == self._count - 1:
            return self._last  # type: ignore[return-value]
        raise IndexError(f"only the first and the last sample are held here, not [{i}]")

    def __iter__(self) -> Iterator[tuple]:
        raise TypeError("the samples of a run are in its telemetry files (full_records)")


def _samples_from_file(path: Path) -> dict[int, list[tuple]]:
    """epoch -> every sample of that incarnation, converted as the coordinator did."""
    out: dict[int, list[tuple]] = {}
    if not path.exists():
        return out
    for batch in read_telemetry(path):
        if not isinstance(batch, dict) or "samples" not in batch or "epoch" not in batch:
            continue
        off = float(batch["offset"])
        t0 = float(batch["t_go"])
        lst = out.setdefault(int(batch["epoch"]), [])
        for s in batch["samples"]:
            lst.append((int(s[0]), float(s[1]) - off - t0, s[2], s[3], s[4], s[5]))
    return out


def full_records(records: Sequence[AgentRecord], telemetry_dir: Path) -> list[AgentRecord]:
    """The records with every sample: those that hold a :class:`SampleTail` get their samples
    from the telemetry files (the others, of engines that keep lists, are returned as they
    are)."""
    cache: dict[int, dict[int, list[tuple]]] = {}
    out = []
    for r in records:
        if not isinstance(r.samples, SampleTail):
            out.append(r)
            continue
        per = cache.get(r.agent)
        if per is None:
            per = cache[r.agent] = _samples_from_file(telemetry_dir / f"agent-{r.agent}.msgpack")
        # (fewer than arrived only after a failed write, which the run already reports)
        samples: list[Any] = per.get(r.epoch, [])
        out.append(dataclasses.replace(r, samples=samples))
    return out
