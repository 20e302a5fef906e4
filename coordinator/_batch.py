"""The batch engine: a rounds-mode run of the whole swarm as arrays, several seeds at once.

It steps the array form of the algorithm (:class:`node.BlockAlgorithm`) on one block that
holds every agent of every seed (one block row per agent, seeds stacked), makes the link
fault decisions of every directed link at once with :class:`node._linkarrays.LinkArrays`
(the same pure functions of seed, link, fault and sequence number as an agent's
:class:`node._links.LinkModel`), and hands telemetry and final reports to the unchanged
:class:`~coordinator._run.Coordinator` handlers, so that the run directory, metrics.csv,
links.csv and summary.json come out of the same code as for any other engine.

It follows the lockstep engine round for round (see :mod:`coordinator._lockstep`): round k
at virtual time ``k * period_s``; timeline actions due by then; every agent publishes its
payload of iteration k with sequence number k; every in-link decides (drop, corrupt ->
rejected, duplicate, delay counted in whole rounds, FIFO); what is due is released, newest
sequence number last; every agent steps; divergence is checked; samples are taken as a
node takes them. No sockets, no subprocesses. What it cannot reproduce it refuses before
anything is written (:func:`check_batch`): async mode, process faults and per-agent user
algorithms.

Differences from the other engines, none of which touches a figure: each agent's samples
reach the coordinator as one telemetry batch when the run stops (a live view is called every
200 rounds, and fills at the end). ``wall_s``, ``startup_s``, ``run_s`` and ``iterations_per_s`` are this
process's own; with several seeds ``run_s`` is the time of the joint loop.
"""

from __future__ import annotations

import contextlib
import signal
import socket
import tempfile
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from coordinator._batch_engine import Engine
from coordinator._lockstep import write_virtual_run_json
from coordinator._metrics import AgentRecord
from coordinator._run import Coordinator, RunFailed, RunOptions, RunResult, _Agent
from coordinator._swarm import LINK_FAULTS, PROCESS_FAULTS, Swarm
from node._algorithm import BlockAlgorithm, algorithm_class
from node._links import LinkFault
from node._wire import encode_control
from topologies._errors import ScenarioError

__all__ = ["BatchCoordinator", "check_batch", "execute_batch", "run_batch"]


def check_batch(swarm: Swarm) -> None:
    """Raise ScenarioError, naming the key, if the batch engine cannot run ``swarm``."""
    s = swarm.scenario
    if s.mode != "rounds":
        raise ScenarioError(
            f"{s.source}: [swarm].mode: the batch engine runs rounds mode only, got"
            f' {s.mode!r}; run it with the "processes" engine'
        )
    for f in s.faults:
        if f["kind"] in PROCESS_FAULTS:
            raise ScenarioError(
                f"{s.source}: fault[{f['index']}].kind: {f['kind']!r} is a process fault, which"
                f" the batch engine cannot model; expected a link fault"
                f' ({", ".join(sorted(LINK_FAULTS))}) or the "processes" engine'
            )
    cls = algorithm_class(swarm.algorithm["name"])
    if not issubclass(cls, BlockAlgorithm):
        raise ScenarioError(
            f"{s.source}: [algorithm].name: {cls.name!r} is written per agent"
            " (node.Algorithm); the batch engine runs algorithms in array form"
            ' (node.BlockAlgorithm); run it with the "lockstep" or "processes" engine'
        )


class BatchCoordinator(Coordinator):
    """One seed's coordinator in a batch: run directory, timeline, results of the base
    class; launch, handshake and run phase replaced by the joint array loop."""

    def __init__(self, swarm: Swarm, options: RunOptions) -> None:
        check_batch(swarm)
        if options.listen is not None or not options.launch_local:
            raise RunFailed(
                "RunOptions.listen / launch_local: the batch engine runs every agent inside"
                " this process; it cannot wait for agents on other machines"
            )
        super().__init__(swarm, options)
        self.period_s = float(self.s.timing["period_ms"]) / 1000.0
        self.vnow = 0.0
        self.engine: Engine | None = None
        self.seed_index = 0

    def now_s(self) -> float:
        return self.vnow

    def event(self, name: str, /, **fields: Any) -> None:
        self.dir.event({"t_s": round(self.now_s(), 6), "event": name, **fields})

    def agent_time_origin(self, a: _Agent) -> float:
        return 0.0  # agent times are virtual and start at 0

    def send(self, agent: _Agent, kind: str, **fields: Any) -> None:
        """Coordinator -> agent: a fault directive switches the fault on the agent's
        in-links and is acknowledged at once, on the virtual clock; nothing else acts."""
        if kind != "directive" or self.engine is None:
            return
        entry = fields["fault"]
        fault = LinkFault.from_wire(entry.get("fault", entry))
        senders = entry.get("from", [])
        self.engine.switch(self.seed_index, agent.id, fault, senders, fields["action"] == "add")
        self.event(
            "fault-applied",
            fault=fault.index,
            directive=int(fields["directive"]),
            action=fields["action"],
            agent=agent.id,
            t_node_s=self.vnow,
        )

    def launch(self) -> None:
        write_virtual_run_json(self, "batch")

    def handshake(self) -> None:
        host = socket.gethostname()
        for a in self.agents:
            a.ident = f"batch-{a.id}".encode()
            self.by_ident[a.ident] = a.id
            a.host, a.epoch, a.offset = host, 0, 0.0
            a.records.append(AgentRecord(agent=a.id, epoch=0, offset=0.0))
            a.ready = a.running = True

    def to_coordinator(self, agent: int, kind: str, **fields: Any) -> None:
        """Agent -> coordinator through the control codec and the base class's handler."""
        self.on_message(self.agents[agent].ident, encode_control(kind, **fields))  # type: ignore[arg-type]

    def stop_all(self, reason: str) -> None:
        if self.engine is not None:
            self.engine.finish(self.seed_index, reason)

    def execute(self) -> RunResult:
        return execute_many([self])[0]


def execute_many(coords: Sequence[BatchCoordinator]) -> list[RunResult]:
    """Run several seeds' coordinators as one batch; what Coordinator.execute does for one."""
    for c in coords:
        c.dir.write_text("scenario.toml", c.s.to_toml())
        c.dir.write_json("agents.json", c.swarm.agents_json())
    handlers = _install_signals(coords)
    engine: Engine | None = None
    try:
        try:
            for c in coords:
                c.launch()
                c.handshake()
                c.write_run_json(exit="running", handshake_s=c.clock() - c.t_launch)
            engine = Engine(coords)
            engine.run()
        except KeyboardInterrupt:
            _fail_all(coords, engine, "interrupted (SIGINT)", 130)
        except Exception as exc:
            reason = f"coordinator error: {type(exc).__name__}: {exc}"
            for c in coords:
                c.event("coordinator-error", error=reason)
            _fail_all(coords, engine, reason, 2)
    finally:
        for sig, h in handlers.items():
            signal.signal(sig, h)
    results = []
    for c in coords:
        c.event("stop", reason=c.exit_reason)
        result = c.results()
        c.show(final=True, summary=result.summary)
        c.write_run_json(
            exit=c.exit_reason,
            exit_code=c.exit_code,
            stopped_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            verdict=result.summary["verdict"],
        )
        c.dir.close()
        results.append(result)
    return results


def _fail_all(coords: Sequence[BatchCoordinator], engine: Any, reason: str, code: int) -> None:
    for i, c in enumerate(coords):
        if engine is not None and engine.stopped[i] is not None:
            continue
        c.exit_reason, c.exit_code = reason, code
        c.t_end = c.clock()
        with contextlib.suppress(Exception):
            c.stop_all(reason)


def _install_signals(coords: Sequence[BatchCoordinator]) -> dict[int, Any]:
    if threading.current_thread() is not threading.main_thread():
        return {}

    def handler(signum: int, frame: Any) -> None:
        name = signal.Signals(signum).name
        if any(c.stop_requested for c in coords):
            raise KeyboardInterrupt
        for c in coords:
            c.stop_requested = f"interrupted ({name})"

    return {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}


def execute_batch(swarm: Swarm, options: RunOptions | None = None) -> RunResult:
    """Run ``swarm`` with the batch engine; the run directory is complete on return.

    Same run directory and RunResult as :func:`coordinator._run.execute`; run.json says
    ``engine: "batch"``. Raises ScenarioError (naming the key) for what the batch engine
    cannot reproduce, before writing anything.
    """
    return BatchCoordinator(swarm, options or RunOptions(engine="batch")).execute()


def run_batch(
    scenario: Any,
    seeds: Sequence[int],
    *,
    out: str | Path | None = None,
    label: str | None = None,
) -> list[dict[str, Any]]:
    """Run one scenario under several seeds at once (batch engine); per-seed summaries.

    ``scenario`` is anything :func:`coordinator.load` takes (path, demo name, dict,
    Scenario) or a Swarm; its ``[swarm].seed`` is replaced by each of ``seeds`` in turn
    (graphs, objectives, initial data and fault decisions all follow the seed). Seeds whose
    algorithm configuration agrees (for instance a default priority gain that depends on a
    random graph) run as one block; the others in further blocks.

    ``out``: a directory that receives one complete run directory per seed,
    ``<out>/seed-<seed>``; None keeps them in a temporary directory removed on return.
    Returns, in the order of ``seeds``, each run's summary.json content (its ``run_dir``
    names the directory, gone when ``out`` is None). Raises ScenarioError, naming the key,
    before anything runs if the batch engine cannot reproduce the scenario.
    """
    from coordinator._api import load
    from coordinator._scenario import Scenario, load_scenario

    if isinstance(scenario, Swarm):
        base = scenario.scenario
    elif isinstance(scenario, Scenario):
        base = scenario
    else:
        base = load(scenario).scenario
    seeds = [int(x) for x in seeds]
    if not seeds:
        return []
    swarms = []
    for seed in seeds:
        raw = base.to_dict()
        raw["swarm"] = {**raw["swarm"], "seed": seed}
        sw = load(load_scenario(raw, source=base.source))
        check_batch(sw)
        swarms.append(sw)
    tmp = None
    root = Path(out) if out is not None else Path(tmp := tempfile.mkdtemp(prefix="swarmrig-batch-"))
    try:
        groups: dict[str, list[int]] = {}
        for k, sw in enumerate(swarms):
            groups.setdefault(repr(sw.algorithm), []).append(k)
        summaries: list[dict[str, Any] | None] = [None] * len(seeds)
        for members in groups.values():
            coords = [
                BatchCoordinator(
                    swarms[k],
                    RunOptions(out=root / f"seed-{seeds[k]}", engine="batch", label=label),
                )
                for k in members
            ]
            for k, result in zip(members, execute_many(coords), strict=True):
                summaries[k] = result.summary
        return summaries  # type: ignore[return-value]
    finally:
        if tmp is not None:
            import shutil

            shutil.rmtree(tmp, ignore_errors=True)
