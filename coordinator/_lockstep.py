"""The lockstep engine: a rounds-mode run inside one process, on a virtual clock.

It runs the very same agent core as the multi-process rounds mode, so that a lockstep run
and a multi-process run with one seed end in the same state for every agent (bitwise where
no time window is involved) and write the same run directory, only much faster:

* each agent gets ``Swarm.plan(agent, 0)`` through the control codec and builds from it what
  :meth:`node._runtime.Node.setup` builds (``spec_from_plan``, the registered algorithm, a
  :class:`~node._receiver.Receiver` with the plan's link faults), minus the sockets;
* round k, in the order of :meth:`node._runtime.Node.rounds`: every agent publishes its
  payload for iteration k with ``Node.publish`` itself (the same frame encoder, epoch 0, seq
  counting from 0 per agent, send time = now), into a stand-in for its PUB socket that hands
  the frame to each out-neighbour's ``Receiver.on_frame(frame, now)``, whose link models make
  the same pure decisions as in an agent process; then each agent, in id order, does
  ``rx.release(float(k), now)`` and ``algorithm.step(state, rx.inbox(), k)``, checks
  divergence (``Node.check_state``) and samples as ``Node`` does. Every frame of round k
  reaches its receivers before any of them steps, which is what the barrier of a real
  rounds run guarantees (frames of later rounds are held there by their release key);
* telemetry, final reports, fault directives and their acknowledgements go through the
  control codec into the unchanged :class:`~coordinator._run.Coordinator` handlers, so
  metrics.csv, links.csv and summary.json come out of the same code as for a real run.

Virtual time: round k happens at ``now = k * period_s`` (``[timing].period_ms``), from 0.
Sample times, events, ``time_to_tolerance_s`` and time windows of faults all count on that
clock, which makes time-windowed faults deterministic here. A multi-process rounds run goes
as fast as its sockets allow and tests time windows against real seconds, so only faults
without a time window (or with an iteration window) repeat exactly across the two engines.
A delay still counts in whole rounds (``int(delay_s / period_s)``), as in an agent process.
A ``seconds`` budget runs the rounds with ``k * period_s < seconds``. ``wall_s``,
``startup_s``, ``run_s`` and ``iterations_per_s`` stay real (this process's own speed).

What it cannot model is refused before anything is written (:func:`check_lockstep`): async
mode and process faults (crash, pause, slow).
"""

from __future__ import annotations

import dataclasses
import getpass
import math
import os
import socket
import time
from collections.abc import Callable, Mapping
from typing import Any

from coordinator._metrics import AgentRecord
from coordinator._run import (
    Coordinator,
    RunFailed,
    RunOptions,
    RunResult,
    _Agent,
    _Stop,
    run_versions,
)
from coordinator._swarm import LINK_FAULTS, PROCESS_FAULTS, Swarm
from node._lifecycle import Phase
from node._runtime import Node, _Diverged
from node._wire import encode_control
from topologies._errors import ScenarioError

__all__ = ["ROUNDS_PER_FLUSH", "LockstepCoordinator", "check_lockstep", "execute_lockstep"]

#: telemetry is flushed, and the live view called, every this many rounds
ROUNDS_PER_FLUSH = 200


def check_lockstep(swarm: Swarm) -> None:
    """Raise ScenarioError, naming the key, if the lockstep engine cannot run ``swarm``.

    It runs rounds mode with link faults of every kind; async mode and process faults
    (crash, pause, slow) need real processes.
    """
    s = swarm.scenario
    if s.mode != "rounds":
        raise ScenarioError(
            f"{s.source}: [swarm].mode: the lockstep engine runs rounds mode only, got"
            f' {s.mode!r}; run it with the "processes" engine'
        )
    for f in s.faults:
        if f["kind"] in PROCESS_FAULTS:
            raise ScenarioError(
                f"{s.source}: [[fault]] #{f['index']}: kind: {f['kind']!r} is a process fault, which"
                f" the lockstep engine cannot model; expected a link fault"
                f' ({", ".join(sorted(LINK_FAULTS))}) or the "processes" engine'
            )


def _round_limit(iterations: int | None, seconds: float | None, period_s: float) -> int:
    """Rounds to run: the iteration budget, or the rounds k with k * period_s < seconds."""
    limits = []
    if iterations is not None:
        limits.append(int(iterations))
    if seconds is not None:
        limits.append(max(0, math.ceil(float(seconds) / period_s)))
        # ceil of a rounded quotient can be one off; settle on the definition itself
        while limits[-1] > 0 and (limits[-1] - 1) * period_s >= seconds:
            limits[-1] -= 1
        while limits[-1] * period_s < seconds:
            limits[-1] += 1
    if not limits:
        raise RunFailed("the scenario gives neither [swarm].iterations nor [swarm].seconds")
    return min(limits)


def write_virtual_run_json(coord: Coordinator, engine: str) -> None:
    """The first run.json of an engine that runs the swarm in this process on virtual time."""
    coord.write_run_json(
        engine=engine,
        clock="virtual: round k at k * period_ms, from 0",
        versions=run_versions(),
        coordinator={
            "host": socket.gethostname(),
            "pid": os.getpid(),
            "user": getpass.getuser(),
            "endpoint": None,
        },
        label=coord.opt.label,
        started_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        stopped_utc=None,
        exit="starting",
        process_group=None,
    )


class _Member(Node):
    """One agent of a lockstep run: the node core without sockets.

    ``Node``'s own ``handle_ctl``, ``apply_directive``, ``initial``, ``sample``,
    ``counters``, ``flush``, ``finish`` and ``check_state`` run unchanged; the control
    channel is a call into the coordinator (``deliver``) and the clock is the run's virtual
    clock.
    """

    def __init__(self, agent: int, deliver: Callable[[int, bytes], None], clock: Any) -> None:
        # Not Node.__init__: it opens a ZeroMQ context and a control socket.
        self.init_fields("lockstep", agent, math.inf, clock)
        self.ctx = self.ctl = None  # type: ignore[assignment]
        self._deliver = deliver
        #: the run is over for this agent (final report sent, or failed)
        self.done = False
        self.failed = False
        self.state: Any = None
        self.out: dict[str, Any] = {}
        self._next_sample = 0.0

    def setup(self, plan: Mapping[str, Any]) -> None:
        """What Node.setup builds from a plan, without the data sockets."""
        self.configure(plan)

    def send_ctl(self, kind: str, **fields: Any) -> bool:
        self._deliver(self.agent, encode_control(kind, **fields))
        return True


class _Fanout:
    """Stands in for an agent's PUB socket: hands each frame to every out-neighbour's
    receiver at once, at the current round's virtual time (no queue, so no transport loss)."""

    __slots__ = ("coord", "receivers")

    def __init__(self, coord: LockstepCoordinator, receivers: list[Callable[..., None]]) -> None:
        self.coord = coord
        self.receivers = receivers

    def send(self, frame: bytes, flags: int = 0) -> None:
        now = self.coord.vnow
        for on_frame in self.receivers:
            on_frame(frame, now)


class LockstepCoordinator(Coordinator):
    """The coordinator with its launch, handshake and run phase replaced by the in-process
    lockstep loop; results, run directory, view and signal handling are the base class's."""

    def __init__(self, swarm: Swarm, options: RunOptions) -> None:
        check_lockstep(swarm)
        if options.listen is not None or not options.launch_local:
            raise RunFailed(
                "RunOptions.listen / launch_local: the lockstep engine runs every agent inside"
                " this process; it cannot wait for agents on other machines"
            )
        # summary.json and the view name the engine that really ran
        super().__init__(swarm, dataclasses.replace(options, engine="lockstep"))
        self.period_s = float(self.s.timing["period_ms"]) / 1000.0
        self.members: list[_Member] = []
        self._idents: list[bytes] = []
        #: virtual time of the current round, seconds
        self.vnow = 0.0

    # -- virtual time ------------------------------------------------------------------
    def now_s(self) -> float:
        return self.vnow

    def event(self, name: str, /, **fields: Any) -> None:
        # Positional-only: the base class's fault-sent event passes a field named "kind".
        self.dir.event({"t_s": round(self.now_s(), 6), "event": name, **fields})

    def virtual_clock(self) -> float:
        """The agents' clock: the current round's virtual time."""
        return self.vnow

    # -- control channel, both ways, through the codec ---------------------------------
    def send(self, agent: _Agent, kind: str, **fields: Any) -> None:
        """Coordinator -> agent: the frame an agent process would receive, handled by the
        node's own ``handle_ctl``; plan and go are acted on as ``Node.handshake`` does."""
        if agent.id >= len(self.members):
            return
        m = self.members[agent.id]
        if m.done and kind != "stop":
            return
        msg = m.handle_ctl(encode_control(kind, **fields))
        if msg is None:
            return
        if msg["t"] == "plan":
            try:
                m.setup(msg["plan"])
            except Exception as exc:  # what Node.run reports when its set-up raises
                m.send_ctl("failed", error=f"agent {m.agent}: {type(exc).__name__}: {exc}")
                self._gone(m)
        elif msg["t"] == "peers":
            for key, entry in msg["peers"].items():
                m.rx.announce(int(key), int(entry[1]))
        elif msg["t"] == "go":
            m.start_node = float(msg["start_node"])
            m.rx.start = m.start_node
            m.iteration = int(msg["iteration"])

    def from_agent(self, agent: int, frame: bytes) -> None:
        """Agent -> coordinator: the base class's handler, on the agents' clock."""
        self.on_message(self._idents[agent], frame)

    def agent_time_origin(self, a: _Agent) -> float:
        # the agents' times are virtual and start at 0: there is no run start to subtract
        return 0.0

    # -- launch and handshake ----------------------------------------------------------
    def launch(self) -> None:
        write_virtual_run_json(self, "lockstep")

    def handshake(self) -> None:
        host = socket.gethostname()
        for a in self.agents:
            ident = f"lockstep-{a.id}".encode()
            self._idents.append(ident)
            self.by_ident[ident] = a.id
            a.ident, a.host, a.epoch, a.offset = ident, host, 0, 0.0
            a.records.append(AgentRecord(agent=a.id, epoch=0, offset=0.0))
            self.members.append(_Member(a.id, self.from_agent, self.virtual_clock))
        for a in self.agents:
            self.send(a, "plan", plan=self.swarm.plan(a.id, 0))
            # the epochs of its in-neighbours (no endpoints here): only these are accepted
            ins = self.swarm.topology.in_neighbours(a.id)
            self.send(a, "peers", peers={j: ["lockstep", 0] for j in ins})
            a.ready = True
        if self.failures:
            raise _Stop("an agent failed during start-up: " + self.failures[0], 3)

    # -- the run phase -----------------------------------------------------------------
    def run_phase(self) -> None:
        self.build_timeline()
        members = self.members
        self.vnow = 0.0
        self.t_go = self.clock()
        for a in self.agents:
            a.running = True
            self.send(a, "go", start_node=0.0, iteration=0)
        self.event("go", agents=self.n, lead_s=0.0, engine="lockstep")
        limit = _round_limit(self.s.iterations, self.s.seconds, self.period_s)
        for m in members:
            m.state, m.out = m.initial()
            m._next_sample = m.start_node
            m.sample(m.state, self.vnow)
        for m in members:
            m.pub = _Fanout(
                self, [members[j].rx.on_frame for j in self.swarm.topology.out_neighbours(m.agent)]
            )
        timeline = self.timeline
        period = self.period_s
        k = 0
        while k < limit:
            now = k * period
            self.vnow = now
            while timeline and timeline[0][0] <= now:
                _, _, _what, action = timeline.pop(0)
                action()
            for m in members:
                m.publish(m.out, k)
            bound = float(k)
            for m in members:
                self._step(m, k, bound, now)
            k += 1
            if k % ROUNDS_PER_FLUSH == 0:
                self._flush_and_view()
            self._check_round()
        self.vnow = k * period
        for m in members:
            m.finish(m.state, "budget")
            m.done = True
            if m.life.phase is Phase.RUNNING:
                m.life.finished()
        raise _Stop("budget", 0)

    def _step(self, m: _Member, k: int, bound: float, now: float) -> None:
        """One agent's half of round k, as in Node.rounds after its barrier."""
        if m.done:
            return
        try:
            m.rx.release(bound, now)
            m.state, m.out = m.algorithm.step(m.state, m.rx.inbox(), k)
            m.iteration = k + 1
            m.check_state(m.state)
        except _Diverged as d:
            m.flush()
            m.send_ctl(
                "failed",
                error=f"diverged: agent {m.agent} state left"
                f" the bounded region at iteration {d.iteration}",
            )
            self._gone(m)
            return
        except Exception as exc:  # what Node.run reports for an agent that raised
            m.send_ctl("failed", error=f"agent {m.agent}: {type(exc).__name__}: {exc}")
            self._gone(m)
            return
        if m._sample_due(now):
            m.sample(m.state, now)
            m._next_sample = now + m.every_s

    def _gone(self, m: _Member) -> None:
        """A failed agent's process would exit now: no final report will come."""
        m.done = m.failed = True
        m.life.fail()
        a = self.agents[m.agent]
        a.dead = True
        a.record.alive = False

    def _flush_and_view(self) -> None:
        for m in self.members:
            if not m.done:
                m.flush()
        self.show()

    def _check_round(self) -> None:
        """Between rounds: the base run phase's stop conditions, in its order."""
        if self.stop_requested:
            raise _Stop(self.stop_requested, 130)
        if self.first_diverged is not None:
            self.verdict = "diverged"
            raise _Stop(self.first_diverged, 0)
        if self.failures:
            raise _Stop("agent failure: " + self.failures[0], 3)

    def stop_all(self, reason: str) -> None:
        """Stop every agent still running; each sends its final report, as after a stop."""
        self.stop_requested = self.stop_requested or reason
        for a, m in zip(self.agents, self.members, strict=False):
            if m.failed:
                continue
            self.send(a, "stop", reason=reason)
            if not m.done and m.state is not None:
                m.finish(m.state, m.stop_reason or reason)
                m.done = True


def execute_lockstep(swarm: Swarm, options: RunOptions | None = None) -> RunResult:
    """Run ``swarm`` with the lockstep engine; the run directory is complete on return.

    Same run directory and RunResult as :func:`coordinator._run.execute`; run.json says
    ``engine: "lockstep"`` and names no agent pids and no process group. Raises
    ScenarioError (naming the key) for what lockstep cannot model, before writing anything.
    """
    return LockstepCoordinator(swarm, options or RunOptions()).execute()
