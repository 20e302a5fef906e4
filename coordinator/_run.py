"""One run: launch, handshake, start barrier, fault timeline, telemetry, stop, results.

The coordinator never sits on the data path: agents talk to their neighbours directly and
only report to the coordinator in telemetry batches.
"""

from __future__ import annotations

import contextlib
import dataclasses
import getpass
import os
import platform
import shutil
import socket
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from coordinator import _process_faults as process_faults
from coordinator._capacity import check_capacity, default_heartbeat_timeout, wave_size
from coordinator._inbox import CONTROL_RCVHWM, RefusalLog, take_turn
from coordinator._interrupts import EXIT_INTERRUPTED, Interrupts, abandon_run
from coordinator._ipc_dirs import make_ipc_dir, remove_stale_ipc_dirs
from coordinator._launch import ForkServer
from coordinator._metrics import (
    AgentRecord,
    final_states,
    final_states_json,
    link_accounting,
    metric_series,
    refused_frames_event,
)
from coordinator._results import GapFunction, fault_windows, target_spread, verdict_figures
from coordinator._rundir import (
    EXIT_WRITE_FAILED,
    LINK_COLUMNS,
    METRIC_COLUMNS,
    RunDir,
    RunDirError,
    prepare_out,
)
from coordinator._samples import SampleTail, full_records
from coordinator._snapshot import take_snapshot
from coordinator._swarm import Swarm, with_transport
from coordinator._window_events import WindowEvents
from node._errors import EXIT_COORDINATOR_SILENT, WireError
from node._security import (
    CONTROL_DOMAIN,
    Gatekeeper,
    curve_server,
    fingerprint,
    load_agent_keys,
    load_coordinator_keys,
    plan_keys,
)
from node._wire import MAX_CONTROL_FRAME, PROTOCOL, decode_control, encode_control
from topologies._errors import SwarmrigError

__all__ = ["RunFailed", "RunOptions", "RunResult", "execute"]

VERSION = "0.1.0"
HEARTBEAT_S = 0.5
#: start-up with no agent joining, binding or getting ready for this long (plus
#: HANDSHAKE_STALL_PER_AGENT_S per agent) has stalled
HANDSHAKE_STALL_S = 20.0
HANDSHAKE_STALL_PER_AGENT_S = 0.1
#: clock pings per agent incarnation during the handshake (the least round trip wins)
PINGS = 20
#: refused peers written to events.jsonl one by one; beyond this they are only counted
REFUSAL_EVENTS = 1000


def run_versions() -> dict[str, str]:
    """What run.json records of the software that ran."""
    return {
        "swarmrig": VERSION,
        "python": platform.python_version(),
        "pyzmq": zmq.__version__,
        "libzmq": zmq.zmq_version(),
        "numpy": np.__version__,
    }


class RunFailed(SwarmrigError):
    """The run could not proceed (agents never ready, coordinator interrupted early)."""


@dataclass(slots=True, kw_only=True)
class RunOptions:
    #: the run directory itself; default runs/<name>-<UTC timestamp>
    out: Path | None = None
    runs_root: Path = Path("runs")
    #: None (nothing shown) or a callable given a frozen coordinator._snapshot.Snapshot a
    #: few times a second, and the last one (after the results) through its ``final``
    #: method if it has one (coordinator._view.LiveView renders the live view)
    view: Any = None
    #: control endpoint to bind; tcp://127.0.0.1:* by default
    listen: str | None = None
    #: fork the agents here; False waits for agents started by hand (other machines)
    launch_local: bool = True
    #: seconds without a word from the coordinator before an agent exits by itself; None:
    #: coordinator._capacity.default_heartbeat_timeout (3 s, more for large swarms)
    heartbeat_timeout: float | None = None
    #: seconds to wait until every agent is ready; None: 20 s + 0.2 s per agent
    handshake_timeout: float | None = None
    #: None, or called during the handshake as on_join(endpoint, joined, expected) (the
    #: command line shows "joined k of n" with it while agents started by hand come in)
    on_join: Any = None
    #: label written to run.json and summary.json (e.g. "baseline")
    label: str | None = None
    #: "processes" (one OS process per agent), "lockstep" (rounds mode in this process) or
    #: "batch" (rounds mode as arrays, coordinator._batch)
    engine: str = "processes"
    #: a coordinator._inventory.Inventory: start the agents on its hosts over ssh
    inventory: Any = None
    #: key directory (swarmrig keys make): CURVE + allow-lists on every channel
    keys: Path | None = None
    #: None: write into ``out`` as it is; False: refuse a non-empty ``out``; True: clear an
    #: earlier run there first (the command line's --replace)
    replace: bool | None = None


@dataclass(slots=True)
class RunResult:
    summary: dict[str, Any]
    metrics: list[dict[str, Any]]
    links: list[dict[str, Any]]
    run_dir: Path
    exit_code: int


@dataclass(slots=True)
class _Agent:
    """The coordinator's view of one agent id across its incarnations."""

    id: int
    epoch: int = -1
    ident: bytes | None = None
    #: the process its fork server started (from the server's reply, never from the network)
    pid: int | None = None
    #: the pid its latest hello claimed (only compared with ``pid``, never signalled)
    claimed_pid: int | None = None
    host: str | None = None
    endpoint: str | None = None
    ready: bool = False
    running: bool = False
    finished: bool = False
    dead: bool = False
    #: a crash fault killed it on purpose; a restart may follow
    crashed_on_purpose: bool = False
    restart_pending: bool = False
    #: the crash fault of an agent that restarts itself (joined by itself), until it does
    self_restart: dict[str, Any] | None = None
    restart_state: str = "initial"
    start_iteration: int = 0
    ready_at: float = 0.0
    #: (sender, epoch) pairs this agent reported hearing after a peer restarted
    heard: set[tuple[int, int]] = field(default_factory=set)
    pings: dict[int, float] = field(default_factory=dict)
    rtt_best: float = float("inf")
    offset: float = 0.0
    records: list[AgentRecord] = field(default_factory=list)

    @property
    def record(self) -> AgentRecord:
        return self.records[-1]


class _Stop(Exception):
    def __init__(self, reason: str, code: int) -> None:
        self.reason, self.code = reason, code


class Coordinator:
    def __init__(self, swarm: Swarm, options: RunOptions) -> None:
        self.swarm = swarm
        #: the run's one gap function: summary, metrics and live view all use it
        self.gap = GapFunction.for_swarm(swarm)
        if options.engine == "processes" and options.launch_local and options.inventory is None:
            top = swarm.topology
            degree = max(
                (len(top.in_neighbours(i)) + len(top.out_neighbours(i)) for i in range(swarm.n)),
                default=0,
            )
            check_capacity(swarm.n, degree, str(swarm.scenario.source))
        if options.heartbeat_timeout is None:
            hb = default_heartbeat_timeout(swarm.n)
            options = dataclasses.replace(options, heartbeat_timeout=hb)
        self.opt = options
        self.hb: float = options.heartbeat_timeout  # type: ignore[assignment]
        #: agents still to fork (bounded waves, see spawn_waves) and the last loop turn
        self.to_spawn: list[_Agent] = []
        self.last_turn: float | None = None
        self.s = swarm.scenario
        self.n = swarm.n
        self.clock = time.monotonic
        self.agents = [_Agent(i) for i in range(self.n)]
        self.by_ident: dict[bytes, int] = {}
        self.fork: ForkServer | None = None
        self.ctx: zmq.Context | None = None
        self.router: zmq.Socket | None = None
        self.t_launch = self.clock()
        self.t_go: float | None = None
        self.t_end: float | None = None
        self.stop_requested: str | None = None
        self.exit_reason = "running"
        self.exit_code = 0
        self.verdict: str | None = None
        self.failures: list[str] = []
        self.first_diverged: str | None = None
        self.active_faults: dict[int, dict[str, Any]] = {}
        self.active_timed: dict[int, dict[str, Any]] = {}
        self.directive_seq = 0
        self.directives: dict[int, dict[str, Any]] = {}
        self.timeline: list[tuple[float, int, str, Callable[[], None]]] = []
        #: iteration-triggered process faults: (agent, iteration, "own" | "others", action)
        self.triggers: list[tuple[int, int, str, Callable[[], None]]] = []
        self.unexpected: list[str] = []
        self.pending_peer_updates: list[int] = []
        # Keys are checked before anything starts or is written (a loose secret key is refused
        # here). Agents on inventory hosts read their own host's key directory.
        self.keys = None if options.keys is None else load_coordinator_keys(options.keys, self.n)
        if options.inventory is not None:
            options.inventory.check_keys(None if self.keys is None else self.keys.allow)
        elif self.keys is not None and options.launch_local:
            for i in range(self.n):  # the agents forked here read these files
                load_agent_keys(self.keys.directory, i)
        out = options.out or RunDir.default_path(self.s.name, options.runs_root)
        if options.replace is not None:
            prepare_out(Path(out), options.replace)
        self.dir = RunDir(Path(out))
        self.phase = "starting"
        self.interrupts: Interrupts | None = None
        self.view = options.view
        self.window_events = WindowEvents(self.s.faults, self.n)
        self.run_json: dict[str, Any] = {}
        self.ipc_dir: str | None = None
        self.gate: Gatekeeper | None = None
        #: peers refused: hellos refused here, and as last reported by each agent's gatekeeper
        self.refused_hellos = 0
        self.refused_by_agent: dict[int, int] = {}
        self._gate_seen = 0
        self.refusals_logged = 0
        #: refused control traffic: a few lines per kind and sender, the rest counted
        self.refusals = RefusalLog(self.event, self.clock)

    # -- helpers -----------------------------------------------------------------------
    def now_s(self) -> float:
        return 0.0 if self.t_go is None else self.clock() - self.t_go

    def send(self, agent: _Agent, kind: str, **fields: Any) -> None:
        if agent.ident is None or self.router is None:
            return
        try:
            self.router.send_multipart([agent.ident, encode_control(kind, **fields)], zmq.NOBLOCK)
        except zmq.ZMQError:  # unroutable (dead peer) or full: the agent is gone or stuck
            pass

    def event(self, name: str, /, **fields: Any) -> None:
        self.dir.event({"t_s": round(self.now_s(), 6), "event": name, **fields})

    def write_run_json(self, **updates: Any) -> None:
        self.run_json.update(updates, phase=self.phase)
        if self.interrupts is not None and self.interrupts.count:
            self.run_json["interrupts"] = self.interrupts.records()
        self.run_json["agents"] = [
            {
                "id": a.id,
                "epoch": a.epoch,
                "pid": a.pid,
                "claimed_pid": a.claimed_pid,
                "host": a.host,
                "endpoint": a.endpoint,
                # agent clock minus coordinator clock, and the round trip it was taken from
                "clock_offset_s": a.offset if a.rtt_best < float("inf") else None,
                "clock_rtt_s": a.rtt_best if a.rtt_best < float("inf") else None,
            }
            for a in self.agents
        ]
        self.dir.write_json("run.json", self.run_json)

    # -- launch and handshake ----------------------------------------------------------
    def launch(self) -> None:
        self.ctx = zmq.Context()
        self.router = self.ctx.socket(zmq.ROUTER)
        self.router.setsockopt(zmq.LINGER, 0)
        self.router.setsockopt(zmq.ROUTER_MANDATORY, 1)
        # Generous: the codec refuses and records frames above MAX_CONTROL_FRAME; a peer far
        # above it is cut off by libzmq before it can fill memory.
        self.router.setsockopt(zmq.MAXMSGSIZE, 4 * MAX_CONTROL_FRAME)
        self.router.setsockopt(zmq.SNDHWM, 100000)
        # bounded per connection: a flooding peer is held back by libzmq, not queued here
        self.router.setsockopt(zmq.RCVHWM, CONTROL_RCVHWM)
        if self.keys is not None:
            allow = self.keys.allow
            self.gate = Gatekeeper(self.ctx)
            self.gate.allow(CONTROL_DOMAIN, {allow.keys[n]: n for n in set(allow.agents.values())})
            curve_server(self.router, self.keys.public, self.keys.secret, CONTROL_DOMAIN)
            self.gate.watch(self.router, "control", CONTROL_DOMAIN)
        inventory = self.opt.inventory
        listen = self.opt.listen or (inventory.listen if inventory else "tcp://127.0.0.1:*")
        self.router.bind(listen)
        self.endpoint = self.router.getsockopt(zmq.LAST_ENDPOINT).decode()
        if self.endpoint.startswith("tcp://0.0.0.0:"):
            self.endpoint = self.endpoint.replace("0.0.0.0", socket.gethostname(), 1)
        self.write_run_json(
            versions=run_versions(),
            coordinator={
                "host": socket.gethostname(),
                "pid": os.getpid(),
                "user": getpass.getuser(),
                "endpoint": self.endpoint,
            },
            label=self.opt.label,
            started_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            stopped_utc=None,
            exit="starting",
            process_group=None,
            security={
                "curve": self.keys is not None,
                "keys": None if self.keys is None else str(self.keys.directory),
                "coordinator_key": None if self.keys is None else fingerprint(self.keys.public),
                "protocol": PROTOCOL,
            },
        )
        if (
            self.opt.launch_local
            and self.opt.listen is None
            and inventory is None
            and self.s.network["transport"] == "ipc"
        ):
            for stale in remove_stale_ipc_dirs():
                self.event("stale-ipc-dir-removed", path=stale)
            self.ipc_dir = make_ipc_dir()
            self.swarm = with_transport(self.swarm, "ipc", self.ipc_dir)
        if inventory is not None:
            from coordinator._remote import RemoteLauncher, RemoteStartError

            try:
                # A host's server outlives its agents' own heartbeat rule by a second, so
                # agents leave by themselves and the server only clears what is left.
                idle = self.opt.heartbeat_timeout + 1.0
                self.fork = RemoteLauncher(inventory, idle, version=VERSION)
            except RemoteStartError as exc:
                raise _Stop(str(exc), 3) from None
            self.write_run_json(hosts=self.fork.hosts_json())
            for a in self.agents:
                self.spawn(a)
        elif self.opt.launch_local:
            self.fork = ForkServer()
            self.write_run_json(process_group=self.fork.pgid, heartbeat_timeout_s=self.hb)
            self.to_spawn = list(self.agents)
            self.spawn_waves()

    def spawn_waves(self) -> None:
        """Fork agents in waves: at most wave_size() of them between fork and hello."""
        if not self.to_spawn:
            return
        forked = self.n - len(self.to_spawn)
        joining = sum(a.ident is None and not a.dead for a in self.agents[:forked])
        while self.to_spawn and joining < wave_size():
            self.spawn(self.to_spawn.pop(0))
            joining += 1

    def note_turn(self) -> None:
        """A loop turn that came late (the coordinator was starved or stopped) goes to
        events.jsonl: agents may leave for a missed heartbeat, and this says why."""
        now = self.clock()
        if self.last_turn is not None and now - self.last_turn > max(1.0, self.hb / 2):
            self.event(
                "coordinator-stalled",
                stalled_s=round(now - self.last_turn, 3),
                heartbeat_timeout_s=self.hb,
            )
        self.last_turn = now

    def spawn(self, a: _Agent) -> None:
        assert self.fork is not None
        log = self.dir.path / "telemetry" / f"agent-{a.id}.log"
        if self.keys is None:
            self.fork.spawn(a.id, self.endpoint, str(log), self.opt.heartbeat_timeout)
        else:
            keys = str(self.keys.directory)
            self.fork.spawn(a.id, self.endpoint, str(log), self.opt.heartbeat_timeout, keys=keys)

    def on_fork_events(self) -> None:
        if self.fork is None:
            return
        lost = self.fork.lost()
        if lost is not None and not self.stop_requested and lost not in self.unexpected:
            self.unexpected.append(lost)
        for ev in self.fork.events():
            if ev["op"] == "spawned":
                a = self.agents[int(ev["agent"])]
                a.pid = int(ev["pid"])
            elif ev["op"] == "exited" and ev.get("agent") is not None:
                a = self.agents[int(ev["agent"])]
                if int(ev["pid"]) != a.pid:
                    continue  # an older incarnation's notice
                status = int(ev["status"])
                how = f"killed by signal {-status}" if status < 0 else f"exit status {status}"
                if status == EXIT_COORDINATOR_SILENT:
                    how = (
                        f"it missed the coordinator's heartbeat: no word for {self.hb:.1f} s;"
                        f" see telemetry/agent-{a.id}.log"
                    )
                a.dead = True
                if a.records and not a.finished:
                    a.record.alive = False
                if a.finished or self.stop_requested or a.crashed_on_purpose:
                    continue
                msg = f"agent {a.id} died unexpectedly ({how})"
                if status == EXIT_COORDINATOR_SILENT:
                    msg = f"agent {a.id} left: {how}"
                    self.event("agent-missed-heartbeat", agent=a.id, epoch=a.epoch, pid=a.pid)
                self.event("agent-lost", agent=a.id, epoch=a.epoch, pid=a.pid, status=status)
                self.unexpected.append(msg)

    def on_message(self, ident: bytes, frame: bytes, user: str | None = None) -> None:
        """One control frame; ``user``: the name of the key the sender authenticated with."""
        try:
            msg = decode_control(frame)
        except WireError as exc:
            self.refusals.refuse("control-rejected", str(exc), ident, error=str(exc))
            return
        kind = msg["t"]
        if kind == "hello":
            self.on_hello(ident, msg, user)
            return
        idx = self.by_ident.get(ident)
        if idx is None:  # well formed, but from no agent of this run: counted, then dropped
            self.refusals.refuse(
                "control-refused", f"{kind!r} from a peer that never joined", ident
            )
            return
        a = self.agents[idx]
        if kind == "bound":
            a.endpoint = msg["endpoint"]
            self.event("agent-bound", agent=a.id, epoch=a.epoch, endpoint=a.endpoint, host=a.host)
            if a.running or self.t_go is not None:
                self.peers_for_restart(a)
        elif kind == "pong":
            rtt = self.clock() - float(msg["t_coord"])
            if rtt < a.rtt_best:
                a.rtt_best = rtt
                a.offset = float(msg["t_node"]) - (float(msg["t_coord"]) + rtt / 2)
                a.record.offset = a.offset
            if len(a.pings) < PINGS:
                self.ping(a)
        elif kind == "ready":
            a.ready = True
            a.ready_at = self.clock()
        elif kind == "heard":
            a.heard.add((int(msg["sender"]), int(msg["epoch"])))
        elif kind == "tel":
            self.on_telemetry(a, msg)
        elif kind == "final":
            self.on_telemetry(
                a, {"samples": [], "links": msg["links"], "counters": msg["counters"]}
            )
            a.record.final = msg
            a.finished = True
            self.dir.telemetry(a.id, {"epoch": a.epoch, "final": msg})
        elif kind == "ack":
            d = self.directives.get(int(msg["directive"]))
            if d is not None:
                self.event(
                    "fault-applied",
                    fault=d["index"],
                    directive=int(msg["directive"]),
                    action=d["action"],
                    agent=a.id,
                    t_node_s=float(msg["t_node"]) - a.offset - self.agent_time_origin(a),
                )
        elif kind == "refused":
            self.on_refusals(f"agent {a.id}", msg["records"])
            self.refused_by_agent[a.id] = max(self.refused_by_agent.get(a.id, 0), msg["total"])
        elif kind == "failed":
            err = str(msg["error"])
            self.failures.append(err)
            self.event("agent-failed", agent=a.id, epoch=a.epoch, error=err)
            if err.startswith("diverged") and self.first_diverged is None:
                self.first_diverged = err

    def refuse(self, ident: bytes, reason: str, **fields: Any) -> None:
        """Tell a would-be agent no, and record it; a peer already gone is no error."""
        self.refused_hellos += 1
        self.refusals.refuse("hello-refused", reason, ident, reason=reason, **fields)
        with contextlib.suppress(zmq.ZMQError):
            self.router.send_multipart(  # type: ignore[union-attr]
                [ident, encode_control("refuse", reason=reason)], zmq.NOBLOCK
            )

    def on_refusals(self, by: str, records: list[Any]) -> None:
        """Refused peers into events.jsonl, one line each up to REFUSAL_EVENTS."""
        for r in records[:64]:
            if self.refusals_logged >= REFUSAL_EVENTS:
                return
            if not isinstance(r, dict):
                continue
            self.refusals_logged += 1
            self.event(
                "peer-refused",
                by=by,
                socket=str(r.get("socket", "?"))[:32],
                address=str(r.get("address", "?"))[:64],
                reason=str(r.get("reason", "?"))[:200],
            )

    def take_refusals(self) -> None:
        if self.gate is not None and self.gate.total != self._gate_seen:
            self._gate_seen = self.gate.total
            self.on_refusals("coordinator", self.gate.take())

    @property
    def refused_total(self) -> int:
        """Every peer refused: handshakes here and at the agents, and refused hellos."""
        here = 0 if self.gate is None else self.gate.total
        return here + self.refused_hellos + sum(self.refused_by_agent.values())

    def hello_refusal(self, i: int, msg: dict[str, Any], user: str | None) -> str | None:
        """Why this hello may not join (versions, key), or None."""
        if msg["pid"] <= 1:  # kill(-1), kill(0), kill(1): never a process of one agent
            return f"agent {i} claims pid {msg['pid']}, which is no agent's process"
        if msg["version"] != VERSION or msg["protocol"] != PROTOCOL:
            return (
                f"agent {i} runs swarmrig {msg['version']} (protocol {msg['protocol']}); "
                f"this coordinator runs swarmrig {VERSION} (protocol {PROTOCOL})"
            )
        if self.keys is not None:
            expected = self.keys.allow.agents.get(i)
            if user != expected:  # an authenticated peer trying another agent's id
                return f"agent {i} must present key {expected!r}; this hello came with {user!r}"
        return None

    def on_hello(self, ident: bytes, msg: dict[str, Any], user: str | None = None) -> None:
        i = int(msg["agent"])
        why = self.hello_refusal(i, msg, user)
        if why is not None:
            self.refuse(ident, why, agent=i, host=msg["host"], pid=msg["pid"])
            return
        if not 0 <= i < self.n:
            self.refuse(
                ident,
                f"agent id {i} is not in 0..{self.n - 1}",
                agent=i,
                host=msg["host"],
                pid=msg["pid"],
            )
            return
        a = self.agents[i]
        if a.ident is not None and not a.dead and not a.restart_pending:
            self.refuse(
                ident, f"agent {i} has already joined", agent=i, host=msg["host"], pid=msg["pid"]
            )
            return
        restart = a.epoch >= 0
        if restart:
            process_faults.rejoining(self, a)
        a.epoch += 1
        if a.ident is not None:  # what the old incarnation still sends is no longer its
            self.by_ident.pop(a.ident, None)
        a.ident = ident
        self.by_ident[ident] = i
        a.host = str(msg["host"])
        a.claimed_pid = int(msg["pid"])
        if self.fork is not None:
            self.on_fork_events()  # the spawned reply for this incarnation, if not yet read
        a.dead = a.finished = a.ready = a.running = False
        a.pings.clear()
        a.rtt_best = float("inf")
        start_state = None
        start_iteration = 0
        if restart and a.records:
            last = a.record
            a.crashed_on_purpose = False
            if last.samples:
                start_iteration = int(last.samples[-1][0])
                if a.restart_state == "last":
                    start_state = last.samples[-1][2]
        a.restart_pending = False
        # samples stream to telemetry/; the record keeps the first and last (_samples)
        a.records.append(AgentRecord(agent=i, epoch=a.epoch, samples=SampleTail()))
        a.start_iteration = start_iteration
        plan = self.swarm.plan(i, a.epoch, start_state=start_state, start_iteration=start_iteration)
        if self.keys is not None:
            top = self.swarm.topology
            plan = {
                **plan,
                "curve": plan_keys(self.keys.allow, i, top.out_neighbours(i), top.in_neighbours(i)),
            }
        self.send(a, "plan", plan=plan)
        self.ping(a)

        if restart:
            self.event(
                "agent-rejoined",
                agent=i,
                epoch=a.epoch,
                pid=a.pid,
                claimed_pid=a.claimed_pid,
                start_iteration=start_iteration,
                state="last" if start_state is not None else "initial",
            )

    def ping(self, a: _Agent) -> None:
        seq = len(a.pings)
        t = self.clock()
        a.pings[seq] = t
        self.send(a, "ping", seq=seq, t_coord=t)

    def peers_table(self, i: int) -> dict[int, list[Any]]:
        top = self.swarm.topology
        return {
            j: [self.agents[j].endpoint, self.agents[j].epoch]
            for j in top.in_neighbours(i)
            if self.agents[j].endpoint is not None
        }

    def peers_for_restart(self, a: _Agent) -> None:
        self.send(a, "peers", peers=self.peers_table(a.id))
        for j in self.swarm.topology.out_neighbours(a.id):
            b = self.agents[j]
            if not b.dead:
                self.send(b, "peers", peers={a.id: [a.endpoint, a.epoch]})

    def pump(self, timeout_ms: int) -> None:
        """One loop turn of control traffic: bounded in messages and time (coordinator._inbox),
        so that heartbeats and the timeline run on time under a flood."""
        assert self.router is not None
        if self.router.poll(timeout_ms):
            take_turn(
                self.router,
                self.on_message,
                self.bad_envelope,
                keyed=self.keys is not None,
                clock=self.clock,
            )
        self.refusals.tick()
        self.take_refusals()
        self.on_fork_events()

    def bad_envelope(self, ident: bytes | None, parts: int) -> None:
        """Not a two-frame message: not from one of our agents."""
        self.refusals.refuse(
            "envelope-rejected",
            "message is not [identity, frame]",
            ident,
            error=f"message is not [identity, frame] ({parts} frames)",
        )

    def handshake(self) -> None:
        # The default deadline moves on while start-up does (a hello, a bound, a ready less
        # than HANDSHAKE_STALL_S + 0.1 s per agent ago), up to 4 times itself: a loaded machine starts a large
        # swarm slowly but steadily. A --join-timeout is a hard limit.
        timeout = self.opt.handshake_timeout or (20.0 + 0.2 * self.n)
        hard = self.opt.handshake_timeout is not None
        start = self.clock()
        deadline = start + timeout
        progress: tuple[int, int, int] = (0, 0, 0)
        last_progress = start
        peers_sent = False
        next_beat = self.clock()
        while True:
            self.pump(5)
            self.note_turn()
            self.spawn_waves()
            if self.opt.on_join is not None:
                self.opt.on_join(
                    self.endpoint, sum(a.ident is not None for a in self.agents), self.n
                )
            if self.clock() >= next_beat:
                # Agents that joined wait for the others (started by hand, maybe minutes
                # apart): without beats they would take the coordinator for lost.
                for a in self.agents:
                    if a.ident is not None and not a.dead:
                        self.send(a, "beat")
                next_beat = self.clock() + HEARTBEAT_S
            self.check_stop_request(before_go=True)
            if self.unexpected:
                raise _Stop(self.unexpected[0] + " during start-up", 3)
            if self.failures:
                raise _Stop("an agent failed during start-up: " + self.failures[0], 3)
            if not peers_sent and all(a.endpoint for a in self.agents):
                for a in self.agents:
                    self.send(a, "peers", peers=self.peers_table(a.id))
                peers_sent = True
            if peers_sent and all(a.ready for a in self.agents):
                return
            now = self.clock()
            seen = (
                sum(a.ident is not None for a in self.agents),
                sum(a.endpoint is not None for a in self.agents),
                sum(a.ready for a in self.agents),
            )
            if seen != progress:
                progress, last_progress = seen, now
            quiet = now - last_progress
            stalled = hard or quiet > HANDSHAKE_STALL_S + HANDSHAKE_STALL_PER_AGENT_S * self.n
            if now > deadline and (stalled or now > start + 4 * timeout):
                missing = [a.id for a in self.agents if not a.ready]
                raise _Stop(f"agents {missing} were not ready after {now - start:.0f} s", 3)

    def go(self, a: _Agent) -> None:
        """Start an agent on the run's common clock (a restarted one joins the running clock:
        its time budget and the time windows of faults still count from the run's start)."""
        assert self.t_go is not None
        a.running = True
        if a.epoch > 0:
            # Time-windowed link faults active now apply to the new incarnation; sent before
            # go so that they hold for the very first message it handles.
            for tf in self.active_timed.values():
                entry = tf["entries"].get(a.id)
                if entry is not None:
                    self.directive(a, tf, "add", entry)
        self.send(a, "go", start_node=self.t_go + a.offset, iteration=a.start_iteration)

    def restart_ready(self, a: _Agent) -> bool:
        """A restarted agent may go once every live out-neighbour hears its new incarnation
        (else its first messages are lost to slow joiners), or after a grace period."""
        waiting = [
            j
            for j in self.swarm.topology.out_neighbours(a.id)
            if not self.agents[j].dead and (a.id, a.epoch) not in self.agents[j].heard
        ]
        return not waiting or self.clock() - a.ready_at > 2.0

    # -- telemetry ---------------------------------------------------------------------
    def agent_time_origin(self, a: _Agent) -> float:
        """The coordinator-clock time that agent times are counted from (the go time)."""
        return self.t_go or 0.0

    def on_telemetry(self, a: _Agent, msg: dict[str, Any]) -> None:
        rec = a.record
        t0 = self.agent_time_origin(a)
        new = [
            (int(s[0]), float(s[1]) - a.offset - t0, s[2], s[3], s[4], s[5]) for s in msg["samples"]
        ]
        for s in new:
            rec.samples.append(s)
        if self.window_events.windows and new:
            self.note_windows(a, new)
        rec.links = {int(k): {int(e): v for e, v in per.items()} for k, per in msg["links"].items()}
        rec.counters = msg["counters"]
        if msg["samples"]:
            self.dir.telemetry(
                a.id,
                {
                    "epoch": a.epoch,
                    "offset": a.offset,
                    "t_go": t0,
                    "samples": msg["samples"],
                    "links": msg["links"],
                    "counters": msg["counters"],
                },
            )

    def note_windows(self, a: _Agent, samples: list[tuple]) -> None:
        """Record the start and end of fault windows the agents enforce themselves."""
        dead = [b.id for b in self.agents if b.dead and not b.restart_pending]
        for ev in self.window_events.observe(a.id, [(s[0], s[1]) for s in samples], dead):
            self.event(ev.pop("event"), **ev)

    def show(self, *, final: bool = False, summary: dict[str, Any] | None = None) -> None:
        """Hand the view a frozen snapshot: live frames as a callable (built only when the
        view will draw one), the frame after the results to its ``final`` method if any."""
        if self.view is None:
            return
        if final:
            if hasattr(self.view, "final"):
                self.view.final(take_snapshot(self, final=True, summary=summary))
            return
        wants = getattr(self.view, "wants_frame", None)
        if wants is None or wants():
            self.view(take_snapshot(self))

    # -- the fault timeline ------------------------------------------------------------
    def schedule(self, at_s: float, what: str, action: Callable[[], None]) -> None:
        self.timeline.append((at_s, len(self.timeline), what, action))
        self.timeline.sort()

    def build_timeline(self) -> None:
        for tf in self.swarm.timed_faults:
            self.schedule(tf["at_s"], "link-fault-on", lambda tf=tf: self.link_fault(tf, "add"))
            if tf["until_s"] is not None:
                self.schedule(
                    tf["until_s"], "link-fault-off", lambda tf=tf: self.link_fault(tf, "remove")
                )
        for pf in self.swarm.process_faults:
            if pf.get("start_iteration") is not None or pf.get("duration_iterations") is not None:
                self.iteration_faults(pf)
                continue
            start = float(pf.get("start_s") or 0.0)
            dur = pf.get("duration_s")
            for i in pf["agents"]:
                if pf["kind"] == "crash":
                    self.schedule(start, "crash", lambda i=i, pf=pf: self.crash(i, pf))
                elif pf["kind"] == "pause":
                    self.schedule(start, "pause", lambda i=i, pf=pf: self.pause(i, pf, True))
                    self.schedule(
                        start + float(dur), "resume", lambda i=i, pf=pf: self.pause(i, pf, False)
                    )
                elif pf["kind"] == "slow":
                    factor = float(pf["params"]["factor"])
                    self.schedule(start, "slow", lambda i=i, f=factor, pf=pf: self.slow(i, pf, f))
                    if dur is not None:
                        self.schedule(
                            start + float(dur), "slow-end", lambda i=i, pf=pf: self.slow(i, pf, 1.0)
                        )
        for entries in self.swarm.armed_faults.values():
            for e in entries:
                self.active_faults[int(e["fault"]["index"])] = e["fault"]

    def iteration_faults(self, pf: dict[str, Any]) -> None:
        """Process faults given in iterations fire when telemetry shows the iteration reached.

        The agent's own iteration starts it (and ends a slowdown); a paused agent does not
        iterate, so a pause ends when the median iteration of the other agents has moved on
        by its duration. Telemetry arrives in batches, so the action can come a batch late;
        events.jsonl records when it really happened.
        """
        start = int(pf.get("start_iteration") or 0)
        dur = pf.get("duration_iterations")
        for i in pf["agents"]:
            if pf["kind"] == "crash":
                self.triggers.append((i, start, "own", lambda i=i, pf=pf: self.crash(i, pf)))
            elif pf["kind"] == "pause":
                self.triggers.append((i, start, "own", lambda i=i, pf=pf: self.pause(i, pf, True)))
                self.triggers.append(
                    (i, start + int(dur), "others", lambda i=i, pf=pf: self.pause(i, pf, False))
                )
            elif pf["kind"] == "slow":
                factor = float(pf["params"]["factor"])
                self.triggers.append(
                    (i, start, "own", lambda i=i, f=factor, pf=pf: self.slow(i, pf, f))
                )
                if dur is not None:
                    self.triggers.append(
                        (i, start + int(dur), "own", lambda i=i, pf=pf: self.slow(i, pf, 1.0))
                    )

    def latest_iteration(self, i: int) -> int:
        a = self.agents[i]
        r = a.records[-1] if a.records else None
        return int(r.samples[-1][0]) if r is not None and r.samples else -1

    def fire_triggers(self) -> None:
        if not self.triggers:
            return
        keep = []
        for trig in self.triggers:
            i, at, whose, action = trig
            if whose == "own":
                reached = self.latest_iteration(i) >= at
            else:
                others = [self.latest_iteration(j) for j in range(self.n) if j != i]
                reached = bool(others) and float(np.median(others)) >= at
            if reached:
                action()
            else:
                keep.append(trig)
        self.triggers = keep

    def directive(self, a: _Agent, tf: dict[str, Any], action: str, entry: dict) -> None:
        self.directive_seq += 1
        self.directives[self.directive_seq] = {"index": tf["index"], "action": action}
        self.send(
            a,
            "directive",
            directive=self.directive_seq,
            action=action,
            fault={**entry, "index": tf["index"]},
        )

    def link_fault(self, tf: dict[str, Any], action: str) -> None:
        for dst, entry in tf["entries"].items():
            self.directive(self.agents[int(dst)], tf, action, entry)
        if action == "add":
            self.active_faults[tf["index"]] = {"kind": tf["kind"]}
            self.active_timed[tf["index"]] = tf
        else:
            self.active_faults.pop(tf["index"], None)
            self.active_timed.pop(tf["index"], None)
        self.event(
            "fault-sent",
            fault=tf["index"],
            kind=tf["kind"],
            action=action,
            links=[list(link) for link in tf["links"]],
        )

    # process faults: coordinator._process_faults decides whom it may signal
    def crash(self, i: int, pf: dict[str, Any]) -> None:
        process_faults.crash(self, i, pf)

    def pause(self, i: int, pf: dict[str, Any], stop: bool) -> None:
        process_faults.pause(self, i, pf, stop)

    def slow(self, i: int, pf: dict[str, Any], factor: float) -> None:
        process_faults.slow(self, i, pf, factor)

    # -- run phase ---------------------------------------------------------------------
    def check_stop_request(self, before_go: bool = False) -> None:
        if self.stop_requested:
            raise _Stop(self.stop_requested, EXIT_INTERRUPTED)
        if self.dir.failure is not None:
            raise _Stop(f"run directory write failed: {self.dir.failure}", EXIT_WRITE_FAILED)

    def run_phase(self) -> None:
        self.build_timeline()
        lead = 0.05 + 0.001 * self.n
        self.t_go = self.clock() + lead
        for a in self.agents:
            self.go(a)
        self.event("go", agents=self.n, lead_s=lead)
        next_beat = self.clock()
        budget_end = None if self.s.seconds is None else float(self.s.seconds)
        self.last_turn = None
        while True:
            self.pump(10)
            self.note_turn()
            now = self.clock()
            if now >= next_beat:
                for a in self.agents:
                    if not a.dead:
                        self.send(a, "beat")
                next_beat = now + HEARTBEAT_S
            t = self.now_s()
            while self.timeline and self.timeline[0][0] <= t:
                _, _, _what, action = self.timeline.pop(0)
                action()
            self.fire_triggers()
            for a in self.agents:
                if a.ready and not a.running and not a.dead and self.restart_ready(a):
                    self.go(a)
            self.show()
            self.check_stop_request()
            if self.unexpected:
                raise _Stop(self.unexpected[0], 3)
            if self.first_diverged is not None:
                self.verdict = "diverged"
                raise _Stop(self.first_diverged, 0)
            if self.failures:
                raise _Stop("agent failure: " + self.failures[0], 3)
            done = all(
                a.finished or (a.dead and a.crashed_on_purpose and not a.restart_pending)
                for a in self.agents
            )
            if done and not any(a.restart_pending for a in self.agents):
                raise _Stop("budget", 0)
            if budget_end is not None and t > budget_end + 5.0 + self.opt.heartbeat_timeout:
                late = [a.id for a in self.agents if not a.finished and not a.dead]
                raise _Stop(f"agents {late} sent no final report after the time budget", 3)

    def stop_all(self, reason: str) -> None:
        """Ask every live agent to stop, collect final reports for a short while."""
        self.stop_requested = self.stop_requested or reason
        for a in self.agents:
            if not a.dead:
                self.send(a, "stop", reason=reason)
        deadline = self.clock() + 1.5
        while self.clock() < deadline:
            self.pump(10)
            # an agent that was never told to go has no final report to send
            if all(a.finished or a.dead or not a.running for a in self.agents):
                break
        # let processes exit on their own, briefly, before the group is killed
        deadline = self.clock() + 1.0
        while self.clock() < deadline and self.fork is not None and self.fork.alive:
            self.pump(10)

    # -- results -----------------------------------------------------------------------
    def results(self) -> RunResult:
        sw = self.swarm
        s = self.s
        records = full_records(
            [r for a in self.agents for r in a.records], self.dir.path / "telemetry"
        )
        metrics = metric_series(
            records,
            self.n,
            sw.objectives,
            sw.intended,
            sw.reference,
            by_iteration=s.mode == "rounds" and sw.telemetry["every_iterations"] > 0,
            gap=self.gap,
        )
        self.dir.write_csv("metrics.csv", METRIC_COLUMNS, metrics)
        links, totals = link_accounting(records, sw.topology.edges())
        self.dir.write_csv("links.csv", LINK_COLUMNS, links)
        finals = final_states(records)
        figures = verdict_figures(
            states={a: np.asarray(f.x) for a, f in finals.items()},
            n_agents=self.n,
            gap=self.gap,
            tolerance=s.tolerance,
            rows=metrics,
            windows=fault_windows(s.faults, self.dir.events()),
            exit_code=self.exit_code,
            diverged=self.verdict == "diverged",
            spread=target_spread(sw.objectives, sw.reference.x_star),
            end_time=self.final_time(),
        )
        self.verdict = figures["verdict"]
        self.dir.write_json("final_states.json", final_states_json(finals, self.n, self.gap))
        run_s = None
        iters = 0  # agent iterations done in the run phase, over every incarnation
        for r in records:
            if not r.samples and r.final is None:
                continue
            last = int(r.final["iteration"]) if r.final is not None else int(r.samples[-1][0])
            first = int(r.samples[0][0]) if r.samples else last
            iters += last - first
        if self.t_go is not None:
            run_s = (self.t_end or self.clock()) - self.t_go
        ref = sw.reference
        summary = {
            "scenario": s.name,
            "agents": self.n,
            "algorithm": sw.algorithm["name"],
            "mode": s.mode,
            "seed": s.seed,
            "label": self.opt.label,
            "engine": self.opt.engine,
            "wall_s": self.clock() - self.t_launch,
            "startup_s": None if self.t_go is None else self.t_go - self.t_launch,
            "run_s": run_s,
            "iterations_per_s": None if not run_s else iters / run_s,
            "iterations_total": iters,
            "x_star": ref.x_star.tolist(),
            "F_star": ref.F_star,
            "reference_method": ref.method,
            "reference_tolerance": ref.tolerance,
            **figures,
            "messages": totals.as_dict(),
            "refused_peers": self.refused_total,
            "refused_control": self.refusals.total,
            "exit": self.exit_reason,
            "run_dir": str(self.dir.path),
        }
        summary.update(self.extra_summary(records, figures["x_hat"], links))
        self.dir.write_json("summary.json", summary)
        return RunResult(
            summary=summary,
            metrics=metrics,
            links=links,
            run_dir=self.dir.path,
            exit_code=self.exit_code,
        )

    def final_time(self) -> float | None:
        times = [r.samples[-1][1] for a in self.agents for r in a.records if r.samples]
        return max(times) if times else None

    def extra_summary(
        self, records: list[AgentRecord], x_hat: Any, links: list[dict[str, Any]]
    ) -> dict[str, Any]:
        """Algorithm-specific diagnostics (priorities); empty when not applicable."""
        sw = self.swarm
        if sw.initial_priorities is None or x_hat is None:
            return {}
        from coordinator._priority_diagnostics import (
            delivery_rates,
            expected_mixing_matrix,
            priority_report,
        )

        finals_w, rows = [], {}
        for a in self.agents:
            r = a.records[-1] if a.records else None
            if r is None or r.final is None:
                continue
            st = r.final["state"]
            if "priorities" in st:
                finals_w.append(st["priorities"])
            if "mixing_row" in st:
                rows[a.id] = {int(k): float(v) for k, v in st["mixing_row"].items()}
        if len(finals_w) != self.n:
            return {}
        expected = None
        if len(rows) == self.n:
            reuse = sw.algorithm.get("params", {}).get("missing") == "reuse"
            ins = {i: sw.topology.in_neighbours(i) for i in range(self.n)}
            expected = expected_mixing_matrix(
                np.asarray(finals_w), ins, delivery_rates(links, reuse=reuse)
            )
        return priority_report(
            sw.initial_priorities,
            np.asarray(finals_w),
            rows or None,
            sw.objectives,
            np.asarray(x_hat),
            expected=expected,
        )

    # -- the whole run -----------------------------------------------------------------
    def execute(self) -> RunResult:
        own = Interrupts.current() is None  # the command line installs one for the process
        self.interrupts = Interrupts.for_process()
        self.interrupts.bind(self)
        try:
            return self._execute()
        finally:
            self.interrupts.release()
            if own:
                self.interrupts.uninstall()

    def set_phase(self, phase: str, **updates: Any) -> None:
        """Record what the coordinator is doing in run.json (interrupts record it too)."""
        self.phase = phase
        if self.interrupts is not None:
            self.interrupts.phase = phase
        with contextlib.suppress(RunDirError):  # kept in dir.failure, reported at the end
            self.write_run_json(**updates)

    def request_stop(self, reason: str) -> None:
        self.stop_requested = self.stop_requested or reason

    def abandon(self, interrupts: Interrupts) -> None:
        abandon_run(self, interrupts)

    def _execute(self) -> RunResult:
        try:
            try:
                self.dir.write_text("scenario.toml", self.s.to_toml())
                self.dir.write_json("agents.json", self.swarm.agents_json())
                self.launch()
                self.handshake()
                self.set_phase("running", exit="running", handshake_s=self.clock() - self.t_launch)
                self.run_phase()
            except _Stop as st:
                self.exit_reason, self.exit_code = st.reason, st.code
            except RunDirError:
                pass  # in self.dir.failure
            except Exception as exc:
                self.exit_reason = f"coordinator error: {type(exc).__name__}: {exc}"
                self.exit_code = 2
                self.event("coordinator-error", error=self.exit_reason)
            self.t_end = self.clock()
            self.settle_exit()
            self.set_phase("stopping")
            with contextlib.suppress(Exception):
                self.stop_all(self.exit_reason)
        finally:
            self.cleanup()
        self.set_phase("results")
        self.refusals.close()
        refused = refused_frames_event([r for a in self.agents for r in a.records])
        if refused is not None:  # data frames the agents refused: counts, one line
            self.event("data-refused", **refused)
        self.event("stop", reason=self.exit_reason)
        self.settle_exit()
        try:
            result = self.results()
        except RunDirError:
            result = RunResult({}, [], [], self.dir.path, EXIT_WRITE_FAILED)
        self.settle_exit()
        if self.dir.failure is None:
            self.show(final=True, summary=result.summary)
        self.phase = "done"
        with contextlib.suppress(RunDirError):
            self.write_run_json(
                exit=self.exit_reason,
                exit_code=self.exit_code,
                stopped_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                verdict=result.summary.get("verdict"),
                write_failed=None if self.dir.failure is None else str(self.dir.failure),
            )
        self.dir.remove_tmp()
        self.dir.close()
        result.exit_code = self.exit_code
        return result

    def settle_exit(self) -> None:
        """A failed write ends the run with EXIT_WRITE_FAILED; an interrupt at any phase
        with 130 (a run that had ended on its own says so in its reason)."""
        if self.dir.failure is not None:
            if self.exit_code != EXIT_WRITE_FAILED:
                self.exit_reason = f"run directory write failed: {self.dir.failure}"
                self.exit_code = EXIT_WRITE_FAILED
        elif self.interrupts and self.interrupts.count and self.exit_code != EXIT_INTERRUPTED:
            first = self.interrupts.received[0]
            self.exit_reason = (
                f"{self.exit_reason}; {self.interrupts.reason} while {first['phase']}"
            )
            self.exit_code = EXIT_INTERRUPTED

    def cleanup(self) -> None:
        if self.fork is not None:
            self.fork.shutdown()
        if self.router is not None:
            self.router.close(linger=0)
        if self.gate is not None:
            self.take_refusals()
            self.gate.stop()
        if self.ctx is not None:
            self.ctx.term()
        if self.ipc_dir is not None:
            shutil.rmtree(self.ipc_dir, ignore_errors=True)


def execute(swarm: Swarm, options: RunOptions | None = None) -> RunResult:
    """Run one swarm to the end; the run directory is complete when this returns."""
    options = options or RunOptions()
    if options.engine == "lockstep":
        from coordinator._lockstep import execute_lockstep

        return execute_lockstep(swarm, options)
    if options.engine == "batch":
        from coordinator._batch import execute_batch

        return execute_batch(swarm, options)
    if options.engine != "processes":
        raise RunFailed(
            f"engine {options.engine!r} is not known; expected processes, lockstep or batch"
        )
    return Coordinator(swarm, options).execute()
