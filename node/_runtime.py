"""The agent process: sockets, the loop, the control channel, telemetry batching, signals.

This layer is thin on purpose: the algorithm is a pure core (:mod:`node._algorithm`), the
fault decisions are pure (:mod:`node._links`), the codec owns msgpack (:mod:`node._wire`)
and the life cycle is one state machine (:mod:`node._lifecycle`). What is left here is
obeying them on real sockets and real time.

Sockets: one DEALER to the coordinator's ROUTER (control, telemetry), one PUB bound for the
agent's outgoing data (every algorithm broadcasts one payload per step), one SUB connected to
every in-neighbour's PUB. PUB never blocks the loop on a slow neighbour; whatever does not
arrive shows up as a gap in the per-link sequence numbers and is counted as lost in transport.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import signal
import socket
import sys
import time
import traceback
from collections import deque
from collections.abc import Iterator, Mapping
from typing import Any

import numpy as np
import zmq

from node._algorithm import AgentSpec, Algorithm, StepRule, algorithm_class
from node._errors import (
    EXIT_COORDINATOR_SILENT,
    AgentFailure,
    CoordinatorSilent,
    ProtocolError,
    WireError,
)
from node._lifecycle import Lifecycle, Phase
from node._objectives import objective_from_spec
from node._receiver import Receiver
from node._rng import agent_generator
from node._security import (
    DATA_DOMAIN,
    AgentKeys,
    Gatekeeper,
    curve_client,
    curve_server,
    data_plane_keys,
    load_agent_keys,
)
from node._wire import (
    MAX_DATA_FRAME,
    PROBE,
    PROTOCOL,
    decode_control,
    encode_control,
    encode_probe,
)

__all__ = ["BATCH_LIMIT", "Node", "main", "receive_batch", "spec_from_plan"]

VERSION = "0.1.0"
#: heartbeat interval of TCP data connections (ms); see _detect_dead_links
DATA_HEARTBEAT_MS = 250
#: an estimate beyond this (or not finite) means the run diverged
DIVERGED = 1e12
#: control messages kept while the agent pauses itself (beats are not kept); beyond: refused
HELD_MAX = 10000


#: frames taken off the data socket before they are handled as one batch
BATCH_LIMIT = 4096
#: largest message a subscriber may send to our PUB. Our own subscribers send one message,
#: the empty subscription (1 byte); the limit also covers the security handshake's commands
#: (a CURVE handshake needed 276 bytes with libzmq 4.3.5, measured). A peer above it is
#: disconnected, so no subscription costs more than this many bytes of subscription tree.
SUBSCRIPTION_MAX = 512
#: subscription messages queued per subscriber connection before libzmq stops reading it
#: (common practice, not from a source)
SUBSCRIPTION_HWM = 1000
#: test-only: "ID=SECONDS,..." shifts those agents' clocks (checks the offset estimate)
CLOCK_SHIFT_ENV = "SWARMRIG_TEST_CLOCK_SHIFT"


def receive_batch(sub: zmq.Socket, rx: Receiver, now: float, limit: int = BATCH_LIMIT) -> int:
    """Take what is queued on ``sub`` (up to ``limit`` frames) and hand it to ``rx``."""
    frames: list[bytes] = []
    recv = sub.recv
    try:
        while len(frames) < limit:
            frames.append(recv(zmq.NOBLOCK))
    except zmq.Again:
        pass
    if frames:
        rx.on_frames(frames, now)
    return len(frames)


def spec_from_plan(plan: Mapping[str, Any]) -> AgentSpec:
    """Build the pure AgentSpec from a plan received over the control channel."""
    obj = dict(plan["objective"])
    obj.setdefault("agent", plan["agent"])
    prios = plan.get("initial_priorities")
    return AgentSpec(
        id=int(plan["agent"]),
        n_agents=int(plan["n_agents"]),
        dimension=int(plan["dimension"]),
        in_neighbours=tuple(int(j) for j in plan["in_neighbours"]),
        out_neighbours=tuple(int(j) for j in plan["out_neighbours"]),
        weights={int(k): float(v) for k, v in plan["weights"].items()},
        objective=objective_from_spec(obj),
        initial_state=np.asarray(plan["initial_state"], dtype=float),
        initial_priorities=None if prios is None else np.asarray(prios, dtype=float),
        step=StepRule.from_spec(plan["algorithm"]["step"]),
        in_neighbour_out_degree={
            int(k): int(v) for k, v in plan.get("in_neighbour_out_degree", {}).items()
        },
        params=dict(plan["algorithm"].get("params", {})),
    )


def _import_modules(names: list[str]) -> None:
    import importlib

    for name in names:
        importlib.import_module(name)


def _set_parent_death_signal() -> None:
    """Linux: die with the parent (the fork server, which dies with the coordinator)."""
    if not sys.platform.startswith("linux"):
        return
    with contextlib.suppress(Exception):
        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG


def _detect_dead_links(pub: zmq.Socket, sub: zmq.Socket) -> None:
    """Over TCP, a data connection silent for ``DATA_HEARTBEAT_MS * 3`` is dropped and made
    again: what a partition sends meanwhile is lost (counted by the sequence gap) instead of
    arriving seconds late in a burst when TCP's retransmission timer allows. The I/O thread
    answers heartbeats, so a busy agent keeps its links; a SIGSTOPped one does not."""
    for s in (pub, sub):
        s.setsockopt(zmq.HEARTBEAT_IVL, DATA_HEARTBEAT_MS)
        s.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * DATA_HEARTBEAT_MS)
        s.setsockopt(zmq.HEARTBEAT_TTL, 4 * DATA_HEARTBEAT_MS)
    # a connection attempt lost in a partition is retried soon, not at TCP's SYN back-off
    sub.setsockopt(zmq.CONNECT_TIMEOUT, 2 * DATA_HEARTBEAT_MS)
    sub.setsockopt(zmq.RECONNECT_IVL, 100)


def _advertise_host(bind_host: str, coordinator: str) -> str:
    if bind_host not in ("0.0.0.0", "*"):
        return bind_host
    # The address of the interface that routes to the coordinator.
    host = coordinator.split("://", 1)[-1].rsplit(":", 1)[0]
    with contextlib.suppress(OSError), socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.connect((host, 9))
        return s.getsockname()[0]
    return socket.gethostname()


class Node:
    """One agent process. ``run()`` returns the process exit code."""

    def __init__(
        self,
        join: str,
        agent: int,
        *,
        heartbeat_timeout: float = 3.0,
        clock: Any = time.monotonic,
        keys: AgentKeys | None = None,
    ) -> None:
        self.init_fields(join, agent, heartbeat_timeout, clock)
        self.keys = keys
        self.ctx = zmq.Context()
        self.gate = None if keys is None else Gatekeeper(self.ctx)
        self.ctl = self.ctx.socket(zmq.DEALER)
        self.ctl.setsockopt(zmq.LINGER, 0)
        self.ctl.setsockopt(zmq.SNDHWM, 100000)
        if keys is not None:
            assert self.gate is not None
            # Only the holder of the coordinator's secret key can complete this handshake.
            curve_client(self.ctl, keys.public, keys.secret, keys.coordinator)
            self.gate.watch(self.ctl, "coordinator")
        self.ctl.connect(join)

    def init_fields(self, join: str, agent: int, heartbeat_timeout: float, clock: Any) -> None:
        """Everything but the sockets (the lockstep engine builds nodes without them)."""
        self.join = join
        self.agent = agent
        self.clock = clock
        self.heartbeat_timeout = heartbeat_timeout
        self.life = Lifecycle()
        self.pub: zmq.Socket | None = None
        self.sub: zmq.Socket | None = None
        self.last_ctl = clock()
        self.epoch = 0
        self.refused_control = 0
        self.telemetry_dropped = 0
        self.sent = 0
        self.seq = 0
        self.iteration = 0
        self.samples: list[list[Any]] = []
        self.stop_reason: str | None = None
        self.slow_factor = 1.0
        #: control frames that came while paused, handled on resume (see hold)
        self.held: deque[bytes] = deque()
        self.start_node = 0.0
        #: restarted in-neighbours to report as heard: sender -> epoch
        self.to_report: dict[int, int] = {}
        #: data frames that arrived before go, with their arrival times
        self.early: list[tuple[bytes, float]] = []
        self.gate: Gatekeeper | None = None
        #: in-neighbour -> its public key (keyed swarms; from the plan)
        self.publisher_keys: dict[int, bytes] = {}

    # -- control channel ---------------------------------------------------------------
    def send_ctl(self, kind: str, **fields: Any) -> bool:
        try:
            self.ctl.send(encode_control(kind, **fields), zmq.NOBLOCK)
            return True
        except zmq.Again:
            return False

    def handle_ctl(self, frame: bytes) -> dict[str, Any] | None:
        """Decode, check against the life cycle, apply the 'stay' messages; return the rest."""
        try:
            msg = decode_control(frame)
            self.life.on_message(msg["t"])
        except (WireError, ProtocolError):
            self.refused_control += 1
            return None
        self.last_ctl = self.clock()
        kind = msg["t"]
        if kind == "ping":
            self.send_ctl("pong", seq=msg["seq"], t_coord=msg["t_coord"], t_node=self.clock())
            return None
        if kind == "beat":
            return None
        if kind == "directive":
            self.apply_directive(msg)
            return None
        if kind == "process":
            self.process_fault(msg)
            return None
        if kind == "stop":
            self.stop_reason = msg["reason"]
        return msg

    def process_fault(self, msg: Mapping[str, Any]) -> None:
        """A process fault carried out here, on the agent's own host: the coordinator signals
        only processes its fork server started, and tells an agent that joined by itself
        (``--no-launch``) to slow down, crash or pause itself instead."""
        action = msg["action"]
        if action == "slow":
            self.slow_factor = float(msg["factor"])
        elif action == "crash":
            after = msg["restart_after_s"]
            if after is None:
                sys.stderr.flush()
                signal.raise_signal(signal.SIGKILL)  # this process, whatever it was told
            raise SelfCrash(max(0.0, float(after)))
        elif action == "pause":
            self.hold()
        # "resume" while not paused: nothing to do

    def hold(self) -> None:
        """Pause on the coordinator's word until ``resume``: no step, no data sent or read
        (frames queue up in the socket as for a stopped process). Control messages that come
        meanwhile are kept, bounded, and handled on resume; ``stop`` ends the pause."""
        while True:
            if not self.ctl.poll(100):
                if self.coordinator_lost():
                    return
                continue
            frame = self.ctl.recv()
            try:
                msg = decode_control(frame)
            except WireError:
                self.refused_control += 1
                continue
            self.last_ctl = self.clock()
            kind = msg["t"]
            if kind == "beat":
                continue
            if kind == "process" and msg["action"] == "resume":
                return
            if len(self.held) < HELD_MAX:
                self.held.append(frame)
            else:
                self.refused_control += 1
            if kind == "stop":
                return

    def next_ctl(self, timeout_ms: int) -> bytes | None:
        """The next control frame: one kept during a pause first, else from the socket."""
        if self.held:
            return self.held.popleft()
        if self.ctl.poll(timeout_ms):
            return self.ctl.recv()
        return None

    def wait_ctl(self, *kinds: str) -> dict[str, Any]:
        """Block for one of ``kinds`` (answering pings meanwhile); fail on coordinator loss."""
        while True:
            frame = self.next_ctl(100)
            if frame is not None:
                msg = self.handle_ctl(frame)
                if msg is None:
                    continue
                if msg["t"] in kinds:
                    return msg
                if msg["t"] in ("stop", "refuse"):
                    raise AgentFailure(
                        f"agent {self.agent}: coordinator said {msg['t']}: {msg.get('reason', '')}"
                    )
            elif self.clock() - self.last_ctl > self.heartbeat_timeout:
                raise CoordinatorSilent(
                    f"agent {self.agent}: coordinator silent for {self.heartbeat_timeout:.1f} s"
                    + ("" if self.gate is None else self.gate.trouble_with("coordinator"))
                )
            self.report_refusals()

    def report_refusals(self) -> None:
        """Tell the coordinator about peers our gatekeeper refused (a bounded few)."""
        report = None if self.gate is None else self.gate.report(exclude="coordinator")
        if report is not None and self.send_ctl("refused", **report):
            self.gate.reported(report["total"])  # type: ignore[union-attr]

    def coordinator_lost(self) -> bool:
        return self.clock() - self.last_ctl > self.heartbeat_timeout

    # -- set-up ------------------------------------------------------------------------
    def setup(self, plan: Mapping[str, Any]) -> None:
        """Configure from the plan, then bind the data sockets."""
        self.configure(plan)
        self.bind_sockets(plan)

    def configure(self, plan: Mapping[str, Any]) -> None:
        """Everything a plan sets up apart from sockets (the lockstep engine uses this too)."""
        _import_modules(list(plan.get("modules", [])))
        self.plan = plan
        self.epoch = int(plan["epoch"])
        self.spec = spec_from_plan(plan)
        self.algorithm: Algorithm = algorithm_class(plan["algorithm"]["name"])(self.spec)
        self.sizes = dict(self.algorithm.payload_sizes())
        self.mode = plan["mode"]
        self.iterations = plan.get("iterations")
        self.seconds = plan.get("seconds")
        t = plan["timing"]
        self.period = float(t["period_ms"]) / 1000.0
        self.jitter = float(t["jitter"])
        self.speed = float(t.get("speed", 1.0))
        self.round_timeout = float(t["round_timeout_ms"]) / 1000.0
        tel = plan["telemetry"]
        self.every_iterations = int(tel["every_iterations"])
        self.every_s = float(tel["every_ms"]) / 1000.0
        self.batch_s = float(tel.get("batch_ms", 50.0)) / 1000.0
        self.keep_delays = bool(tel.get("delay_samples", False))
        self.rng = agent_generator(int(plan["seed"]), self.agent, purpose=1)
        self.rx = Receiver(
            self.agent,
            self.spec.in_neighbours,
            self.sizes,
            seed=int(plan["seed"]),
            mode=self.mode,
            period_s=self.period,
            keep_delays=self.keep_delays,
        )
        self.inlinks = self.rx.inlinks
        self._encode = self.rx.layout.encoder(self.agent, self.epoch)
        for entry in plan.get("faults", []):
            self.rx.add_fault(entry)

    def bind_sockets(self, plan: Mapping[str, Any]) -> None:
        self.pub = self.ctx.socket(zmq.PUB)
        self.pub.setsockopt(zmq.LINGER, 0)
        self.pub.setsockopt(zmq.SNDHWM, int(plan.get("hwm", 100000)))
        self.pub.setsockopt(zmq.MAXMSGSIZE, SUBSCRIPTION_MAX)
        self.pub.setsockopt(zmq.RCVHWM, SUBSCRIPTION_HWM)
        subscribers, self.publisher_keys = data_plane_keys(plan, self.keys, self.agent)
        if self.keys is not None:
            assert self.gate is not None
            # Our data go only to our out-neighbours' keys; we read only our in-neighbours.
            self.gate.allow(DATA_DOMAIN, subscribers)
            curve_server(self.pub, self.keys.public, self.keys.secret, DATA_DOMAIN)
            self.gate.watch(self.pub, "data", DATA_DOMAIN)
        if plan.get("transport") == "ipc":
            # Same machine: unix sockets skip the TCP stack (about 1.5x the rounds rate).
            self.endpoint = f"ipc://{plan['ipc_dir']}/a{self.agent}-e{self.epoch}"
            self.pub.bind(self.endpoint)
        else:
            bind_host = plan.get("bind_host", "127.0.0.1")
            port = self.pub.bind_to_random_port(f"tcp://{bind_host}")
            self.endpoint = f"tcp://{_advertise_host(bind_host, self.join)}:{port}"
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.RCVHWM, int(plan.get("hwm", 100000)))
        # Above the codec's bound on purpose: at the limit libzmq drops the connection, while
        # the codec refuses (and counts) a frame above MAX_DATA_FRAME and keeps the link;
        # twice the bound keeps what a peer can queue here at hwm * 2 MiB at most.
        self.sub.setsockopt(zmq.MAXMSGSIZE, 2 * MAX_DATA_FRAME)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"")
        if plan.get("transport") != "ipc":
            _detect_dead_links(self.pub, self.sub)
        if self.keys is not None:
            curve_client(self.sub, self.keys.public, self.keys.secret, self.keys.public)
        self._sub_poller = zmq.Poller()
        self._sub_poller.register(self.sub, zmq.POLLIN)
        self.connected: dict[int, str] = {}

    def apply_directive(self, msg: Mapping[str, Any]) -> None:
        entry = msg["fault"]
        if msg["action"] == "add":
            self.rx.add_fault(entry)
        else:
            self.rx.remove_fault(int(entry["index"]), entry["from"])
        self.send_ctl("ack", directive=msg["directive"], t_node=self.clock())

    def apply_peers(self, peers: Mapping[Any, Any]) -> None:
        assert self.sub is not None
        for key, entry in peers.items():
            j = int(key)
            link = self.inlinks.get(j)
            if link is None:
                continue
            endpoint, epoch = str(entry[0]), int(entry[1])
            # only announced incarnations are accepted; a restart: say so once it is heard
            if self.rx.announce(j, epoch) and epoch > 0:
                link.heard = False
                self.to_report[j] = epoch
            old = self.connected.get(j)
            if old != endpoint:
                if old is not None:
                    with contextlib.suppress(zmq.ZMQError):
                        self.sub.disconnect(old)
                if self.keys is not None:
                    server = self.publisher_keys.get(j)
                    if server is None:
                        raise AgentFailure(f"agent {self.agent}: the plan has no key for {j}")
                    self.sub.curve_serverkey = server  # read by this connect only
                self.sub.connect(endpoint)
                self.connected[j] = endpoint

    # -- data plane --------------------------------------------------------------------
    def publish(self, payload: Mapping[str, np.ndarray], iteration: int) -> None:
        assert self.pub is not None
        frame = self._encode(self.seq, iteration, self.clock(), payload)
        self.seq += 1
        self.sent += 1
        try:
            self.pub.send(frame, zmq.NOBLOCK)
        except zmq.Again:  # PUB does not raise at its mark, but be safe: counted by the gap
            pass

    def drain(self, now: float) -> int:
        """Handle every frame already queued on the data socket (in batches)."""
        assert self.sub is not None
        return receive_batch(self.sub, self.rx, now)

    def counters(self) -> dict[str, Any]:
        return {
            "sent": self.sent,
            "epoch": self.epoch,
            "unattributed_rejected": self.rx.unattributed_rejected,
            # in-neighbour -> frames claiming it that it never sent as such (node._receiver)
            "forged": self.rx.forged_by_link(),
            "refused_control": self.refused_control,
            "telemetry_dropped": self.telemetry_dropped,
            "age": self.rx.neighbour_age(self.iteration),
        }

    def sample(self, state: Any, now: float) -> None:
        pr = getattr(state, "priorities", None)
        row = getattr(state, "mixing_row", None)
        self.samples.append(
            [
                self.iteration,
                now,
                state.x.tolist(),
                None if pr is None else pr.tolist(),
                self.algorithm.local_value(state.x),
                None if row is None else {int(k): float(v) for k, v in row.items()},
            ]
        )

    def report_heard(self) -> None:
        for j, epoch in list(self.to_report.items()):
            link = self.inlinks[j]
            if link.heard and link.epoch == epoch and self.send_ctl("heard", sender=j, epoch=epoch):
                del self.to_report[j]

    def flush(self) -> None:
        if self.to_report:
            self.report_heard()
        if self.gate is not None:
            self.report_refusals()
        if not self.samples:
            return
        ok = self.send_ctl(
            "tel", samples=self.samples, links=self.rx.link_report(), counters=self.counters()
        )
        if ok:
            self.samples = []
        else:
            self.telemetry_dropped += 1

    # -- main phases -------------------------------------------------------------------
    def take_early(self, now: float) -> None:
        """Before go: probes are handled; data frames (a restarted agent's running
        neighbours) show who is heard and wait for go, when the fault clock is known."""
        assert self.sub is not None
        rx = self.rx
        while True:
            try:
                frame = self.sub.recv(zmq.NOBLOCK)
            except zmq.Again:
                return
            try:
                kind, sender, epoch, *_ = rx.layout.decode(frame)
            except WireError:
                rx.on_frame(frame, now)  # counted as refused, unattributed
                continue
            link = rx.inlinks.get(sender)
            if kind == PROBE or link is None:
                rx.on_frame(frame, now)
                continue
            if epoch == link.epoch:
                link.heard = True
            self.early.append((frame, now))

    def handshake(self) -> None:
        self.send_ctl(
            "hello",
            agent=self.agent,
            host=socket.gethostname(),
            pid=os.getpid(),
            version=VERSION,
            protocol=PROTOCOL,
        )
        plan = self.wait_ctl("plan")["plan"]
        self.setup(plan)
        self.send_ctl("bound", endpoint=self.endpoint)
        peers = self.wait_ctl("peers")
        self.apply_peers(peers["peers"])
        # Probe until every in-neighbour has been heard (slow joiners), then report ready
        # and keep probing until go, so that our out-neighbours can hear us too.
        assert self.pub is not None and self.sub is not None
        poller = zmq.Poller()
        poller.register(self.ctl, zmq.POLLIN)
        poller.register(self.sub, zmq.POLLIN)
        ready_sent = False
        next_probe = 0.0
        while True:
            now = self.clock()
            if now >= next_probe:
                with contextlib.suppress(zmq.Again):
                    self.pub.send(encode_probe(self.agent, self.epoch, now), zmq.NOBLOCK)
                next_probe = now + 0.003
            events = dict(poller.poll(3))
            if self.sub in events:
                self.take_early(now)
            if not ready_sent and self.rx.all_heard():
                self.send_ctl("ready")
                ready_sent = True
            if self.ctl in events:
                for msg in self.pending_control():
                    if msg["t"] == "go":
                        self.start_node = float(msg["start_node"])
                        self.rx.start = self.start_node
                        # data that came before go is handled now that the run's clock is
                        # known (fault windows count from it), with its arrival times
                        early, self.early = self.early, []
                        for frame, t in early:
                            self.rx.on_frame(frame, t)
                        self.iteration = int(msg["iteration"])
                        return
                    elif msg["t"] == "stop":
                        raise AgentFailure(f"agent {self.agent}: stopped before go")
            if self.gate is not None:
                self.report_refusals()
            if self.coordinator_lost():
                raise CoordinatorSilent(
                    f"agent {self.agent}: coordinator silent for "
                    f"{self.heartbeat_timeout:.1f} s during handshake"
                )

    def initial(self) -> tuple[Any, dict]:
        state, out = self.algorithm.init()
        start_state = self.plan.get("start_state")
        if start_state is not None:  # a restart that keeps its last reported state
            x = np.asarray(start_state, dtype=float)
            state = self.algorithm.restart_from(state, x)
            if "x" in out:
                out = {**out, "x": x}
        return state, out

    def pending_control(self) -> Iterator[dict[str, Any]]:
        """The control messages waiting now, peer-table updates already applied."""
        while (frame := self.next_ctl(0)) is not None:
            msg = self.handle_ctl(frame)
            if msg is None:
                continue
            if msg["t"] == "peers":
                self.apply_peers(msg["peers"])
                continue
            yield msg

    def control_tick(self) -> bool:
        """Handle pending control messages; True when the run must end now."""
        for msg in self.pending_control():
            if msg["t"] == "stop":
                return True
        return self.coordinator_lost()

    def check_state(self, state: Any) -> None:
        x = state.x
        # One reduction: NaN fails the comparison, infinity and huge values exceed it.
        if not float(np.dot(x, x)) < DIVERGED * DIVERGED:
            raise _Diverged(self.iteration)

    def run_loop(self) -> tuple[Any, str]:
        state, out = self.initial()
        budget = self.iterations
        # Wait for the common start time.
        while self.clock() < self.start_node:
            if self.control_tick():
                return state, self.stop_reason or "coordinator lost"
            time.sleep(min(0.001, max(0.0, self.start_node - self.clock())))
        if self.mode == "rounds":
            return self.rounds(state, out, budget)
        return self.asynchronous(state, out, budget)

    def after_step(self, state: Any, now: float) -> bool:
        """Sample and flush telemetry when due; True when the run must end now."""
        if self._sample_due(now):
            self.sample(state, now)
            self._next_sample = now + self.every_s
        if now >= self._next_flush:
            self.flush()
            self._next_flush = now + self.batch_s
            return self.control_tick()
        return False

    def _sample_due(self, now: float) -> bool:
        if self.every_iterations > 0:
            return self.iteration % self.every_iterations == 0
        return now >= self._next_sample

    def rounds(self, state: Any, out: dict, budget: int | None) -> tuple[Any, str]:
        assert self.sub is not None
        deadline = None if self.seconds is None else self.start_node + float(self.seconds)
        self._next_sample = self.start_node
        self._next_flush = self.clock() + self.batch_s
        sub = self.sub
        poller = zmq.Poller()
        poller.register(sub, zmq.POLLIN)
        poller.register(self.ctl, zmq.POLLIN)
        awaited = list(self.inlinks.values())
        now = self.clock()
        self.sample(state, now)
        while True:
            k = self.iteration
            if budget is not None and k >= budget:
                return state, "budget"
            if deadline is not None and now >= deadline:
                return state, "budget"
            self.publish(out, k)
            # Barrier: a message of iteration >= k from every awaited in-neighbour. Block in
            # one poll on both sockets (no busy wake-ups: 32 agents share two cores).
            t0 = self.clock()
            given_up = False
            while True:
                missing = False
                for link in awaited:
                    if link.stale:
                        given_up = True
                    elif link.last_iter < k:
                        missing = True
                        break
                if not missing:
                    break
                left = self.round_timeout - (self.clock() - t0)
                if left <= 0.0:
                    for link in awaited:
                        if not link.stale and link.last_iter < k:
                            link.stale = True
                    given_up = True
                    break
                events = poller.poll(min(left, 0.25) * 1000.0)
                if not events and self.coordinator_lost():
                    return state, "coordinator lost"
                for sock, _ in events:
                    # One frame per readiness: poll is level-triggered, so the next poll
                    # returns at once while frames remain (cheaper than draining to Again).
                    if sock is sub:
                        self.rx.on_frame(sub.recv(zmq.NOBLOCK), self.clock())
                    elif self.control_tick():
                        return state, self.stop_reason or "coordinator lost"
            now = self.clock()
            if given_up:
                # Take in whatever else is queued, so that a neighbour given up on (stale) is
                # heard again as soon as it speaks, even when nobody is awaited this round.
                self.drain(now)
            self.rx.release(float(k), now)
            state, out = self.algorithm.step(state, self.rx.inbox(), k)
            self.iteration = k + 1
            self.check_state(state)
            if self.after_step(state, now):
                return state, self.stop_reason or "coordinator lost"

    def asynchronous(self, state: Any, out: dict, budget: int | None) -> tuple[Any, str]:
        assert self.sub is not None
        deadline = None if self.seconds is None else self.start_node + float(self.seconds)
        self._next_sample = self.start_node
        self._next_flush = self.clock() + self.batch_s
        poller = zmq.Poller()
        poller.register(self.sub, zmq.POLLIN)
        poller.register(self.ctl, zmq.POLLIN)
        next_step = self.start_node
        now = self.clock()
        self.sample(state, now)
        self.publish(out, self.iteration)
        while True:
            if budget is not None and self.iteration >= budget:
                return state, "budget"
            now = self.clock()
            if deadline is not None and now >= deadline:
                return state, "budget"
            wait = next_step - now
            if wait > 0:
                events = dict(poller.poll(max(0, int(wait * 1000))))
                now = self.clock()
                if self.sub in events:
                    self.drain(now)
                if self.ctl in events and self.control_tick():
                    return state, self.stop_reason or "coordinator lost"
                if now < next_step:
                    continue
            self.drain(now)
            self.rx.release(now, now)
            k = self.iteration
            state, out = self.algorithm.step(state, self.rx.inbox(), k)
            self.iteration = k + 1
            self.check_state(state)
            self.publish(out, self.iteration)
            period = self.period * self.speed * self.slow_factor
            if self.jitter > 0.0:
                period *= 1.0 + self.jitter * (2.0 * self.rng.random() - 1.0)
            next_step = max(next_step + period, now - 10 * period)
            if self.after_step(state, now):
                return state, self.stop_reason or "coordinator lost"

    def finish(self, state: Any, reason: str) -> None:
        now = self.clock()
        self.sample(state, now)
        final_state = {"x": state.x.tolist()}
        pr = getattr(state, "priorities", None)
        if pr is not None:
            final_state["priorities"] = pr.tolist()
        row = getattr(state, "mixing_row", None)
        if row is not None:
            final_state["mixing_row"] = {int(k): float(v) for k, v in row.items()}
        self.flush()
        self.send_ctl(
            "final",
            state=final_state,
            iteration=self.iteration,
            links=self.rx.link_report(with_delays=self.keep_delays),
            counters=self.counters(),
            reason=reason,
        )

    def run(self) -> int:
        try:
            self.handshake()
            try:
                state, reason = self.run_loop()
            except _Diverged as d:
                self.flush()
                self.send_ctl(
                    "failed",
                    error=f"diverged: agent {self.agent} state left"
                    f" the bounded region at iteration {d.iteration}",
                )
                self._wait_stop(2.0)
                return 4
            if reason == "coordinator lost" or self.coordinator_lost():
                print(
                    f"agent {self.agent}: coordinator silent for {self.heartbeat_timeout:.1f} s;"
                    " exiting",
                    file=sys.stderr,
                    flush=True,
                )
                return EXIT_COORDINATOR_SILENT
            self.finish(state, reason)
            if self.life.phase is Phase.RUNNING:
                self.life.finished()
            self._wait_stop(self.heartbeat_timeout)
            return 0
        except AgentFailure as exc:
            with contextlib.suppress(Exception):
                self.send_ctl("failed", error=str(exc))
            print(str(exc), file=sys.stderr, flush=True)
            return EXIT_COORDINATOR_SILENT if isinstance(exc, CoordinatorSilent) else 3
        except Exception as exc:
            msg = f"agent {self.agent}: {type(exc).__name__}: {exc}"
            with contextlib.suppress(Exception):
                self.send_ctl("failed", error=msg)
            traceback.print_exc()
            return 2
        finally:
            self.close()

    def _wait_stop(self, timeout: float) -> None:
        end = self.clock() + timeout
        while self.stop_reason is None and self.clock() < end and not self.coordinator_lost():
            if self.ctl.poll(50):
                with contextlib.suppress(Exception):
                    self.handle_ctl(self.ctl.recv())
            if self.sub is not None:
                # Keep the socket drained so the sender never sees back-pressure; what
                # arrives now is past the final report and counts as in flight.
                with contextlib.suppress(zmq.ZMQError):
                    while self.sub.poll(0):
                        self.sub.recv(zmq.NOBLOCK)

    def close(self) -> None:
        for s in (self.pub, self.sub, self.ctl):
            if s is not None:
                s.close(linger=0)
        if self.gate is not None:
            self.gate.stop()
        self.ctx.term()


class SelfCrash(BaseException):
    """The coordinator told this agent to crash and join again after ``after`` seconds: the
    incarnation ends at once (no final report, sockets closed), past every handler."""

    def __init__(self, after: float) -> None:
        self.after = after


class _Diverged(Exception):
    def __init__(self, iteration: int) -> None:
        self.iteration = iteration


def _shifted_clock(agent: int) -> Any:
    """Test-only: this agent's clock moved by a known offset (see CLOCK_SHIFT_ENV)."""
    spec = os.environ.get(CLOCK_SHIFT_ENV, "")
    for part in spec.split(","):
        key, sep, value = part.partition("=")
        if sep and key.strip() == str(agent):
            shift = float(value)
            mono = time.monotonic
            return lambda: mono() + shift
    return time.monotonic


def main(
    join: str, agent: int, heartbeat_timeout: float = 3.0, keys: str | os.PathLike | None = None
) -> int:
    """Entry point of one agent process (``swarmrig node``); ``keys``: the key directory."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the coordinator decides when to stop
    stop = {"flag": False}

    def _term(signum: int, frame: Any) -> None:
        # Graceful: the loop notices through its control checks; a second TERM kills.
        if stop["flag"]:
            os._exit(143)
        stop["flag"] = True
        raise SystemExit(143)

    signal.signal(signal.SIGTERM, _term)
    agent_keys = None
    if keys is not None:
        from node._security import KeyMaterialError

        try:
            agent_keys = load_agent_keys(keys, agent)
        except KeyMaterialError as exc:
            print(f"agent {agent}: {exc}", file=sys.stderr)
            return 2
    while True:
        node = Node(
            join,
            agent,
            heartbeat_timeout=heartbeat_timeout,
            clock=_shifted_clock(agent),
            keys=agent_keys,
        )
        try:
            return node.run()
        except SelfCrash as crash:
            print(
                f"agent {agent}: crashed on the coordinator's word; joining again in "
                f"{crash.after:g} s",
                file=sys.stderr,
                flush=True,
            )
            time.sleep(crash.after)
