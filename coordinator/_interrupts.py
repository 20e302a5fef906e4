"""Ctrl-C and SIGTERM for a coordinator: stop, finish, or abandon; never a traceback.

One :class:`Interrupts` per process (the command line installs it before it loads the
scenario, so a signal at any moment is handled). A coordinator binds to it for its run:

1. the first signal asks the coordinator to stop: the agents are stopped, their final
   reports collected and every file of the run directory written; the run exits 130;
2. a second one says plainly that the run directory is being finished (nothing else);
3. a third one abandons: the swarm's process group is killed, run.json records
   ``"exit": "abandoned"`` with the phase the run was in, half-written files are removed,
   and the process exits 130 at once (``swarmrig salvage DIR`` can still finish the
   directory from the telemetry on disk).

Every signal is recorded (signal, phase, time) and written to run.json under
``interrupts`` by the coordinator; ``phase`` in run.json is one of :data:`PHASES`.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import sys
import threading
import time
from typing import Any, Protocol

__all__ = ["EXIT_INTERRUPTED", "PHASES", "Interrupts", "abandon_run"]

#: 128 + SIGINT, what a shell reports for a command ended by Ctrl-C
EXIT_INTERRUPTED = 130
#: what run.json's ``phase`` says the coordinator was doing
PHASES = ("starting", "running", "stopping", "results", "done", "abandoned")
_SIGNALS = (signal.SIGINT, signal.SIGTERM)


class Bound(Protocol):
    """What a coordinator offers the interrupt handler while it runs."""

    def request_stop(self, reason: str) -> None: ...

    def abandon(self, interrupts: Interrupts) -> None: ...


class Interrupts:
    """Counts SIGINT and SIGTERM and acts on the first, second and third (module doc)."""

    def __init__(self) -> None:
        self.received: list[dict[str, Any]] = []
        self.phase = "starting"
        self._bound: Bound | None = None
        self._old: dict[int, Any] = {}
        self._t0 = time.monotonic()

    # -- installing --------------------------------------------------------------------
    _process: Interrupts | None = None

    @classmethod
    def for_process(cls) -> Interrupts:
        """The process-wide handler, installed now (main thread only; elsewhere a handler
        that is never called, since signals reach only the main thread)."""
        if cls._process is None:
            cls._process = cls()
            cls._process.install()
        return cls._process

    @classmethod
    def current(cls) -> Interrupts | None:
        return cls._process

    def install(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return
        for sig in _SIGNALS:
            self._old[sig] = signal.signal(sig, self._handler)

    def uninstall(self) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)
        self._old.clear()
        if Interrupts._process is self:
            Interrupts._process = None

    # -- the coordinator's side --------------------------------------------------------
    def bind(self, coordinator: Bound) -> None:
        """Hand signals to ``coordinator`` from now on; one that came before asks it to
        stop at once."""
        self._bound = coordinator
        self.phase = "starting"
        if self.received:
            coordinator.request_stop(self.reason)

    def release(self) -> None:
        self._bound = None

    @property
    def count(self) -> int:
        return len(self.received)

    @property
    def reason(self) -> str:
        return f"interrupted ({self.received[0]['signal']})" if self.received else ""

    def records(self) -> list[dict[str, Any]]:
        return [dict(r) for r in self.received]

    # -- the handler -------------------------------------------------------------------
    def _handler(self, signum: int, frame: Any) -> None:
        name = signal.Signals(signum).name
        self.received.append(
            {"signal": name, "phase": self.phase, "t_s": round(time.monotonic() - self._t0, 3)}
        )
        n = len(self.received)
        bound = self._bound
        if n == 1:
            if bound is not None:
                _say(f"{name}: stopping the agents and writing the results (exit 130)")
                bound.request_stop(self.reason)
            return
        if n == 2:
            _say(
                f"{name} again: finishing the run directory ({self.phase}); send it once"
                " more to abandon it"
            )
            return
        if bound is not None:
            bound.abandon(self)  # kills the swarm, records "abandoned"; does not return
        _say(f"{name} a third time: abandoned")
        os._exit(EXIT_INTERRUPTED)


def _say(text: str) -> None:
    # os.write: a handler may run while sys.stderr is in the middle of a write
    try:
        os.write(sys.stderr.fileno(), f"\nswarmrig: {text}\n".encode())
    except (OSError, ValueError):
        pass


def abandon_run(coord: Any, interrupts: Interrupts) -> None:
    """The third signal: kill the swarm, record "abandoned" in run.json, exit 130 now.

    Runs inside the signal handler, so it touches only what a half-done write cannot
    have left inconsistent: run.json goes through a temporary file of its own, and every
    NAME.tmp a write of the main program was in the middle of is removed.
    """
    pgid = getattr(coord.fork, "pgid", None)
    if pgid:
        with contextlib.suppress(OSError):
            os.killpg(pgid, signal.SIGKILL)
    coord.run_json.update(
        exit="abandoned",
        exit_code=EXIT_INTERRUPTED,
        phase="abandoned",
        abandoned_while=interrupts.phase,
        interrupts=interrupts.records(),
        stopped_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    )
    with contextlib.suppress(Exception):
        coord.dir.write_json("run.json", coord.run_json, tmp_name="run.json.abandoned.tmp")
    coord.dir.remove_tmp()
    if coord.ipc_dir is not None:
        shutil.rmtree(coord.ipc_dir, ignore_errors=True)
    _say(
        f"{interrupts.received[-1]['signal']} a third time: abandoned while {interrupts.phase};"
        f" run.json says so. `swarmrig salvage {coord.dir.path}` finishes the directory from"
        " the telemetry on disk"
    )
    os._exit(EXIT_INTERRUPTED)
