"""The sans-IO algorithm contract (array form over a block of agents), the registry, and
the step-size rules.

Built-in algorithms are written once, in array form (:class:`BlockAlgorithm`): a step works
on a :class:`Block` of agents, with states as arrays (agents x ...) and what the agents hold
from their in-links as arrays indexed by directed link (:class:`Heard`). The agent process
and the lockstep engine run a block of one through the per-agent methods ``init``/``step``
(which convert an inbox to link arrays and back); the batch engine runs a whole swarm, and
several seeds stacked as one block, through ``start``/``advance``. A user algorithm may
still subclass the per-agent :class:`Algorithm` directly (the batch engine refuses it).

Rules (the runtime, the lockstep runner and the tests all rely on them):

* An algorithm instance holds only immutable configuration (its :class:`AgentSpec`).
  All evolving data lives in a state record returned by :meth:`Algorithm.init` and
  :meth:`Algorithm.step`; a state is never mutated after it is returned.
* ``step(state, inbox, k)`` is pure: no sockets, no clocks, no randomness. ``inbox`` maps
  each in-neighbour id to the latest :class:`Received` from it (absent if nothing ever
  arrived); ``Received.fresh`` says whether it arrived since the previous step.
* Every algorithm broadcasts one payload to all its out-neighbours per step: a mapping of
  names to 1-D float64 arrays whose lengths are declared by :meth:`Algorithm.payload_sizes`.
* Every state exposes ``x`` (the agent's estimate, shape (d,)) and ``priorities``
  (shape (n,) or None); the telemetry reads only these two and ``local_value``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar, NamedTuple

import numpy as np

from node._errors import ObjectiveError
from node._objectives import BlockObjective, Objective
from topologies._errors import ScenarioError

try:  # the CSR kernel itself: y += a * x row by row, in stored order (no dispatch cost)
    from scipy.sparse._sparsetools import csr_matvecs as _csr_matvecs
except ImportError:  # pragma: no cover - a scipy without it: the public product, same order
    _csr_matvecs = None

__all__ = [
    "AgentSpec",
    "Algorithm",
    "Block",
    "BlockAlgorithm",
    "Heard",
    "Payload",
    "Received",
    "StepRule",
    "algorithm_class",
    "algorithm_names",
    "register_algorithm",
]

Payload = dict[str, np.ndarray]

_REGISTRY: dict[str, type[Algorithm]] = {}


@dataclass(frozen=True, slots=True, kw_only=True)
class StepRule:
    """alpha_k = step (constant) or scale / (k + 1) ** power (diminishing)."""

    rule: str = "constant"
    step: float = 0.05
    scale: float = 0.5
    power: float = 0.6

    def __call__(self, k: int) -> float:
        if self.rule == "constant":
            return self.step
        return self.scale / (k + 1) ** self.power

    @classmethod
    def from_spec(cls, spec: float | Mapping[str, Any]) -> StepRule:
        if isinstance(spec, int | float):
            return cls(rule="constant", step=float(spec))
        return cls(
            rule=str(spec.get("rule", "constant")),
            step=float(spec.get("step", 0.05)),
            scale=float(spec.get("scale", 0.5)),
            power=float(spec.get("power", 0.6)),
        )

    def spec(self) -> float | dict[str, Any]:
        if self.rule == "constant":
            return self.step
        return {"rule": self.rule, "scale": self.scale, "power": self.power}


@dataclass(frozen=True, slots=True, kw_only=True)
class AgentSpec:
    """Everything one agent knows: its plan, received over the control channel."""

    id: int
    n_agents: int
    dimension: int
    in_neighbours: tuple[int, ...]
    out_neighbours: tuple[int, ...]
    #: mixing row: weight of each in-neighbour and of itself (key ``id``); rows sum to one
    weights: Mapping[int, float]
    objective: Objective
    initial_state: np.ndarray
    #: this agent's priority vector over all agents, or None (uniform, no averaging)
    initial_priorities: np.ndarray | None
    step: StepRule
    #: out-degree of every in-neighbour (push-sum style methods divide by it)
    in_neighbour_out_degree: Mapping[int, int] = field(default_factory=dict)
    #: algorithm-specific options from the scenario's [algorithm] table
    params: Mapping[str, Any] = field(default_factory=dict)


class Received(NamedTuple):
    """The latest message from one in-neighbour, as the algorithm sees it.

    A named tuple rather than a frozen dataclass: one is built per neighbour per step on
    the hot path, and a tuple is three times cheaper to build while just as immutable.
    """

    iteration: int
    payload: Mapping[str, np.ndarray]
    fresh: bool


class Algorithm:
    """Base class: subclass, set ``name``, decorate with :func:`register_algorithm`."""

    name: ClassVar[str] = ""
    #: whether the method needs every agent to hold a priority vector
    uses_priorities: ClassVar[bool] = False
    #: whether the method is meant for directed graphs (skips the symmetric-weights check)
    directed_ok: ClassVar[bool] = False
    #: the [algorithm] options this method reads, with their values when a scenario leaves
    #: them out (read them through :meth:`option`, so that this table is their one home)
    option_defaults: ClassVar[Mapping[str, Any]] = {}
    #: the values [algorithm].missing accepts (what a silent in-neighbour counts as); empty:
    #: the method has no such option
    missing_policies: ClassVar[tuple[str, ...]] = ()

    def __init__(self, spec: AgentSpec) -> None:
        self.spec = spec

    def payload_sizes(self) -> Mapping[str, int]:
        """Name -> length of every array this algorithm broadcasts."""
        raise NotImplementedError

    def init(self) -> tuple[Any, Payload]:
        raise NotImplementedError

    def step(self, state: Any, inbox: Mapping[int, Received], k: int) -> tuple[Any, Payload]:
        raise NotImplementedError

    # Helpers shared by implementations -------------------------------------------------
    def option(self, key: str) -> Any:
        """``spec.params[key]``, or its entry in :attr:`option_defaults` when absent."""
        return self.spec.params.get(key, self.option_defaults[key])

    def gradient(self, x: np.ndarray) -> np.ndarray:
        """The local gradient, checked: shape (d,) and finite, else ObjectiveError."""
        try:
            g = np.asarray(self.spec.objective.grad(x), dtype=float)
        except ObjectiveError:
            raise
        except Exception as exc:  # a user-defined objective raised
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} raised"
                f" {type(exc).__name__}: {exc}"
            ) from exc
        if g.shape != (self.spec.dimension,):
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} returned a"
                f" gradient of shape {g.shape}; expected ({self.spec.dimension},)"
            )
        if not float(g @ g) < math.inf:  # one reduction: NaN and infinity both fail it
            raise ObjectiveError(
                f"agent {self.spec.id}: objective {self.spec.objective.kind!r} returned a"
                f" non-finite gradient {g.tolist()} at x = {np.asarray(x).tolist()}"
            )
        return g

    def local_value(self, x: np.ndarray) -> float:
        return float(self.spec.objective.value(x))

    def restart_from(self, state: Any, x: np.ndarray) -> Any:
        """``state`` with the estimate replaced by ``x`` (a restart that keeps its last state)."""
        return dataclasses.replace(state, x=np.asarray(x, dtype=float))


def register_algorithm(cls: type[Algorithm]) -> type[Algorithm]:
    if not cls.name:
        raise TypeError(f"{cls.__name__} has no name")
    _REGISTRY[cls.name] = cls
    return cls


def algorithm_names() -> list[str]:
    return sorted(_REGISTRY)


def algorithm_class(name: str) -> type[Algorithm]:
    try:
        return _REGISTRY[name]
    except KeyError:
        raise ScenarioError(
            f"algorithm {name!r} is not known; expected one of {algorithm_names()}"
        ) from None


_Factory = Callable[[AgentSpec], Algorithm]


class Heard(NamedTuple):
    """What a block holds from its in-links, one row per directed link (``Block`` order)."""

    #: payload name -> (links, size): the last value heard on each link (zeros if never)
    values: Mapping[str, np.ndarray]
    #: (links,) bool: something was ever heard on the link
    ever: np.ndarray
    #: (links,) bool: heard since the previous step
    fresh: np.ndarray


def _empty_mix(rows: int, cols: int) -> np.ndarray:
    return np.zeros((rows, cols))


@dataclass(frozen=True, slots=True, eq=False)
class Block:
    """A block of agents and the directed links entering it.

    Links are grouped by receiving row and, within a row, follow the receiver's
    ``in_neighbours`` order, so a mix sums exactly as a per-agent loop over its
    in-neighbours would (self term first, then each link in order).
    """

    specs: tuple[AgentSpec, ...]
    #: (B,) agent id of each row (within its own swarm)
    ids: np.ndarray
    n_agents: int
    dimension: int
    #: (L,) receiving row, sender id (in the receiver's swarm), sender row (-1: not in block)
    link_dst: np.ndarray
    link_src: np.ndarray
    link_src_row: np.ndarray
    #: (L,) mixing weight w_ij of each link, and the sender's out-degree
    link_weight: np.ndarray
    link_src_out: np.ndarray
    #: (B,) own weight w_ii, out-degree, in-degree
    self_weight: np.ndarray
    out_degree: np.ndarray
    in_degree: np.ndarray
    #: CSR layout of the mixing matrix (B, B + L): row i = [self i, links of i in order]
    indptr: np.ndarray
    indices: np.ndarray
    self_pos: np.ndarray
    link_pos: np.ndarray

    @property
    def size(self) -> int:
        return len(self.specs)

    @property
    def links(self) -> int:
        return len(self.link_dst)

    @classmethod
    def of(
        cls,
        specs: Sequence[AgentSpec],
        rows: Mapping[tuple[int, int], int] | None = None,
        group: Sequence[int] | None = None,
    ) -> Block:
        """The block of ``specs`` (one row each, in order).

        ``group[b]`` says which swarm row b belongs to (several seeds in one block) and
        ``rows[(group, agent id)]`` gives a sender's row; without them senders are looked
        up among the block's own ids (or left outside the block: row -1).
        """
        specs = tuple(specs)
        if not specs:
            raise ValueError("a block needs at least one agent")
        first = specs[0]
        for sp in specs[1:]:
            if sp.n_agents != first.n_agents or sp.dimension != first.dimension:
                raise ScenarioError(
                    f"agent {sp.id}: a block needs one swarm shape; got {sp.n_agents} agents in"
                    f" R^{sp.dimension} beside {first.n_agents} in R^{first.dimension}"
                )
            if sp.step != first.step or dict(sp.params) != dict(first.params):
                raise ScenarioError(
                    f"agent {sp.id}: a block runs one algorithm configuration; its step rule or"
                    f" [algorithm].params differ from agent {first.id}'s"
                )
        if group is None:
            group = [0] * len(specs)
        if rows is None:
            rows = {(g, sp.id): b for b, (g, sp) in enumerate(zip(group, specs, strict=True))}
        dst, src, src_row, weight, src_out = [], [], [], [], []
        for b, sp in enumerate(specs):
            for j in sp.in_neighbours:
                dst.append(b)
                src.append(j)
                src_row.append(rows.get((group[b], j), -1))
                weight.append(float(sp.weights[j]))
                src_out.append(int(sp.in_neighbour_out_degree.get(j, 0)))
        size = len(specs)
        in_deg = np.array([len(sp.in_neighbours) for sp in specs], dtype=np.int64)
        indptr = np.zeros(size + 1, dtype=np.int32)
        np.cumsum(in_deg + 1, out=indptr[1:])
        self_pos = indptr[:-1].astype(np.int64)
        link_dst = np.array(dst, dtype=np.int64)
        # position of link l in its row: after the self entry, in link order
        first_link = np.zeros(size, dtype=np.int64)
        np.cumsum(in_deg[:-1], out=first_link[1:])
        link_pos = (self_pos[link_dst] + 1 + np.arange(len(dst)) - first_link[link_dst]).astype(
            np.int64
        )
        indices = np.empty(int(indptr[-1]), dtype=np.int32)
        indices[self_pos] = np.arange(size)
        indices[link_pos] = size + np.arange(len(dst))
        return cls(
            specs=specs,
            ids=np.array([sp.id for sp in specs], dtype=np.int64),
            n_agents=first.n_agents,
            dimension=first.dimension,
            link_dst=link_dst,
            link_src=np.array(src, dtype=np.int64),
            link_src_row=np.array(src_row, dtype=np.int64),
            link_weight=np.array(weight, dtype=float),
            link_src_out=np.array(src_out, dtype=np.int64),
            self_weight=np.array([float(sp.weights[sp.id]) for sp in specs]),
            out_degree=np.array([len(sp.out_neighbours) for sp in specs], dtype=np.int64),
            in_degree=in_deg,
            indptr=indptr,
            indices=indices,
            self_pos=self_pos,
            link_pos=link_pos,
        )

    def coefficients(
        self, self_coef: np.ndarray | float, link_coef: np.ndarray | float
    ) -> np.ndarray:
        """The mixing matrix's stored entries for own and per-link coefficients."""
        data = np.empty(len(self.indices))
        data[self.self_pos] = self_coef
        data[self.link_pos] = link_coef
        return data

    def mix(self, data: np.ndarray, own: np.ndarray, links: np.ndarray) -> np.ndarray:
        """Row b: data_self * own[b] + sum over b's links, in order, of data_link * links[l].

        ``own`` is (B, c), ``links`` (L, c). The sum runs left to right from zero (what a
        per-agent loop ``acc = w_ii x_i; acc = acc + w_ij v_j ...`` computes), for a block of
        one and a block of thousands alike, so every engine gets the same bits.
        """
        size, cols = own.shape
        values = np.concatenate((own, links)) if len(links) else own
        if values.dtype != np.float64 or not values.flags.c_contiguous:
            values = np.ascontiguousarray(values, dtype=float)
        out = np.zeros((size, cols))
        if _csr_matvecs is None:  # pragma: no cover
            import scipy.sparse as sp

            m = sp.csr_matrix((data, self.indices, self.indptr), shape=(size, len(values)))
            return np.asarray(m @ values)
        _csr_matvecs(
            size, len(values), cols, self.indptr, self.indices, data, values.ravel(), out.ravel()
        )
        return out

    def heard_from(self, inbox: Mapping[int, Received], sizes: Mapping[str, int]) -> Heard:
        """A block of one: its inbox (in-neighbour -> latest Received) as link arrays."""
        src = self.specs[0].in_neighbours
        got = [inbox.get(j) for j in src]
        n = len(src)
        if n and all(r is not None for r in got):
            fresh = np.array([r.fresh for r in got], dtype=bool)  # type: ignore[union-attr]
            values = {
                name: np.array([r.payload[name] for r in got], dtype=float).reshape(n, size)  # type: ignore[union-attr]
                for name, size in sizes.items()
            }
            return Heard(values, np.ones(n, dtype=bool), fresh)
        ever = np.array([r is not None for r in got], dtype=bool)
        fresh = np.array([r is not None and r.fresh for r in got], dtype=bool)
        values = {}
        for name, size in sizes.items():
            arr = np.zeros((n, size))
            for row, r in enumerate(got):
                if r is not None:
                    arr[row] = r.payload[name]
            values[name] = arr
        return Heard(values, ever, fresh)


#: state class -> ((field name, kept whole in a per-agent view), ...)
_FIELDS: dict[type, tuple[tuple[str, bool], ...]] = {}


class BlockAlgorithm(Algorithm):
    """An algorithm in array form: one implementation for a block of any size.

    Subclasses set ``state_type`` (a frozen dataclass whose fields hold arrays with one row
    per agent, or per link for the names in ``per_link``) and implement ``configure``,
    ``start`` and ``advance``. Constructed from an :class:`AgentSpec` it is a block of one
    and offers the per-agent ``init``/``step`` of :class:`Algorithm`, whose states are the
    same records with one agent's rows (and the block state in ``block``).
    """

    state_type: ClassVar[type] = object
    #: state fields indexed by directed link (kept whole in a per-agent view)
    per_link: ClassVar[frozenset[str]] = frozenset()
    #: whether :meth:`mixing_rows` gives rows (the per-agent view then has ``mixing_row``)
    has_rows: ClassVar[bool] = False

    def __init__(self, spec: AgentSpec | Block) -> None:
        block = spec if isinstance(spec, Block) else Block.of((spec,))
        super().__init__(block.specs[0])
        self.block = block
        self.params = block.specs[0].params
        self.step_rule = block.specs[0].step
        self.objective = BlockObjective.of(
            [sp.objective for sp in block.specs], [sp.id for sp in block.specs]
        )
        self.configure()

    # -- the array form ----------------------------------------------------------------
    def configure(self) -> None:
        """Read and check ``self.params`` (errors name the agent); called once."""

    def start(self) -> tuple[Any, Payload]:
        """The block's initial state and first payloads (name -> (B, size))."""
        raise NotImplementedError

    def advance(self, state: Any, heard: Heard, k: int) -> tuple[Any, Payload]:
        """One step of every agent of the block; pure."""
        raise NotImplementedError

    def initial_states(self) -> np.ndarray:
        return np.array([sp.initial_state for sp in self.block.specs], dtype=float).reshape(
            self.block.size, self.block.dimension
        )

    def gradients(self, x: np.ndarray) -> np.ndarray:
        """Every row's local gradient, checked: shape (B, d) and finite, else ObjectiveError."""
        g = self.objective.grad(x)
        flat = g.ravel()
        if not float(np.dot(flat, flat)) < math.inf:  # one reduction: NaN and inf fail it
            ok = (g * g).sum(axis=1) < math.inf
            if not ok.all():
                bad = int(np.flatnonzero(~ok)[0])
                sp = self.block.specs[bad]
                raise ObjectiveError(
                    f"agent {sp.id}: objective {sp.objective.kind!r} returned a non-finite"
                    f" gradient {g[bad].tolist()} at x = {x[bad].tolist()}"
                )
        return g

    def local_values(self, x: np.ndarray) -> np.ndarray:
        return self.objective.value(x)

    def estimates(self, state: Any) -> np.ndarray:
        return state.x

    def priority_rows(self, state: Any) -> np.ndarray | None:
        return state.priorities

    def mixing_rows(self, state: Any) -> list[dict[int, float]] | None:
        """The mixing row each agent used at its last step, if the method has one."""
        return None

    # -- a block of one, per agent -----------------------------------------------------
    def view(self, state: Any) -> Any:
        """One agent's record of a block-of-one state (row 0)."""
        names = _FIELDS.get(type(state))
        if names is None:
            names = _FIELDS[type(state)] = tuple(
                (f.name, f.name in self.per_link or f.name == "block")
                for f in dataclasses.fields(state)
            )
        kw = {}
        for name, whole in names:
            v = getattr(state, name)
            kw[name] = v if whole or v is None else v[0]
        kw["block"] = state
        if self.has_rows:
            kw["mixing_row"] = self.mixing_rows(state)[0]  # type: ignore[index]
        return self.state_type(**kw)

    def init(self) -> tuple[Any, Payload]:
        state, out = self.start()
        return self.view(state), {k: v[0] for k, v in out.items()}

    def step(self, state: Any, inbox: Mapping[int, Received], k: int) -> tuple[Any, Payload]:
        heard = self.block.heard_from(inbox, self.payload_sizes())
        new, out = self.advance(state.block, heard, k)
        return self.view(new), {key: v[0] for key, v in out.items()}

    def restart_from(self, state: Any, x: np.ndarray) -> Any:
        return self.view(dataclasses.replace(state.block, x=np.asarray(x, dtype=float)[None, :]))

    def local_value(self, x: np.ndarray) -> float:
        return float(self.objective.value(np.asarray(x, dtype=float)[None, :])[0])
