"""The ipc socket directory of a run, and the clean-up of those a killed coordinator left.

A coordinator of an ipc run makes ``$TMPDIR/swarmrig-XXXX`` and removes it at the end. A
coordinator killed by SIGKILL cannot, so each directory names its owner in a file ``owner``
(``pid`` and the process's start time, which tells a reused pid from the owner); the next
coordinator to start removes every such directory whose owner is gone. Directories without
an owner file, or whose owner still runs, are left alone.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import psutil

__all__ = ["OWNER_FILE", "PREFIX", "make_ipc_dir", "remove_stale_ipc_dirs"]

PREFIX = "swarmrig-"
OWNER_FILE = "owner"


def _start_time(pid: int) -> float | None:
    try:
        return psutil.Process(pid).create_time()
    except (psutil.NoSuchProcess, psutil.AccessDenied, psutil.ZombieProcess):
        return None


def make_ipc_dir() -> str:
    """A fresh socket directory that names this process as its owner."""
    path = tempfile.mkdtemp(prefix=PREFIX)
    owner = {"pid": os.getpid(), "started": _start_time(os.getpid())}
    Path(path, OWNER_FILE).write_text(json.dumps(owner) + "\n")
    return path


def _owner_gone(d: Path) -> bool:
    try:
        owner = json.loads((d / OWNER_FILE).read_text())
        pid, started = int(owner["pid"]), owner.get("started")
    except (OSError, ValueError, KeyError, TypeError):
        return False  # no (readable) owner file: not ours to judge
    now = _start_time(pid)
    if now is None:
        return True
    return started is not None and abs(float(started) - now) > 1.0  # the pid was reused


def remove_stale_ipc_dirs(root: str | None = None) -> list[str]:
    """Remove socket directories whose owner died; returns the ones removed."""
    removed = []
    base = Path(root or tempfile.gettempdir())
    with contextlib.suppress(OSError):
        for d in base.glob(PREFIX + "*"):
            if d.is_dir() and not d.is_symlink() and _owner_gone(d):
                shutil.rmtree(d, ignore_errors=True)
                if not d.exists():
                    removed.append(str(d))
    return removed
