"""Process faults (crash, restart, pause, slow): whom the coordinator may signal, and how.

Nothing from the network is trusted, and a process id in an agent's hello is only a claim.
The coordinator therefore signals only processes that its own fork server started (this
host's, coordinator._launch, or a host's server over ssh, coordinator._remote): their pids
come from the servers' ``spawned`` replies, and the server itself signals only children it
has not yet reaped (node._forkserver). Three cases:

* **ours**: the fork server started this agent and the hello's pid agrees with the server's
  record: crash is SIGKILL, pause SIGSTOP/SIGCONT, sent to that very process (a pidfd held
  since the server reported it, coordinator._launch) or by the host's server;
* **joined by itself** (``--no-launch``: agents started by hand, on this machine or another):
  nothing is signalled; the fault goes as a ``process`` control message that the agent
  carries out on its own host (node._runtime: it kills itself, or closes its incarnation and
  joins again after ``restart_after_s``; it pauses itself until told to resume), and a
  ``signal-refused`` line in events.jsonl says so with the claimed id and pid;
* **anything else** (a launched run whose hello pid disagrees with the server's record, or
  no record at all): the fault is refused and logged as ``signal-refused``.

A hello claiming a pid <= 1 is refused outright (coordinator._run: ``kill(-1)`` or
``kill(0)`` would reach every process of the user or of the group).
"""

from __future__ import annotations

import signal
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from coordinator._run import Coordinator, _Agent

__all__ = ["crash", "pause", "rejoining", "restart", "signal_refusal", "slow"]

#: a self-restarting agent (--no-launch) that has not joined again this long after its
#: restart time is given up on (seconds, on top of the heartbeat timeout)
REJOIN_GRACE_S = 20.0


def signal_refusal(co: Coordinator, a: _Agent) -> str | None:
    """Why the coordinator may not signal agent ``a``'s process, or None when it may."""
    if co.fork is None:
        return "it was not started by this coordinator (it joined by itself)"
    if a.pid is None:
        return "its fork server reports no live process for it"
    if a.claimed_pid != a.pid:
        return f"its hello claimed pid {a.claimed_pid}; its fork server started pid {a.pid}"
    return None


def _decide(co: Coordinator, a: _Agent, fault: dict[str, Any], action: str) -> str:
    """ "signal", "directive" (the agent does it itself) or "refused" (logged here)."""
    why = signal_refusal(co, a)
    if why is None:
        return "signal"
    instead = "directive" if co.fork is None else "nothing"
    co.event(
        "signal-refused",
        fault=fault["index"],
        action=action,
        agent=a.id,
        epoch=a.epoch,
        claimed_pid=a.claimed_pid,
        host=a.host,
        reason=why,
        instead=instead,
    )
    return instead if instead == "directive" else "refused"


def _signal(co: Coordinator, a: _Agent, sig: int) -> None:
    assert co.fork is not None and a.pid is not None
    co.fork.kill(a.pid, sig, agent=a.id)


def crash(co: Coordinator, i: int, pf: dict[str, Any]) -> None:
    a = co.agents[i]
    if a.dead or a.ident is None:
        return
    how = _decide(co, a, pf, "crash")
    if how == "refused":
        return
    after = pf["params"].get("restart_after_s")
    a.crashed_on_purpose = True
    a.restart_state = pf["params"].get("restart_state", "initial")
    if how == "signal":
        _signal(co, a, signal.SIGKILL)
        co.event("crash", fault=pf["index"], agent=i, epoch=a.epoch, pid=a.pid, signal="SIGKILL")
    else:
        co.send(
            a,
            "process",
            action="crash",
            factor=1.0,
            restart_after_s=None if after is None else float(after),
        )
        # No fork server tells of its end: the incarnation counts as gone from now on.
        a.dead = True
        co.event("crash", fault=pf["index"], agent=i, epoch=a.epoch, pid=None, directive=True)
    a.record.alive = False
    if after is None:
        return
    a.restart_pending = True
    if how == "signal":
        co.schedule(co.now_s() + float(after), "restart", lambda: restart(co, a, pf))
        return
    # The agent restarts itself: its restart is recorded when it joins again (rejoining),
    # and given up on if it never does.
    a.self_restart = pf
    epoch = a.epoch
    deadline = co.now_s() + float(after) + REJOIN_GRACE_S + co.opt.heartbeat_timeout
    co.schedule(deadline, "rejoin-deadline", lambda: _rejoin_deadline(co, a, epoch))


def restart(co: Coordinator, a: _Agent, pf: dict[str, Any]) -> None:
    """Start a crashed agent again through its fork server."""
    if co.fork is None or co.stop_requested:
        return
    co.event("restart", fault=pf["index"], agent=a.id, previous_epoch=a.epoch)
    a.endpoint = None
    a.pid = None  # the fork server's spawned reply names the new process
    co.spawn(a)


def rejoining(co: Coordinator, a: _Agent) -> None:
    """A hello of an agent that restarts itself (told to crash with restart_after_s):
    its restart, recorded now that it happens."""
    pf, a.self_restart = a.self_restart, None
    if pf is not None:
        co.event("restart", fault=pf["index"], agent=a.id, previous_epoch=a.epoch)
        a.endpoint = None


def _rejoin_deadline(co: Coordinator, a: _Agent, epoch: int) -> None:
    if a.restart_pending and a.epoch == epoch:
        a.restart_pending = False
        a.self_restart = None
        co.event("rejoin-missed", agent=a.id, epoch=epoch)


def pause(co: Coordinator, i: int, pf: dict[str, Any], stop: bool) -> None:
    a = co.agents[i]
    if a.dead or a.ident is None:
        return
    name = "pause" if stop else "resume"
    how = _decide(co, a, pf, name)
    if how == "refused":
        return
    if how == "signal":
        sig = signal.SIGSTOP if stop else signal.SIGCONT
        _signal(co, a, sig)
        co.event(name, fault=pf["index"], agent=i, pid=a.pid, signal=signal.Signals(sig).name)
    else:
        co.send(a, "process", action=name, factor=1.0, restart_after_s=None)
        co.event(name, fault=pf["index"], agent=i, pid=None, directive=True)


def slow(co: Coordinator, i: int, pf: dict[str, Any], factor: float) -> None:
    """A slowdown is the agent's own doing in every case (its period, multiplied)."""
    a = co.agents[i]
    co.send(a, "process", action="slow", factor=factor, restart_after_s=None)
    co.event("slow", fault=pf["index"], agent=i, factor=factor)
