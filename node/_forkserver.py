"""A fork server: a fresh interpreter with numpy, zmq and msgpack imported, that forks agents.

Why: a fresh interpreter per agent costs about 80 ms of imports; a fork from this warm,
context-free parent costs a few ms, so a hundred agents are up in well under a second.
It never creates a ZeroMQ context itself (contexts must not cross a fork).

Protocol, one JSON object per line. Coordinator -> server on stdin:
``{"op": "spawn", "agent": 3, "join": "tcp://127.0.0.1:5000", "log": "/path", "heartbeat": 3.0}``
and ``{"op": "kill", "pid": 1234, "signal": 9}``. Server -> coordinator on stdout:
``{"op": "spawned", "agent": 3, "pid": 1234}``, ``{"op": "exited", "pid": 1234, "status": -9}``
(negative: killed by that signal). End of stdin: every child is killed and the server exits.

The server puts itself and every agent into a process group of its own (reported as
``{"op": "group", "pgid": ...}`` first), so the whole swarm can be killed with one killpg,
and uses PR_SET_PDEATHSIG so that agents die with it and it dies with the coordinator.
"""

from __future__ import annotations

import gc
import json
import os
import select
import signal
import sys

import node._runtime as runtime

__all__ = ["serve"]


def _write(out: int, obj: dict) -> None:
    data = (json.dumps(obj) + "\n").encode()
    while data:
        n = os.write(out, data)
        data = data[n:]


def _child(req: dict, fds: tuple[int, int]) -> None:
    code = 2
    try:
        # The server's pipes are fds 0 and 1 here: replace them with dup2 (closing them
        # first would hand their numbers to the log file).
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
        code = runtime.main(req["join"], int(req["agent"]), float(req.get("heartbeat", 3.0)))
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


def serve(inp: int = 0, out: int = 1) -> None:
    parent = os.getppid()
    runtime._set_parent_death_signal()
    if os.getppid() != parent:  # the coordinator died before we armed the signal
        os._exit(1)
    os.setpgid(0, 0)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    children: set[int] = set()

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
    _write(out, {"op": "group", "pgid": os.getpgid(0), "pid": os.getpid()})
    buf = b""
    while True:
        ready, _, _ = select.select([inp], [], [], 0.02)
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
        if not ready:
            continue
        chunk = os.read(inp, 65536)
        if not chunk:
            _kill_all()
        buf += chunk
        while b"\n" in buf:
            line, buf = buf.split(b"\n", 1)
            req = json.loads(line)
            if req["op"] == "spawn":
                pid = os.fork()
                if pid == 0:
                    _child(req, (inp, out))
                children.add(pid)
                _write(out, {"op": "spawned", "agent": req["agent"], "pid": pid})
            elif req["op"] == "kill":
                try:
                    os.kill(int(req["pid"]), int(req["signal"]))
                except ProcessLookupError:
                    pass


if __name__ == "__main__":
    serve()
