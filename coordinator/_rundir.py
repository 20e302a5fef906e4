"""The run directory: names and keys fixed by the design so scripts can rely on them."""

from __future__ import annotations

import contextlib
import csv
import datetime as dt
import json
import math
import re
import shutil
from pathlib import Path
from typing import Any

import msgpack

from topologies._errors import ScenarioError, SwarmrigError

__all__ = [
    "EXIT_WRITE_FAILED",
    "LINK_COLUMNS",
    "METRIC_COLUMNS",
    "OutNotEmpty",
    "RunDir",
    "RunDirError",
    "prepare_out",
    "read_events",
    "read_telemetry",
]

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
    "forged",
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


#: exit status of a run whose directory could not be written (full disk, unwritable --out)
EXIT_WRITE_FAILED = 6


class RunDirError(SwarmrigError):
    """A file of the run directory could not be written (full disk, unwritable --out)."""

    def __init__(self, path: Path, exc: OSError) -> None:
        self.path = path
        self.reason = exc.strerror or str(exc)
        super().__init__(f"cannot write {path}: {self.reason}")


class OutNotEmpty(ScenarioError):
    """--out names a directory that already holds files (of an earlier run, maybe)."""


#: what marks a directory as a run directory that --replace may clear
_RUN_MARKS = ("run.json", "scenario.toml")


def prepare_out(path: Path, replace: bool) -> None:
    """Refuse a non-empty ``path`` unless ``replace``; with it, clear an earlier run there.

    Only a run directory (it holds run.json or scenario.toml) is cleared: --replace on any
    other non-empty directory is refused as well, so a typo cannot empty a home directory.
    """
    try:
        entries = sorted(p.name for p in path.iterdir()) if path.is_dir() else []
    except OSError as exc:
        raise RunDirError(path, exc) from None
    if not entries:
        return
    shown = ", ".join(entries[:5]) + (", ..." if len(entries) > 5 else "")
    if not replace:
        raise OutNotEmpty(
            f"--out {path}: the directory is not empty ({len(entries)} entries: {shown}); a"
            " second run would mix its files with the first's. Choose a new directory, or"
            " pass --replace to delete the earlier run there"
        )
    if not any(m in entries for m in _RUN_MARKS):
        raise OutNotEmpty(
            f"--out {path} --replace: the directory holds no run.json or scenario.toml, so it"
            f" is not a run directory ({shown}); refusing to delete it"
        )
    try:
        shutil.rmtree(path)
    except OSError as exc:
        raise RunDirError(path, exc) from None


class RunDir:
    """The files of one run. Whole files (run.json, CSVs) raise RunDirError when they cannot
    be written; events and telemetry never raise: the first failure is kept in ``failure``,
    and later lines are dropped (the coordinator checks ``failure`` and ends the run)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.failure: RunDirError | None = None
        self._tel: dict[int, Any] = {}
        target = path
        try:
            path.mkdir(parents=True, exist_ok=True)
            target = path / "telemetry"
            target.mkdir(exist_ok=True)
            target = path / "events.jsonl"
            self._events = target.open("a", buffering=1)
        except OSError as exc:
            raise RunDirError(target, exc) from None

    def _failed(self, path: Path, exc: OSError) -> RunDirError:
        err = RunDirError(path, exc)
        if self.failure is None:
            self.failure = err
        return err

    def remove_tmp(self) -> None:
        """Remove half-written files (NAME.tmp) left by a failed or abandoned write."""
        with contextlib.suppress(OSError):
            for p in self.path.glob("*.tmp"):
                with contextlib.suppress(OSError):
                    p.unlink()

    @staticmethod
    def default_path(name: str, root: Path = Path("runs")) -> Path:
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S.%fZ")
        return root / f"{name}-{stamp}"

    def write_text(self, name: str, text: str, *, tmp_name: str | None = None) -> None:
        tmp = self.path / (tmp_name or name + ".tmp")
        try:
            tmp.write_text(text)
            tmp.replace(self.path / name)
        except OSError as exc:
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise self._failed(self.path / name, exc) from None

    def write_json(self, name: str, obj: Any, *, tmp_name: str | None = None) -> None:
        self.write_text(name, json.dumps(_clean(obj), indent=2) + "\n", tmp_name=tmp_name)

    def event(self, obj: dict[str, Any]) -> None:
        if self.failure is not None:
            return
        try:
            self._events.write(json.dumps(_clean(obj)) + "\n")
        except (OSError, ValueError) as exc:  # ValueError: the file was closed
            self._failed(self.path / "events.jsonl", _as_oserror(exc))

    def telemetry(self, agent: int, batch: dict[str, Any]) -> None:
        if self.failure is not None:
            return
        path = self.path / "telemetry" / f"agent-{agent}.msgpack"
        try:
            f = self._tel.get(agent)
            if f is None:
                f = self._tel[agent] = path.open("ab")
            # string keys only, so that any msgpack reader takes the file with its defaults
            f.write(msgpack.packb(_string_keys(batch)))
            f.flush()
        except OSError as exc:
            self._failed(path, exc)

    def write_csv(self, name: str, columns: tuple[str, ...], rows: list[dict[str, Any]]) -> None:
        tmp = self.path / (name + ".tmp")
        try:
            with tmp.open("w", newline="") as f:
                w = csv.DictWriter(f, fieldnames=list(columns))
                w.writeheader()
                for r in rows:
                    w.writerow({k: ("" if r.get(k) is None else r.get(k)) for k in columns})
            tmp.replace(self.path / name)
        except OSError as exc:
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise self._failed(self.path / name, exc) from None

    def events(self) -> list[dict[str, Any]]:
        """Every event written so far, in order (read back from events.jsonl)."""
        with contextlib.suppress(OSError, ValueError):
            self._events.flush()
        return read_events(self.path / "events.jsonl")

    def close(self) -> None:
        for f in [*self._tel.values(), self._events]:
            with contextlib.suppress(OSError):  # a full disk: the write already failed
                f.close()
        self._tel.clear()


def _as_oserror(exc: Exception) -> OSError:
    return exc if isinstance(exc, OSError) else OSError(0, str(exc))


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
