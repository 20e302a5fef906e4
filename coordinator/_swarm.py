"""From a validated scenario to a concrete swarm: graph, objectives, initial data, plans.

Everything random here comes from the scenario seed through node._rng.agent_generator,
with one purpose number per kind of draw, so a seed fixes the whole swarm.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

import topologies as topo
from coordinator._reference import Reference, reference_optimum
from coordinator._scenario import Scenario
from coordinator._scopes import links_in_scope
from node._algorithm import StepRule, algorithm_class
from node._links import LinkFault
from node._objectives import Objective, objective_from_spec
from node._rng import agent_generator
from topologies._errors import ScenarioError

__all__ = ["LINK_FAULTS", "PROCESS_FAULTS", "Swarm", "build_swarm", "with_transport"]

LINK_FAULTS = frozenset({"loss", "burst-loss", "delay", "duplicate", "corrupt", "outage"})
PROCESS_FAULTS = frozenset({"crash", "pause", "slow"})

# purpose numbers for agent_generator: one independent stream per kind of draw
_TARGET, _CURVATURE, _DATA, _INITIAL = 2, 3, 4, 5


@dataclass(frozen=True, slots=True, kw_only=True)
class Swarm:
    scenario: Scenario
    topology: topo.Topology
    objectives: tuple[Objective, ...]
    objective_specs: tuple[dict[str, Any], ...]
    initial_states: np.ndarray  # (n, d)
    initial_priorities: np.ndarray | None  # (n, n) or None (uniform, nothing to average)
    intended: np.ndarray  # (n,) the average of the initial vectors
    weights: np.ndarray  # (n, n) mixing matrix handed to the agents
    reference: Reference
    algorithm: dict[str, Any]
    #: per receiving agent: link faults armed from the start, as wire entries
    armed_faults: dict[int, list[dict[str, Any]]] = field(default_factory=dict)
    #: time-windowed link faults, sent as directives when their time comes
    timed_faults: list[dict[str, Any]] = field(default_factory=list)
    process_faults: list[dict[str, Any]] = field(default_factory=list)
    telemetry: dict[str, Any] = field(default_factory=dict)
    #: data-plane transport chosen for this run ("ipc" only when every agent is local)
    transport: str = "tcp"
    ipc_dir: str | None = None

    @property
    def n(self) -> int:
        return self.topology.n

    def plan(
        self, agent: int, epoch: int, *, start_state: Any = None, start_iteration: int = 0
    ) -> dict[str, Any]:
        """Everything agent ``agent`` needs, as plain data for the control channel."""
        s = self.scenario
        top = self.topology
        ins = top.in_neighbours(agent)
        outs = top.out_neighbours(agent)
        weights = {j: float(self.weights[agent, j]) for j in (*ins, agent)}
        speed = 1.0
        override = s.agent_overrides.get(agent, {})
        if "speed" in override:
            speed = float(override["speed"])
        elif s.timing["speed_spread"] > 0:
            g = agent_generator(s.seed, agent, purpose=6)
            spread = s.timing["speed_spread"]
            speed = float(g.uniform(1.0 - spread, 1.0 + spread))
        return {
            "agent": agent,
            "epoch": epoch,
            "n_agents": self.n,
            "dimension": s.dimension,
            "seed": s.seed,
            "mode": s.mode,
            "iterations": s.iterations,
            "seconds": s.seconds,
            "algorithm": self.algorithm,
            "objective": self.objective_specs[agent],
            "in_neighbours": list(ins),
            "out_neighbours": list(outs),
            "weights": weights,
            "in_neighbour_out_degree": {j: len(top.out_neighbours(j)) for j in ins},
            "initial_state": self.initial_states[agent].tolist(),
            "initial_priorities": None
            if self.initial_priorities is None
            else self.initial_priorities[agent].tolist(),
            "timing": {
                "period_ms": s.timing["period_ms"],
                "jitter": s.timing["jitter"],
                "speed": speed,
                "round_timeout_ms": s.timing["round_timeout_ms"],
            },
            "telemetry": self.telemetry,
            "faults": self.armed_faults.get(agent, []),
            "bind_host": s.network.get("host", "127.0.0.1"),
            "transport": self.transport,
            "ipc_dir": self.ipc_dir,
            "modules": list(self.algorithm.get("modules", [])),
            "start_state": start_state,
            "start_iteration": start_iteration,
        }

    def agents_json(self) -> list[dict[str, Any]]:
        top = self.topology
        return [
            {
                "id": i,
                "in_neighbours": list(top.in_neighbours(i)),
                "out_neighbours": list(top.out_neighbours(i)),
                "objective": self.objective_specs[i],
                "initial_state": self.initial_states[i].tolist(),
                "initial_priorities": None
                if self.initial_priorities is None
                else self.initial_priorities[i].tolist(),
            }
            for i in range(self.n)
        ]


def _topology(s: Scenario) -> topo.Topology:
    params = {k: v for k, v in s.topology.items() if k not in ("shape", "directed", "file")}
    where = f"{s.source}: [topology]"
    if s.topology["shape"] == "file":
        try:
            t = topo.load(s.topology["file"], directed=s.topology.get("directed"))
        except ScenarioError as exc:
            raise ScenarioError(f"{where}.file: {exc}") from None
        if t.n != s.agents:
            raise ScenarioError(
                f"{where}.file: the graph has {t.n} agents; [swarm].agents says {s.agents}"
            )
        return t
    try:
        return topo.build(s.topology["shape"], s.agents, seed=s.seed, where=where, **params)
    except ScenarioError as exc:
        msg = str(exc)
        raise ScenarioError(msg if msg.startswith(s.source) else f"{s.source}: {msg}") from None


def _random_spd(g: np.random.Generator, d: int, condition: float) -> np.ndarray:
    q, _ = np.linalg.qr(g.standard_normal((d, d)))
    eig = np.exp(g.uniform(0.0, np.log(condition), size=d))
    eig[0], eig[-1] = 1.0, condition  # the stated condition number, exactly
    if d == 1:
        eig[0] = 1.0
    return (q * eig) @ q.T


def _objective_spec(s: Scenario, agent: int) -> dict[str, Any]:
    o = s.objective
    kind = o["kind"]
    d = s.dimension
    override = s.agent_overrides.get(agent, {})
    if kind == "quadratic":
        if "target" in override:
            target = np.asarray(override["target"], dtype=float)
        else:
            target = agent_generator(s.seed, agent, _TARGET).uniform(-1.0, 1.0, d) * o["spread"]
        if "curvature" in override:
            curv = np.asarray(override["curvature"], dtype=float)
        elif o.get("curvature", "identity") == "random":
            curv = _random_spd(agent_generator(s.seed, agent, _CURVATURE), d, o["condition"])
        else:
            curv = np.eye(d)
        return {
            "kind": "quadratic",
            "target": target.tolist(),
            "curvature": curv.tolist(),
            "agent": agent,
        }
    if kind in ("logistic", "huber"):
        # Draw the local data here so agents.json carries it and anyone can re-solve.
        from node._objectives import objective_from_spec as build

        extra = {k: v for k, v in o.items() if k not in ("kind", "samples")}
        spec = {
            "kind": kind,
            "seed": s.seed,
            "agent": agent,
            "samples": int(o["samples"]),
            "dimension": d,
            **extra,
        }
        return build(spec).spec()
    if kind == "custom":
        return {"kind": "custom", "function": o["function"], "dimension": d, "agent": agent}
    raise ScenarioError(f"{s.source}: [objective].kind: {kind!r} is not known")


def _faults(s: Scenario, top: topo.Topology) -> tuple[dict, list, list]:
    armed: dict[int, list[dict[str, Any]]] = {}
    timed: list[dict[str, Any]] = []
    process: list[dict[str, Any]] = []
    for f in s.faults:
        where = f"{s.source}: [[fault]] #{f['index']}"
        if f["kind"] in PROCESS_FAULTS:
            process.append(f)
            continue
        links = links_in_scope(f["scope"], top, where=f"{where}: links")
        start_s = f.get("start_s")
        start_it = f.get("start_iteration")
        end_s = None if f.get("duration_s") is None else (start_s or 0.0) + f["duration_s"]
        end_it = (
            None
            if f.get("duration_iterations") is None
            else (start_it or 0) + f["duration_iterations"]
        )
        by_iteration = start_it is not None or f.get("duration_iterations") is not None
        fault = LinkFault(
            index=f["index"],
            kind=f["kind"],
            params=dict(f["params"]),
            start_s=None if by_iteration else (start_s or 0.0),
            end_s=None if by_iteration else end_s,
            start_iteration=(start_it or 0) if by_iteration else None,
            end_iteration=end_it if by_iteration else None,
        )
        per_receiver: dict[int, list[int]] = {}
        for src, dst in links:
            per_receiver.setdefault(dst, []).append(src)
        entries = {
            dst: {"fault": fault.to_wire(), "from": srcs} for dst, srcs in per_receiver.items()
        }
        if by_iteration or (start_s or 0.0) == 0.0:
            # Iteration windows are armed from the start so that rounds mode repeats exactly;
            # the node enforces the window on every message's iteration (or time).
            for dst, e in entries.items():
                armed.setdefault(dst, []).append(e)
        else:
            timed.append(
                {
                    "index": f["index"],
                    "at_s": start_s,
                    "until_s": end_s,
                    "kind": f["kind"],
                    "entries": entries,
                    "links": links,
                }
            )
    return armed, timed, process


def build_swarm(s: Scenario) -> Swarm:
    """Resolve a validated scenario into a swarm; raises ScenarioError naming the key."""
    top = _topology(s)
    if s.algorithm.get("module"):
        # the user's module registers its algorithm here too, as it will in every agent
        try:
            importlib.import_module(s.algorithm["module"])
        except ImportError as exc:
            raise ScenarioError(
                f"{s.source}: [algorithm].module: cannot import {s.algorithm['module']!r}: {exc}"
            ) from None
    cls = algorithm_class(s.algorithm["name"])
    if top.directed and not cls.directed_ok:
        raise ScenarioError(
            f"{s.source}: [algorithm].name: {cls.name!r} needs an undirected graph; the topology "
            "is directed (use push-sum or ratio-consensus)"
        )
    n, d = top.n, s.dimension
    specs = tuple(_objective_spec(s, i) for i in range(n))
    objectives = tuple(objective_from_spec(sp) for sp in specs)
    x0 = np.zeros((n, d))
    for i in range(n):
        if "initial_state" in s.agent_overrides.get(i, {}):
            x0[i] = np.asarray(s.agent_overrides[i]["initial_state"], dtype=float)
    prio = None
    pr = s.priorities or {}
    if pr.get("initial") is not None or any(
        "initial_priorities" in s.agent_overrides.get(i, {}) for i in range(n)
    ):
        prio = np.full((n, n), 1.0 / n)
        if pr.get("initial") is not None:
            prio = np.asarray(pr["initial"], dtype=float).copy()
        for i in range(n):
            if "initial_priorities" in s.agent_overrides.get(i, {}):
                prio[i] = np.asarray(s.agent_overrides[i]["initial_priorities"], dtype=float)
    elif cls.uses_priorities:
        prio = np.full((n, n), 1.0 / n)
    intended = np.full(n, 1.0 / n) if prio is None else prio.mean(axis=0)
    if top.directed:
        weights = np.zeros((n, n))
        for i in range(n):
            ins = top.in_neighbours(i)
            for j in (*ins, i):
                weights[i, j] = 1.0 / (len(ins) + 1)
    else:
        weights = topo.metropolis_weights(top)
    params = {k: v for k, v in s.algorithm.items() if k not in ("name", "step", "module", "params")}
    params.update(s.algorithm.get("params", {}))
    if cls.uses_priorities:
        gain = pr.get("gain")
        bound = topo.laplacian_step_bound(top)
        if gain is None:
            gain = 0.5 * bound
        elif gain >= bound:
            raise ScenarioError(
                f"{s.source}: [priorities].gain: {gain} must be below 1 / max degree = {bound:.6g}"
                " (Olfati-Saber, Fax, Murray 2007)"
            )
        params.setdefault("gain", float(gain))
    algorithm = {
        "name": cls.name,
        "step": StepRule.from_spec(s.algorithm.get("step", 0.05)).spec(),
        "params": params,
        "modules": [s.algorithm["module"]] if s.algorithm.get("module") else [],
    }
    ref = reference_optimum(objectives, intended)
    armed, timed, process = _faults(s, top)
    every_it = int(s.telemetry.get("every_iterations", 0))
    if every_it == 0 and s.mode == "rounds" and s.iterations:
        every_it = max(1, s.iterations // 400)
    telemetry = {
        "every_iterations": every_it,
        "every_ms": float(s.telemetry.get("every_ms", 20.0)),
        "batch_ms": float(s.telemetry.get("batch_ms", 50.0)),
        "delay_samples": bool(s.telemetry.get("delay_samples", False)),
    }
    return Swarm(
        scenario=s,
        topology=top,
        objectives=objectives,
        objective_specs=specs,
        initial_states=x0,
        initial_priorities=prio,
        intended=intended,
        weights=weights,
        reference=ref,
        algorithm=algorithm,
        armed_faults=armed,
        timed_faults=timed,
        process_faults=process,
        telemetry=telemetry,
    )


def with_transport(swarm: Swarm, transport: str, ipc_dir: str | None) -> Swarm:
    """The same swarm with the data-plane transport fixed for one run."""
    return replace(swarm, transport=transport, ipc_dir=ipc_dir)
