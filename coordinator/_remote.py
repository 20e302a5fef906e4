"""Starting agents on other machines: one ssh session per host, a fork server at its end.

Each host of the inventory gets one session of the system OpenSSH client running
``PYTHON -m node._forkserver --idle-timeout S`` on that machine, and the session's stdin and
stdout carry the fork server's line protocol (node._forkserver), exactly as the local fork
server's pipes do. The coordinator then spawns, signals (crash and pause faults) and
restarts remote agents the way it does local ones, and learns of their exits.

Why nothing is left on a host when the coordinator goes:

* the coordinator ends normally or on Ctrl-C: agents are told to stop, then stdin is closed;
  the remote server kills every agent it forked and exits, and the session ends;
* the coordinator dies (SIGKILL): its end of the pipe closes, ssh passes the end of input
  on, and the same happens; the agents also exit by themselves once the coordinator's
  heartbeat stops (``--heartbeat-timeout``);
* the connection hangs (the coordinator's machine froze or left the network): the server
  hears no beat for ``idle_timeout`` seconds, kills its agents and exits.

The ssh clients run in a session of their own, so a Ctrl-C in the terminal reaches only the
coordinator, which then stops the agents in order instead of having their sessions cut.
"""

from __future__ import annotations

import contextlib
import json
import os
import select
import shlex
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from coordinator._inventory import Host, Inventory
from topologies._errors import SwarmrigError

__all__ = ["RemoteLauncher", "RemoteStartError", "ssh_command"]

#: our defaults come after the inventory's options, and ssh keeps the first value it reads
SSH_DEFAULTS = ("-T", "-o", "BatchMode=yes", "-o", "ConnectTimeout=15")
#: the coordinator beats its hosts this often (seconds)
BEAT_S = 0.5
#: a line longer than this from a host is cut (the server sends far shorter ones)
MAX_LINE = 1 << 16
#: the last lines of a host's ssh error output kept for the failure message
STDERR_TAIL = 20


class RemoteStartError(SwarmrigError):
    """A host could not be started (ssh failed, no interpreter, wrong swarmrig there)."""


def ssh_command(host: Host, idle_timeout: float) -> list[str]:
    """The ssh command line that starts the fork server on ``host``."""
    # One BLAS thread per agent, as for local agents (coordinator._launch).
    remote = (
        "exec env OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 "
        f"{shlex.quote(host.python)} -m node._forkserver --idle-timeout {idle_timeout:g}"
    )
    return ["ssh", *host.ssh_options, *SSH_DEFAULTS, "--", host.ssh, remote]


@dataclass(slots=True)
class _Session:
    host: Host
    proc: subprocess.Popen
    out: bytes = b""
    err: bytes = b""
    err_tail: list[str] = field(default_factory=list)
    pid: int | None = None  # the remote server's pid, once it said hello
    pgid: int | None = None
    version: str | None = None
    closed: bool = False
    last_beat: float = 0.0


class RemoteLauncher:
    """The hosts of an inventory, seen by the coordinator as one fork server.

    Same interface as coordinator._launch.ForkServer: ``spawn``, ``kill``, ``events``,
    ``alive``, ``lost``, ``shutdown``. Output lines of remote agents are appended to the log
    path given at spawn and echoed as ``HOST agent ID: line``.
    """

    pgid = None  # no process group on this machine

    def __init__(
        self,
        inventory: Inventory,
        idle_timeout: float,
        *,
        version: str,
        echo: Callable[[str], None] | None = None,
        start_timeout: float = 60.0,
    ) -> None:
        self.inventory = inventory
        self.echo = echo or (lambda line: print(line, file=sys.stderr, flush=True))
        self.idle_timeout = idle_timeout
        self.alive: dict[tuple[str, int], int] = {}  # (host, pid) -> agent, while it lives
        self._owner: dict[tuple[str, int], int] = {}  # (host, pid) -> agent, ever spawned
        self.logs: dict[int, Path] = {}  # agent -> local log file
        self._pending: list[dict[str, Any]] = []
        self._shutting_down = False
        self.sessions: dict[str, _Session] = {}
        try:
            for h in inventory.hosts:
                proc = subprocess.Popen(
                    ssh_command(h, idle_timeout),
                    stdin=subprocess.PIPE,
                    stdout=subprocess.PIPE,
                    stderr=subprocess.PIPE,
                    start_new_session=True,
                    bufsize=0,
                )
                for f in (proc.stdout, proc.stderr):
                    os.set_blocking(f.fileno(), False)  # type: ignore[union-attr]
                self.sessions[h.name] = _Session(h, proc)
            self._wait_hello(start_timeout, version)
        except BaseException:
            self.shutdown(grace=2.0)
            raise

    # -- start -------------------------------------------------------------------------
    def _wait_hello(self, timeout: float, version: str) -> None:
        deadline = time.monotonic() + timeout
        while any(s.pid is None for s in self.sessions.values()):
            self._pending.extend(self._read(0.05))
            for s in self.sessions.values():
                if s.pid is None and s.proc.poll() is not None:
                    raise RemoteStartError(self._describe_end(s, "did not start"))
                if s.version is not None and s.version != version:
                    raise RemoteStartError(
                        f"host {s.host.name} ({s.host.ssh}): swarmrig {s.version} there, "
                        f"{version} here; install the same version on every machine"
                    )
            if time.monotonic() > deadline:
                late = [s.host.name for s in self.sessions.values() if s.pid is None]
                raise RemoteStartError(
                    f"hosts {late} did not start their agent server within {timeout:.0f} s"
                )

    def _describe_end(self, s: _Session, what: str) -> str:
        code = s.proc.returncode
        why = "ssh could not connect or log in" if code == 255 else f"exit status {code}"
        tail = "; ".join(s.err_tail[-5:]) or "no error output"
        return (
            f"host {s.host.name} ({s.host.ssh}): the agent server {what} ({why}): {tail}; "
            f"command: {shlex.join(ssh_command(s.host, self.idle_timeout))}"
        )

    # -- the fork-server interface ---------------------------------------------------------
    def spawn(
        self, agent: int, join: str, log: str, heartbeat: float, keys: str | None = None
    ) -> None:
        """Fork agent ``agent`` on its host; it joins the inventory's coordinator endpoint
        (``join`` is the local bind address and is not used). ``keys`` (the coordinator's
        key directory) only says that the run is keyed: the agent reads its secret key from
        its host's own key directory (the inventory's ``keys``), where its server runs."""
        self.logs[agent] = Path(log)
        host = self.inventory.host_of(agent)
        if keys is not None and host.keys is None:
            raise RemoteStartError(f"host {host.name}: the run has keys, the host none")
        self._send(
            self.sessions[host.name],
            {
                "op": "spawn",
                "agent": agent,
                "join": self.inventory.coordinator,
                "log": None,
                "heartbeat": heartbeat,
                "keys": None if keys is None else host.keys,
            },
        )

    def kill(self, pid: int, sig: int = signal.SIGKILL, *, agent: int | None = None) -> bool:
        """Signal a remote agent on its own host: only a pid that host's server reported
        spawning for ``agent`` and that still lives (the server checks its children again).
        False when nothing was sent."""
        if agent is None:
            return False
        host = self.inventory.host_of(agent).name
        if self.alive.get((host, int(pid))) != agent:
            return False
        self._send(self.sessions[host], {"op": "kill", "pid": int(pid), "signal": int(sig)})
        return True

    def events(self, timeout: float = 0.0) -> list[dict[str, Any]]:
        now = time.monotonic()
        for s in self.sessions.values():
            if now - s.last_beat >= BEAT_S:
                self._send(s, {"op": "beat"})
        out, self._pending = self._pending, []
        return out + self._read(timeout if not out else 0.0)

    def lost(self) -> str | None:
        """Why the run cannot go on (a host's session ended while it should not)."""
        if self._shutting_down:
            return None
        for s in self.sessions.values():
            if s.proc.poll() is not None:
                s.closed = True
                return self._describe_end(s, "ended during the run")
        return None

    def hosts_json(self) -> list[dict[str, Any]]:
        """What run.json records of the hosts."""
        return [
            {
                "name": s.host.name,
                "ssh": s.host.ssh,
                "agents": list(s.host.agents),
                "python": s.host.python,
                "keys": s.host.keys,
                "server_pid": s.pid,
                "server_pgid": s.pgid,
            }
            for s in self.sessions.values()
        ]

    def shutdown(self, grace: float = 5.0) -> None:
        """Close every session's stdin (its server kills its agents), wait, then end ssh."""
        self._shutting_down = True
        for s in self.sessions.values():
            with contextlib.suppress(Exception):
                s.proc.stdin.close()  # type: ignore[union-attr]
        deadline = time.monotonic() + grace
        for s in self.sessions.values():
            with contextlib.suppress(subprocess.TimeoutExpired):
                s.proc.wait(timeout=max(0.0, deadline - time.monotonic()))
        with contextlib.suppress(Exception):
            self._read(0.0)  # the last exits and output lines
        for s in self.sessions.values():
            if s.proc.poll() is None:
                with contextlib.suppress(ProcessLookupError):
                    s.proc.kill()
                with contextlib.suppress(Exception):
                    s.proc.wait(timeout=grace)
            for f in (s.proc.stdout, s.proc.stderr):
                with contextlib.suppress(Exception):
                    f.close()  # type: ignore[union-attr]

    # -- plumbing ----------------------------------------------------------------------
    def _send(self, s: _Session, obj: dict[str, Any]) -> None:
        s.last_beat = time.monotonic()
        if s.closed:
            return
        try:
            s.proc.stdin.write((json.dumps(obj) + "\n").encode())  # type: ignore[union-attr]
        except (BrokenPipeError, ValueError, OSError):
            s.closed = True

    def _read(self, timeout: float) -> list[dict[str, Any]]:
        fds: dict[int, tuple[_Session, bool]] = {}
        for s in self.sessions.values():
            for f, is_err in ((s.proc.stdout, False), (s.proc.stderr, True)):
                if f is not None and not f.closed:
                    fds[f.fileno()] = (s, is_err)
        if not fds:
            return []
        ready, _, _ = select.select(list(fds), [], [], timeout)
        events: list[dict[str, Any]] = []
        for fd in ready:
            s, is_err = fds[fd]
            try:
                chunk = os.read(fd, 1 << 16)
            except BlockingIOError:
                continue
            if is_err:
                s.err = self._lines(s.err + chunk, lambda ln, s=s: self._stderr_line(s, ln))
            else:
                s.out = self._lines(s.out + chunk, lambda ln, s=s: self._line(s, ln, events))
        return events

    @staticmethod
    def _lines(buf: bytes, handle: Callable[[str], None]) -> bytes:
        *whole, rest = buf.split(b"\n")
        if len(rest) > MAX_LINE:
            whole, rest = [*whole, rest[:MAX_LINE]], b""
        for raw in whole:
            handle(raw.decode(errors="replace")[:MAX_LINE])
        return rest

    def _stderr_line(self, s: _Session, line: str) -> None:
        s.err_tail = [*s.err_tail[-(STDERR_TAIL - 1) :], line]
        self.echo(f"{s.host.name}: {line}")

    def _line(self, s: _Session, line: str, events: list[dict[str, Any]]) -> None:
        """One line from a host's server; anything that is not the protocol is shown."""
        try:
            ev = json.loads(line)
            op = ev["op"]
        except (ValueError, KeyError, TypeError):
            self._stderr_line(s, line)
            return
        try:
            if op == "group":
                s.pid, s.pgid = int(ev["pid"]), int(ev["pgid"])
                s.version = str(ev.get("version"))
            elif op == "spawned":
                agent, pid = int(ev["agent"]), int(ev["pid"])
                if agent in s.host.agents:
                    self.alive[(s.host.name, pid)] = agent
                    self._owner[(s.host.name, pid)] = agent
                    events.append({"op": "spawned", "agent": agent, "pid": pid})
            elif op == "exited":
                pid = int(ev["pid"])
                agent = self.alive.pop((s.host.name, pid), None)
                events.append(
                    {"op": "exited", "pid": pid, "status": int(ev["status"]), "agent": agent}
                )
            elif op == "log":
                agent = self._owner.get((s.host.name, int(ev["pid"])))
                self._agent_line(s, agent, str(ev["line"]))
        except (KeyError, TypeError, ValueError):
            self._stderr_line(s, f"(malformed message from the agent server: {line[:200]})")

    def _agent_line(self, s: _Session, agent: int | None, line: str) -> None:
        who = "agent ?" if agent is None else f"agent {agent}"
        self.echo(f"{s.host.name} {who}: {line}")
        path = self.logs.get(agent) if agent is not None else None
        if path is not None:
            with contextlib.suppress(OSError), open(path, "a") as f:
                f.write(line + "\n")
