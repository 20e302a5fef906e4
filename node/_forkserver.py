"""A fork server: a fresh interpreter with numpy, zmq and msgpack imported, that forks agents.

Why: a fresh interpreter per agent costs about 80 ms of imports; a fork from this warm,
context-free parent costs a few ms, so a hundred agents are up in well under a second.
It never creates a ZeroMQ context itself (contexts must not cross a fork).

Protocol, one JSON object per line. Coordinator -> server on stdin:
``{"op": "spawn", "agent": 3, "join": "tcp://127.0.0.1:5000", "log": "/path", "heartbeat": 3.0}``
and ``{"op": "kill", "pid": 1234, "signal": 9}``. Server -> coordinator on stdout:
``{"op": "spawned", "agent": 3, "pid": 1234}``, ``{"op": "exited", "pid": 1234, "status": -9}``
(negative: killed by that signal). End of stdin: every child is killed and the server exits.

On another machine (started over ssh by coordinator._remote) two more rules hold: a spawn with
``"log": null`` sends the agent's output back as ``{"op": "log", "pid": 1234, "line": "..."}``
(bounded: ``LOG_LINES`` lines of at most ``LOG_LINE_CHARS`` characters per agent), and with
``--idle-timeout S`` the server kills every child and exits when nothing (the coordinator
sends ``{"op": "beat"}``) came on stdin for S seconds: the heartbeat rule for the host, which
holds even when the ssh connection hangs instead of closing.

The server puts itself and every agent into a process group of its own (reported as
``{"op": "group", "pgid": ...}`` first), so the whole swarm can be killed with one killpg,
and uses PR_SET_PDEATHSIG so that agents die with it and it dies with the coordinator.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import select
import signal
import sys
import time

import node._runtime as runtime

__all__ = ["LOG_LINES", "LOG_LINE_CHARS", "serve"]

#: at most this many lines of one agent's output are sent back, each cut to this length
LOG_LINES = 200
LOG_LINE_CHARS = 1000


def _write(out: int, obj: dict) -> None:
    data = (json.dumps(obj) + "\n").encode()
    while data:
        n = os.write(out, data)
        data = data[n:]


def _child(req: dict, logfd: int) -> None:
    code = 2
    try:
        # The server's pipes are fds 0 and 1 here: replace them with dup2 (closing them
        # first would hand their numbers to the log file).
        if logfd < 0:
            logfd = os.open(req["log"], os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        devnull = os.open(os.devnull, os.O_RDONLY)
        os.dup2(devnull, 0)
        os.dup2(logfd, 1)
        os.dup2(logfd, 2)
        os.close(logfd)
        os.close(devnull)
        sys.stdout = os.fdopen(1, "w", buffering=1)
        sys.stderr = os.fdopen(2, "w", buffering=1)
        signal.signal(signal.SIGCHLD, signal.SIG_DFL)
        runtime._set_parent_death_signal()
        code = runtime.main(
            req["join"],
            int(req["agent"]),
            float(req.get("heartbeat", 3.0)),
            keys=req.get("keys"),
        )
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 2
    except BaseException:
        import traceback

        traceback.print_exc()
        code = 2
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)


class _Output:
    """The streamed output of one agent (log null): whole lines, bounded."""

    def __init__(self, pid: int) -> None:
        self.pid, self.buf, self.lines = pid, b"", 0

    def feed(self, chunk: bytes, out: int, final: bool = False) -> None:
        self.buf += chunk
        *whole, self.buf = self.buf.split(b"\n")
        if final and self.buf:
            whole, self.buf = [*whole, self.buf], b""
        if len(self.buf) > LOG_LINE_CHARS:  # a line without end: send what fits
            whole, self.buf = [*whole, self.buf], b""
        for raw in whole:
            self.lines += 1
            if self.lines <= LOG_LINES:
                line = raw.decode(errors="replace")[:LOG_LINE_CHARS]
                _write(out, {"op": "log", "pid": self.pid, "line": line})
            elif self.lines == LOG_LINES + 1:
                _write(out, {"op": "log", "pid": self.pid, "line": "(further output dropped)"})


def serve(inp: int = 0, out: int = 1, idle_timeout: float | None = None) -> None:
    parent = os.getppid()
    runtime._set_parent_death_signal()
    if os.getppid() != parent:  # the coordinator died before we armed the signal
        os._exit(1)
    if os.getpgid(0) != os.getpid():  # over ssh we already lead a session (and a group)
        os.setpgid(0, 0)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    children: set[int] = set()
    outputs: dict[int, _Output] = {}  # read end of an agent's output pipe -> its output

    def _kill_all(*_: object) -> None:
        for pid in list(children):
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        os._exit(0)

    signal.signal(signal.SIGTERM, _kill_all)
    # Keep the collector away from the warm heap: children would otherwise copy every page
    # it touches (copy-on-write) and pay for traversing objects they never use.
    gc.collect()
    gc.freeze()
    _write(
        out, {"op": "group", "pgid": os.getpgid(0), "pid": os.getpid(), "version": runtime.VERSION}
    )
    buf = b""
    last_input = time.monotonic()
    while True:
        ready, _, _ = select.select([inp, *outputs], [], [], 0.02)
        for fd in ready:
            if fd in outputs:
                chunk = os.read(fd, 65536)
                outputs[fd].feed(chunk, out, final=not chunk)
                if not chunk:
                    os.close(fd)
                    del outputs[fd]
        while True:  # reap
            try:
                pid, status = os.waitpid(-1, os.WNOHANG)
            except ChildProcessError:
                break
            if pid == 0:
                break
            children.discard(pid)
            code = -os.WTERMSIG(status) if os.WIFSIGNALED(status) else os.WEXITSTATUS(status)
            _write(out, {"op": "exited", "pid": pid, "status": code})
        if inp not in ready:
            if idle_timeout is not None and time.monotonic() - last_input > idle_timeout:
                print(
                    f"swarmrig host: no word from the coordinator for {idle_timeout:.1f} s; "
                    "stopping every agent here",
                    file=sys.stderr,
                    flush=True,
                )
                _kill_all()
            continue
        last_input = time.monotonic()
        chunk = os.read(inp, 65536)
        if not chunk:
            _kill_all()
        buf += chunk
        while b"\n" in buf:
            line, buf = buf.split(b"\n", 1)
            req = json.loads(line)
            if req["op"] == "spawn":
                logfd = -1
                if req.get("log") is None:
                    rfd, logfd = os.pipe()
                pid = os.fork()
                if pid == 0:
                    _child(req, logfd)
                children.add(pid)
                if logfd >= 0:
                    os.close(logfd)
                    outputs[rfd] = _Output(pid)
                _write(out, {"op": "spawned", "agent": req["agent"], "pid": pid})
            elif req["op"] == "kill" and int(req["pid"]) in children:  # only our own
                try:
                    os.kill(int(req["pid"]), int(req["signal"]))
                except ProcessLookupError:
                    pass


def _main() -> None:
    p = argparse.ArgumentParser(prog="python -m node._forkserver")
    p.add_argument("--idle-timeout", type=float, default=None)
    serve(idle_timeout=p.parse_args().idle_timeout)


if __name__ == "__main__":
    _main()
