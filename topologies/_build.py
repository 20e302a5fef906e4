"""The topology record, the shape builders and the connectivity check.

Rules the rest of swarmrig relies on:

* A :class:`Topology` always holds a :class:`networkx.DiGraph` on the agents ``0..n-1``
  whose edges are the directed links ``j -> i`` (agent ``i`` hears from agent ``j``).
  An undirected shape carries both directions of every edge; ``directed`` is True only
  when the source really has one-way links.
* Every random choice comes from the ``seed`` argument, turned into a generator by one
  helper (:func:`_generator`), so a seed always gives the same graph and positions.
* Builders and loaders return connected graphs only (strongly connected if directed);
  anything else is a :class:`~topologies.TopologyError` naming the agents cut off.
"""

from __future__ import annotations

import contextlib
import math
import numbers
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import networkx as nx
import numpy as np

from topologies._errors import TopologyError

__all__ = ["SHAPES", "Topology", "build", "from_graph", "require_connected"]

#: Shapes :func:`build` knows. Graph files go through :func:`topologies.load`.
SHAPES: tuple[str, ...] = (
    "ring",
    "path",
    "grid",
    "star",
    "complete",
    "random-geometric",
    "erdos-renyi",
    "small-world",
)

# Arbitrary tag for the spawn key: keeps graph draws apart from the per-agent streams,
# whose spawn keys have two entries (agent, purpose).
_TOPOLOGY_STREAM = 0x746F706F

# At most this many agent ids are spelled out in one error message.
_LISTED = 20


@dataclass(frozen=True, slots=True, kw_only=True)
class Topology:
    """A communication graph of ``n`` agents numbered ``0..n-1``.

    ``graph`` is a frozen copy of the graph given (a :class:`networkx.DiGraph`; edges are
    directed links ``j -> i``, meaning ``i`` hears from ``j``). For an undirected topology
    (``directed=False``) every link has its reverse. ``positions`` maps each agent to a
    point in the plane where the shape has one (random-geometric: the unit square; grid:
    unit spacing, agent ``r * cols + c`` at ``(c, r)``; files with ``x``/``y`` node
    attributes). ``shape`` and ``params`` record how the graph was made; random shapes
    include their ``seed`` in ``params`` and files their ``file``.

    Construction checks the record (agents ``0..n-1``, no self-loops, symmetric when
    undirected, positions for every agent) but not connectivity: use :func:`build`,
    :func:`from_graph` or :func:`topologies.load`, which also require a connected graph.
    Two topologies are equal when shape, params, direction, positions and links agree.
    """

    graph: nx.DiGraph
    directed: bool
    positions: dict[int, tuple[float, float]] | None = None
    shape: str = "custom"
    params: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        g = self.graph
        if not isinstance(g, nx.DiGraph) or g.is_multigraph():
            raise TopologyError(
                f"topology: expected a networkx.DiGraph, got {type(g).__name__};"
                " convert other graphs with from_graph()"
            )
        n = g.number_of_nodes()
        if n == 0:
            raise TopologyError("topology: the graph has no agents; expected at least one")
        bad = [v for v in g.nodes if not _is_int(v) or not 0 <= v < n]
        if bad:
            raise TopologyError(
                f"topology: agents must be the integers 0..{n - 1}; found labels"
                f" {_listing([repr(v) for v in sorted(bad, key=repr)])}"
            )
        loops = sorted(u for u, _ in nx.selfloop_edges(g))
        if loops:
            raise TopologyError(f"topology: self-loops on agents {_listing(loops)} are not allowed")
        if not isinstance(self.directed, bool):
            raise TopologyError(f"topology: directed must be True or False, got {self.directed!r}")
        if not self.directed:
            one_way = sorted((u, v) for u, v in g.edges if not g.has_edge(v, u))
            if one_way:
                u, v = one_way[0]
                raise TopologyError(
                    f"topology: marked undirected but link {u} -> {v} has no reverse link"
                    f" ({len(one_way)} one-way links in all); pass directed=True"
                )
        # Agents in id order, attributes kept; frozen so the record stays what was checked.
        copy = nx.DiGraph()
        copy.add_nodes_from((int(v), g.nodes[v]) for v in sorted(g.nodes))
        copy.add_edges_from(sorted((int(u), int(v), d) for u, v, d in g.edges(data=True)))
        object.__setattr__(self, "graph", nx.freeze(copy))
        object.__setattr__(self, "positions", _checked_positions(self.positions, n))
        object.__setattr__(self, "params", dict(self.params))

    @property
    def n(self) -> int:
        """Number of agents."""
        return self.graph.number_of_nodes()

    def in_neighbours(self, i: int) -> tuple[int, ...]:
        """The agents ``i`` hears from (links ``j -> i``), sorted."""
        self._check_agent(i)
        return tuple(sorted(self.graph.predecessors(i)))

    def out_neighbours(self, i: int) -> tuple[int, ...]:
        """The agents that hear ``i`` (links ``i -> j``), sorted."""
        self._check_agent(i)
        return tuple(sorted(self.graph.successors(i)))

    def edges(self) -> list[tuple[int, int]]:
        """Every directed link ``(j, i)`` (``j -> i``), sorted; both directions if undirected."""
        return sorted(self.graph.edges())

    def undirected_edges(self) -> list[tuple[int, int]]:
        """Every pair ``(u, v)``, ``u < v``, joined by a link in at least one direction, sorted."""
        return sorted({(min(u, v), max(u, v)) for u, v in self.graph.edges()})

    def _check_agent(self, i: object) -> None:
        if not _is_int(i) or not 0 <= i < self.n:  # type: ignore[operator]
            raise TopologyError(f"topology: agent {i!r} does not exist; agents are 0..{self.n - 1}")

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Topology):
            return NotImplemented
        return (
            self.shape == other.shape
            and self.directed == other.directed
            and self.params == other.params
            and self.positions == other.positions
            and self.n == other.n
            and self.edges() == other.edges()
        )

    def __hash__(self) -> int:
        return hash((self.shape, self.directed, self.n, tuple(self.edges())))

    def __repr__(self) -> str:
        return (
            f"Topology(shape={self.shape!r}, n={self.n}, directed={self.directed},"
            f" links={self.graph.number_of_edges()}, params={self.params!r})"
        )


def _is_int(v: object) -> bool:
    return isinstance(v, numbers.Integral) and not isinstance(v, bool)


def _listing(items: list[Any]) -> str:
    if len(items) <= _LISTED:
        return f"[{', '.join(map(str, items))}]"
    return f"[{', '.join(map(str, items[:_LISTED]))}, ...] ({len(items)} in all)"


def _checked_positions(
    positions: Mapping[int, Any] | None, n: int
) -> dict[int, tuple[float, float]] | None:
    if positions is None:
        return None
    if set(positions) != set(range(n)):
        missing = sorted(set(range(n)) - set(positions))
        extra = sorted(set(positions) - set(range(n)), key=repr)
        raise TopologyError(
            f"topology: positions must give one point per agent 0..{n - 1};"
            f" missing {_listing(missing)}, unknown {_listing(extra)}"
        )
    out: dict[int, tuple[float, float]] = {}
    for i in range(n):
        try:
            x, y = (float(c) for c in positions[i])
        except (TypeError, ValueError):
            raise TopologyError(
                f"topology: position of agent {i} must be two numbers (x, y), got {positions[i]!r}"
            ) from None
        if not (math.isfinite(x) and math.isfinite(y)):
            raise TopologyError(f"topology: position of agent {i} is not finite: ({x}, {y})")
        out[i] = (x, y)
    return out


# Connectivity --------------------------------------------------------------------------


def _connectivity_problem(graph: nx.Graph, directed: bool | None = None) -> str | None:
    """None if connected (strongly, for a digraph); else what is wrong, in agent terms.

    ``directed=False`` reads a (symmetric) digraph as undirected, for the plain message.
    """
    if directed is False and graph.is_directed():
        graph = graph.to_undirected(as_view=True)
    n = graph.number_of_nodes()
    if n == 0:
        return "the graph has no agents; connectivity is undefined for the null graph"
    nodes = list(graph.nodes)
    with contextlib.suppress(TypeError):  # labels of mixed types: keep the graph's order
        nodes.sort()
    root = nodes[0]
    if not graph.is_directed():
        reached = nx.node_connected_component(graph, root)
        cut = [v for v in nodes if v not in reached]
        if not cut:
            return None
        verb = f"agent {cut[0]} is" if len(cut) == 1 else f"agents {_listing(cut)} are"
        return f"the graph is not connected: {verb} cut off from agent {root}"
    downstream = nx.descendants(graph, root) | {root}
    upstream = nx.ancestors(graph, root) | {root}
    unreached = [v for v in nodes if v not in downstream]
    unheard = [v for v in nodes if v not in upstream]
    if not unreached and not unheard:
        return None
    parts = []
    if unreached:
        who = f"agent {unreached[0]}" if len(unreached) == 1 else f"agents {_listing(unreached)}"
        parts.append(f"{who} cannot be reached from agent {root}")
    if unheard:
        who = f"agent {unheard[0]}" if len(unheard) == 1 else f"agents {_listing(unheard)}"
        parts.append(f"{who} cannot reach agent {root}")
    return "the directed graph is not strongly connected: " + "; ".join(parts)


def require_connected(topology_or_graph: Topology | nx.Graph, *, where: str = "topology") -> None:
    """Raise :class:`TopologyError` unless the graph is connected.

    Undirected graphs must be connected, directed ones strongly connected (every agent
    reaches every other along links). The message starts with ``where`` and names the
    agents cut off from agent 0 (the lowest label), for a digraph split into those that
    cannot be reached from it and those that cannot reach it. The null graph is refused.
    """
    directed: bool | None = None
    if isinstance(topology_or_graph, Topology):
        graph: nx.Graph = topology_or_graph.graph
        directed = topology_or_graph.directed
    elif isinstance(topology_or_graph, nx.Graph):
        graph = topology_or_graph
    else:
        raise TopologyError(
            f"{where}: expected a Topology or a networkx graph,"
            f" got {type(topology_or_graph).__name__}"
        )
    problem = _connectivity_problem(graph, directed)
    if problem is not None:
        raise TopologyError(f"{where}: {problem}")


def from_graph(
    graph: nx.Graph,
    *,
    directed: bool | None = None,
    shape: str = "custom",
    params: Mapping[str, Any] | None = None,
    where: str = "topology",
) -> Topology:
    """A connected :class:`Topology` from a networkx graph whose nodes are ``0..n-1``.

    ``directed=None`` keeps the graph's own kind; ``False`` turns every directed edge into
    a two-way link; ``True`` on an undirected graph gives both directions of every edge
    but marks the topology directed. Parallel edges collapse to one link. Node attributes
    ``x`` and ``y`` (or ``pos``), when every agent has them, become the positions.
    Errors (bad labels, self-loops, not connected) start with ``where``.
    """
    if not isinstance(graph, nx.Graph):
        raise TopologyError(f"{where}: expected a networkx graph, got {type(graph).__name__}")
    if directed is not None and not isinstance(directed, bool):
        raise TopologyError(f"{where}: directed must be True, False or None, got {directed!r}")
    n = graph.number_of_nodes()
    if n == 0:
        raise TopologyError(
            f"{where}: the graph has no agents; connectivity is undefined for the null graph"
        )
    bad = [v for v in graph.nodes if not _is_int(v) or not 0 <= v < n]
    if bad:
        raise TopologyError(
            f"{where}: agent labels must be the integers 0..{n - 1};"
            f" got {_listing([repr(v) for v in sorted(bad, key=repr)])}"
        )
    loops = sorted({int(u) for u, _ in nx.selfloop_edges(graph)})
    if loops:
        who = f"agent {loops[0]}" if len(loops) == 1 else f"agents {_listing(loops)}"
        raise TopologyError(
            f"{where}: self-loop on {who} is not allowed (an agent always keeps its own state)"
        )
    is_directed = graph.is_directed() if directed is None else directed
    digraph = nx.DiGraph()
    digraph.add_nodes_from((int(v), dict(d)) for v, d in graph.nodes(data=True))
    for u, v in graph.edges():
        digraph.add_edge(int(u), int(v))
        if not (graph.is_directed() and is_directed):
            digraph.add_edge(int(v), int(u))
    problem = _connectivity_problem(digraph, is_directed)
    if problem is not None:
        raise TopologyError(f"{where}: {problem}")
    return Topology(
        graph=digraph,
        directed=is_directed,
        positions=_positions_from_attributes(digraph, where),
        shape=shape,
        params=dict(params or {}),
    )


def _positions_from_attributes(graph: nx.DiGraph, where: str) -> dict[int, Any] | None:
    attrs = graph.nodes
    if all("x" in attrs[v] and "y" in attrs[v] for v in graph):
        raw = {v: (attrs[v]["x"], attrs[v]["y"]) for v in graph}
    elif all("pos" in attrs[v] for v in graph):
        raw = {v: attrs[v]["pos"] for v in graph}
    else:
        partial = [v for v in graph if {"x", "y"} & attrs[v].keys() or "pos" in attrs[v]]
        if partial:
            missing = sorted(v for v in graph if v not in partial)
            raise TopologyError(
                f"{where}: some agents have positions (x, y) and agents {_listing(missing)}"
                " do not; expected a position for every agent or for none"
            )
        return None
    try:
        return {v: (float(p[0]), float(p[1])) for v, p in raw.items()}
    except (TypeError, ValueError, IndexError):
        raise TopologyError(
            f"{where}: agent positions must be numbers (x, y); got {next(iter(raw.values()))!r}"
        ) from None


# Builders ------------------------------------------------------------------------------


def _generator(seed: object, where: str) -> np.random.Generator:
    """The one place a seed becomes randomness for graphs (and the one place it is checked)."""
    if not _is_int(seed) or seed < 0:  # type: ignore[operator]
        raise TopologyError(f"{where}: the seed must be a non-negative integer, got {seed!r}")
    ss = np.random.SeedSequence(entropy=int(seed), spawn_key=(_TOPOLOGY_STREAM,))  # type: ignore[arg-type]
    return np.random.Generator(np.random.PCG64(ss))


@dataclass(frozen=True, slots=True, kw_only=True)
class _Param:
    expected: str
    check: Callable[[Any, int], bool]
    integer: bool = False


def _real(v: Any) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(float(v))


_RADIUS = _Param(
    expected="a number in (0, sqrt(2)] (link range in the unit square)",
    check=lambda v, n: _real(v) and 0 < v <= math.sqrt(2),
)
_PROB_OPEN = _Param(
    expected="a number in (0, 1] (probability of each link)",
    check=lambda v, n: _real(v) and 0 < v <= 1,
)
_PROB_CLOSED = _Param(
    expected="a number in [0, 1] (probability of rewiring each lattice edge)",
    check=lambda v, n: _real(v) and 0 <= v <= 1,
)
_SIDE = _Param(
    expected="a positive integer", check=lambda v, n: _is_int(v) and v >= 1, integer=True
)
_K = _Param(
    expected="an even integer in [2, n-1] (ring-lattice neighbours of each agent)",
    check=lambda v, n: _is_int(v) and v >= 2 and v % 2 == 0 and v <= n - 1,
    integer=True,
)

_SHAPE_PARAMS: dict[str, dict[str, _Param]] = {
    "ring": {},
    "path": {},
    "grid": {"rows": _SIDE, "cols": _SIDE},
    "star": {},
    "complete": {},
    "random-geometric": {"radius": _RADIUS},
    "erdos-renyi": {"p": _PROB_OPEN},
    "small-world": {"k": _K, "p": _PROB_CLOSED},
}
_MIN_AGENTS = {"ring": 3, "small-world": 3}
_RANDOM_SHAPES = frozenset({"random-geometric", "erdos-renyi", "small-world"})
_HINTS = {
    "random-geometric": "try a larger radius or another seed",
    "erdos-renyi": "try a larger p or another seed",
    "small-world": "try a smaller p, a larger k or another seed",
}

_Pairs = Iterable[tuple[int, int]]
_Positions = dict[int, tuple[float, float]] | None


def build(shape: str, n: int, *, seed: int, where: str = "topology", **params: Any) -> Topology:
    """Build a connected undirected topology of ``n`` agents.

    Shapes and their parameters: ``ring`` (n >= 3), ``path``, ``star`` (hub 0),
    ``complete``, ``grid`` (``rows``, ``cols``, n = rows * cols; agent ``r * cols + c``),
    ``random-geometric`` (``radius``: points uniform in the unit square, linked when at
    most ``radius`` apart; Gilbert, J. SIAM 9 (1961)), ``erdos-renyi`` (``p``: each pair
    linked independently; Erdős & Rényi (1959), Gilbert (1959)), ``small-world`` (``k``
    even, ``p``: a ring lattice with each agent linked to its ``k`` nearest, each edge
    rewired with probability ``p``; Watts & Strogatz, Nature 393 (1998)). Every shape
    needs at least two agents.

    The same ``seed`` always gives the same graph (the deterministic shapes check it but
    do not use it). A missing, unknown or invalid parameter, too few agents, or a random
    draw that is not connected raise :class:`TopologyError` starting with ``where``.
    Cost: O(n^2) for the random shapes (every pair is considered), O(n + links) otherwise.
    """
    if not isinstance(shape, str) or shape not in _SHAPE_PARAMS:
        raise TopologyError(
            f"{where}.shape: expected one of {', '.join(SHAPES)} (graph files go through"
            f" load()), got {shape!r}"
        )
    if not _is_int(n):
        raise TopologyError(f"{where}: the number of agents must be an integer, got {n!r}")
    n = int(n)
    needed = _MIN_AGENTS.get(shape, 2)
    if n < needed:
        raise TopologyError(f"{where}: shape {shape!r} needs at least {needed} agents, got {n}")
    rng = _generator(seed, where)
    spec = _SHAPE_PARAMS[shape]
    for name in params:
        if name not in spec:
            allowed = ", ".join(spec) if spec else "no parameters"
            raise TopologyError(
                f"{where}.{name}: not a parameter of shape {shape!r}; expected {allowed}"
            )
    values: dict[str, Any] = {}
    for name, p in spec.items():
        expected = p.expected.replace("n-1", str(n - 1))
        if name not in params:
            raise TopologyError(
                f"{where}.{name}: required for shape {shape!r}; expected {expected}"
            )
        v = params[name]
        if not p.check(v, n):
            raise TopologyError(f"{where}.{name}: expected {expected}, got {v!r}")
        values[name] = int(v) if p.integer else float(v)

    positions: _Positions = None
    if shape == "ring":
        pairs: _Pairs = ((i, (i + 1) % n) for i in range(n))
    elif shape == "path":
        pairs = ((i, i + 1) for i in range(n - 1))
    elif shape == "star":
        pairs = ((0, i) for i in range(1, n))
    elif shape == "complete":
        pairs = ((i, j) for i in range(n) for j in range(i + 1, n))
    elif shape == "grid":
        pairs, positions = _grid(n, values["rows"], values["cols"], where)
    elif shape == "random-geometric":
        pairs, positions = _random_geometric(n, values["radius"], rng)
    elif shape == "erdos-renyi":
        pairs = _erdos_renyi(n, values["p"], rng)
    else:
        pairs = _small_world(n, values["k"], values["p"], rng)

    graph = nx.DiGraph()
    graph.add_nodes_from(range(n))
    for u, v in pairs:
        graph.add_edge(u, v)
        graph.add_edge(v, u)
    if shape in _RANDOM_SHAPES:
        values["seed"] = int(seed)
    problem = _connectivity_problem(graph, directed=False)
    if problem is not None:
        settings = ", ".join(f"{k}={v}" for k, v in values.items())
        raise TopologyError(
            f"{where}: the {shape} graph with n={n}, {settings}: {problem}; {_HINTS[shape]}"
        )
    return Topology(graph=graph, directed=False, positions=positions, shape=shape, params=values)


def _grid(n: int, rows: int, cols: int, where: str) -> tuple[_Pairs, _Positions]:
    if rows * cols != n:
        raise TopologyError(
            f"{where}.rows, {where}.cols: a {rows} x {cols} grid has {rows * cols} agents,"
            f" expected rows * cols = n = {n}"
        )
    pairs = [(r * cols + c, r * cols + c + 1) for r in range(rows) for c in range(cols - 1)]
    pairs += [(r * cols + c, (r + 1) * cols + c) for r in range(rows - 1) for c in range(cols)]
    positions = {r * cols + c: (float(c), float(r)) for r in range(rows) for c in range(cols)}
    return pairs, positions


def _random_geometric(n: int, radius: float, rng: np.random.Generator) -> tuple[_Pairs, _Positions]:
    points = rng.random((n, 2))
    iu, ju = np.triu_indices(n, 1)
    close = np.hypot(*(points[iu] - points[ju]).T) <= radius
    positions = {i: (float(points[i, 0]), float(points[i, 1])) for i in range(n)}
    return zip(iu[close].tolist(), ju[close].tolist(), strict=True), positions


def _erdos_renyi(n: int, p: float, rng: np.random.Generator) -> _Pairs:
    iu, ju = np.triu_indices(n, 1)
    keep = rng.random(iu.size) < p
    return zip(iu[keep].tolist(), ju[keep].tolist(), strict=True)


def _small_world(n: int, k: int, p: float, rng: np.random.Generator) -> _Pairs:
    # Watts & Strogatz's order: first every agent's nearest clockwise edge, then the next
    # nearest, ...; a rewired edge keeps agent u and moves its far end to a uniformly
    # chosen agent that is neither u nor already linked to u.
    adj: list[set[int]] = [set() for _ in range(n)]
    for i in range(n):
        for j in range(1, k // 2 + 1):
            adj[i].add((i + j) % n)
            adj[(i + j) % n].add(i)
    for j in range(1, k // 2 + 1):
        for u in range(n):
            v = (u + j) % n
            if rng.random() >= p or v not in adj[u]:
                continue
            candidates = [w for w in range(n) if w != u and w not in adj[u]]
            if not candidates:
                continue
            w = candidates[int(rng.integers(len(candidates)))]
            adj[u].discard(v)
            adj[v].discard(u)
            adj[u].add(w)
            adj[w].add(u)
    return [(u, v) for u in range(n) for v in adj[u] if u < v]
