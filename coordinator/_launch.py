"""Starting agents on this machine through the fork server (see node._forkserver)."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

__all__ = ["ForkServer"]


class ForkServer:
    """Client side of the fork server: spawn agents, learn of their exits, kill them all."""

    def __init__(self) -> None:
        env = dict(os.environ)
        for v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            env.setdefault(v, "1")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "node._forkserver"],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            env=env,
            bufsize=0,
        )
        assert self.proc.stdout is not None and self.proc.stdin is not None
        self._out = self.proc.stdout.fileno()
        os.set_blocking(self._out, False)
        self._buf = b""
        self._pending: list[dict[str, Any]] = []
        self.pgid: int | None = None
        self.alive: dict[int, int] = {}  # pid -> agent
        #: pid -> a pidfd of that very process (Linux), opened when the server reported it
        self._pidfds: dict[int, int] = {}
        deadline = time.monotonic() + 30.0
        while self.pgid is None:
            for ev in self.events(timeout=0.05):
                if ev["op"] == "group":
                    self.pgid = int(ev["pgid"])
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("the fork server did not start")

    @property
    def fileno(self) -> int:
        return self._out

    def spawn(
        self, agent: int, join: str, log: str, heartbeat: float, keys: str | None = None
    ) -> None:
        """Fork one agent; ``keys``: the key directory it reads its secret key from."""
        self._send(
            {
                "op": "spawn",
                "agent": agent,
                "join": join,
                "log": log,
                "heartbeat": heartbeat,
                "keys": keys,
            }
        )

    def kill(self, pid: int, sig: int = signal.SIGKILL, *, agent: int | None = None) -> bool:
        """Signal one of the server's own agents; False (nothing sent) unless ``pid`` is a
        live child it reported spawning for ``agent``.

        On Linux through a pidfd opened when the server reported the child (and checked to
        be the server's child then): it names that very process, so a pid reused by another
        process after the agent's end is never hit, and the signal is sent now (the
        coordinator owns the timing of process faults). Elsewhere the server signals it, and
        only a child it has not yet reaped."""
        if self.alive.get(pid) != agent or pid <= 1:
            return False
        fd = self._pidfds.get(pid)
        if fd is not None:
            with contextlib.suppress(ProcessLookupError):
                signal.pidfd_send_signal(fd, sig)
        else:
            self._send({"op": "kill", "pid": int(pid), "signal": int(sig)})
        return True

    def _pin(self, pid: int) -> None:
        """Hold a pidfd of a child the server just reported, if it is the server's child."""
        try:
            fd = os.pidfd_open(pid)
        except (AttributeError, OSError):  # no pidfds here, or it is gone already
            return
        try:
            stat = Path(f"/proc/{pid}/stat").read_text()
            ppid = int(stat.rsplit(")", 1)[1].split()[1])
        except (OSError, ValueError, IndexError):
            ppid = -1
        if ppid != self.proc.pid:
            os.close(fd)
            return
        self._pidfds[pid] = fd

    def _unpin(self, pid: int) -> None:
        fd = self._pidfds.pop(pid, None)
        if fd is not None:
            os.close(fd)

    def lost(self) -> str | None:
        """Why the run cannot go on, if the server died (its agents died with it)."""
        if self.proc.poll() is None:
            return None
        return f"the fork server died (exit status {self.proc.returncode}); its agents died with it"

    def _send(self, obj: dict[str, Any]) -> None:
        assert self.proc.stdin is not None
        self.proc.stdin.write((json.dumps(obj) + "\n").encode())

    def events(self, timeout: float = 0.0) -> list[dict[str, Any]]:
        import select

        out = []
        if self._pending:
            out, self._pending = self._pending, []
        r, _, _ = select.select([self._out], [], [], timeout)
        if r:
            with contextlib.suppress(BlockingIOError):
                chunk = os.read(self._out, 1 << 16)
                self._buf += chunk
        while b"\n" in self._buf:
            line, self._buf = self._buf.split(b"\n", 1)
            ev = json.loads(line)
            if ev["op"] == "spawned":
                self.alive[int(ev["pid"])] = int(ev["agent"])
                self._pin(int(ev["pid"]))
            elif ev["op"] == "exited":
                ev["agent"] = self.alive.pop(int(ev["pid"]), None)
                self._unpin(int(ev["pid"]))
            out.append(ev)
        return out

    def wait_spawned(self, count: int, timeout: float) -> list[dict[str, Any]]:
        """Collect ``count`` spawned notices (other events are kept for later)."""
        got: list[dict[str, Any]] = []
        deadline = time.monotonic() + timeout
        while len(got) < count and time.monotonic() < deadline:
            for ev in self.events(timeout=0.02):
                if ev["op"] == "spawned":
                    got.append(ev)
                else:
                    self._pending.append(ev)
        return got

    def shutdown(self, grace: float = 2.0) -> None:
        """Close stdin (the server kills every child), then kill the whole group anyway."""
        with contextlib.suppress(Exception):
            assert self.proc.stdin is not None
            self.proc.stdin.close()
        try:
            self.proc.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            self.proc.kill()
        if self.pgid is not None:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(self.pgid, signal.SIGKILL)
        with contextlib.suppress(Exception):
            self.proc.wait(timeout=grace)
        if self.proc.stdout is not None:
            self.proc.stdout.close()
        for pid in list(self._pidfds):
            self._unpin(pid)
