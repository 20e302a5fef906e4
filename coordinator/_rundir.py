"""The run directory: names and keys fixed by the design so scripts can rely on them."""

from __future__ import annotations

import csv
import datetime as dt
import json
import math
import re
from pathlib import Path
from typing import Any

import msgpack

__all__ = ["LINK_COLUMNS", "METRIC_COLUMNS", "RunDir", "read_events", "read_telemetry"]

LINK_COLUMNS = (
    "from",
    "to",
    "sent",
    "delivered",
    "dropped_injected",
    "lost_transport",
    "duplicated",
    "rejected",
    "in_flight",
    "delay_median_ms",
    "delay_p95_ms",
    "delay_max_ms",
)
METRIC_COLUMNS = (
    "t_s",
    "gap",
    "consensus_error",
    "priority_disagreement",
    "priority_drift",
    "iteration_min",
    "iteration_median",
    "iteration_max",
    "worst_agent_gap",
)


def _clean(obj: Any) -> Any:
    """JSON cannot hold NaN or infinity: write them as null."""
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if hasattr(obj, "tolist"):
        return _clean(obj.tolist())
    return obj


class RunDir:
    def __init__(self, path: Path) -> None:
        self.path = path
        path.mkdir(parents=True, exist_ok=True)
        (path / "telemetry").mkdir(exist_ok=True)
        (path / "events.jsonl").touch()
        self._tel: dict[int, Any] = {}
        self._events = (path / "events.jsonl").open("a", buffering=1)

    @staticmethod
    def default_path(name: str, root: Path = Path("runs")) -> Path:
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S.%fZ")
        return root / f"{name}-{stamp}"

    def write_text(self, name: str, text: str) -> None:
        tmp = self.path / (name + ".tmp")
        tmp.write_text(text)
        tmp.replace(self.path / name)

    def write_json(self, name: str, obj: Any) -> None:
        self.write_text(name, json.dumps(_clean(obj), indent=2) + "\n")

    def event(self, obj: dict[str, Any]) -> None:
        self._events.write(json.dumps(_clean(obj)) + "\n")

    def telemetry(self, agent: int, batch: dict[str, Any]) -> None:
        f = self._tel.get(agent)
        if f is None:
            f = self._tel[agent] = (self.path / "telemetry" / f"agent-{agent}.msgpack").open("ab")
        # string keys only, so that any msgpack reader takes the file with its defaults
        f.write(msgpack.packb(_string_keys(batch)))
        f.flush()

    def write_csv(self, name: str, columns: tuple[str, ...], rows: list[dict[str, Any]]) -> None:
        tmp = self.path / (name + ".tmp")
        with tmp.open("w", newline="") as f:
            w = csv.DictWriter(f, fieldnames=list(columns))
            w.writeheader()
            for r in rows:
                w.writerow({k: ("" if r.get(k) is None else r.get(k)) for k in columns})
        tmp.replace(self.path / name)

    def events(self) -> list[dict[str, Any]]:
        """Every event written so far, in order (read back from events.jsonl)."""
        self._events.flush()
        return read_events(self.path / "events.jsonl")

    def close(self) -> None:
        for f in self._tel.values():
            f.close()
        self._tel.clear()
        self._events.close()


def _string_keys(obj: Any) -> Any:
    """``obj`` with every map key written as a string (agent ids and epochs become "3")."""
    if isinstance(obj, dict):
        return {k if isinstance(k, str) else str(k): _string_keys(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple) and any(isinstance(v, dict | list | tuple) for v in obj):
        return [_string_keys(v) for v in obj]
    return obj


_INT_KEY = re.compile(r"-?[0-9]+")


def _int_keys(pairs: list[tuple[Any, Any]]) -> dict[Any, Any]:
    # files hold agent ids and epochs as "3" (or, written before, as 3): read both as 3
    return {int(k) if isinstance(k, str) and _INT_KEY.fullmatch(k) else k: v for k, v in pairs}


def read_telemetry(path: Path) -> list[dict[str, Any]]:
    """Every batch of one telemetry file, in arrival order (a torn last batch is skipped).

    Map keys that are agent ids or epochs come back as integers, whether the file wrote them
    as strings (now) or as integers (older files).
    """
    out = []
    with path.open("rb") as f:
        unpacker = msgpack.Unpacker(f, strict_map_key=False, object_pairs_hook=_int_keys)
        try:
            for obj in unpacker:
                out.append(obj)
        except (ValueError, msgpack.OutOfData):
            pass
    return out


def read_events(path: Path) -> list[dict[str, Any]]:
    """Every object of an events.jsonl file, in order (a torn last line is skipped)."""
    out = []
    with path.open() as f:
        for line in f:
            try:
                out.append(json.loads(line))
            except json.JSONDecodeError:
                continue
    return out
