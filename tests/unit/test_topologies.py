"""Topologies: builders against networkx, the record's rules, connectivity, file loading."""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
from scipy import stats

import topologies
from topologies import (
    Topology,
    TopologyError,
    adjacency,
    build,
    degrees,
    from_graph,
    graph_facts,
    laplacian,
    laplacian_step_limit,
    link_lengths,
    load,
    max_degree,
    metropolis_weights,
    require_connected,
    spectral_facts,
)

DATA = Path(__file__).parent / "data"

# The digraph of methods.md (push-sum example): 0→1, 1→2, 2→0, 0→2, 2→3, 3→0.
RELAY = [(0, 1), (1, 2), (2, 0), (0, 2), (2, 3), (3, 0)]


def undirected_set(edges) -> set[frozenset[int]]:
    return {frozenset(e) for e in edges}


def assert_undirected_record(top: Topology, n: int) -> None:
    assert isinstance(top.graph, nx.DiGraph)
    assert not top.directed
    assert list(top.graph.nodes) == list(range(n))
    links = set(top.edges())
    assert all((v, u) in links for u, v in links)
    assert nx.is_strongly_connected(top.graph)


# Exports ---------------------------------------------------------------------------------


def test_exports_are_declared_and_present():
    required = {
        "ScenarioError",
        "SwarmrigError",
        "TopologyError",
        "Topology",
        "build",
        "load",
        "require_connected",
        "degrees",
        "max_degree",
        "adjacency",
        "laplacian",
        "metropolis_weights",
        "laplacian_step_bound",
        "laplacian_step_limit",
        "SpectralFacts",
        "spectral_facts",
        "GraphFacts",
        "graph_facts",
        "link_lengths",
    }
    assert required <= set(topologies.__all__)
    assert len(set(topologies.__all__)) == len(topologies.__all__)
    for name in topologies.__all__:
        assert hasattr(topologies, name), name
    assert issubclass(TopologyError, topologies.ScenarioError)


# Builders against networkx ---------------------------------------------------------------


@pytest.mark.parametrize("n", [3, 4, 7, 20])
def test_ring_is_the_cycle_graph(n):
    top = build("ring", n, seed=0)
    assert_undirected_record(top, n)
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.cycle_graph(n).edges)
    assert top.shape == "ring" and top.params == {} and top.positions is None


@pytest.mark.parametrize("n", [2, 3, 9])
def test_path_is_the_path_graph(n):
    top = build("path", n, seed=0)
    assert_undirected_record(top, n)
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.path_graph(n).edges)


@pytest.mark.parametrize("n", [2, 5, 11])
def test_star_is_the_star_graph_with_hub_zero(n):
    top = build("star", n, seed=0)
    assert_undirected_record(top, n)
    # nx.star_graph(k) has k + 1 nodes with hub 0
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.star_graph(n - 1).edges)
    assert top.out_neighbours(0) == tuple(range(1, n))


@pytest.mark.parametrize("n", [2, 6])
def test_complete_is_the_complete_graph(n):
    top = build("complete", n, seed=0)
    assert_undirected_record(top, n)
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.complete_graph(n).edges)
    assert top.graph.number_of_edges() == n * (n - 1)


@pytest.mark.parametrize(("rows", "cols"), [(1, 5), (3, 4), (4, 3), (5, 5)])
def test_grid_is_the_grid_graph_relabeled_row_major(rows, cols):
    top = build("grid", rows * cols, seed=0, rows=rows, cols=cols)
    assert_undirected_record(top, rows * cols)
    ref = nx.grid_2d_graph(rows, cols)  # nodes (r, c)
    relabeled = nx.relabel_nodes(ref, {(r, c): r * cols + c for r, c in ref.nodes})
    assert undirected_set(top.undirected_edges()) == undirected_set(relabeled.edges)
    assert top.params == {"rows": rows, "cols": cols}
    assert top.positions == {r * cols + c: (float(c), float(r)) for r, c in ref.nodes}
    assert set(link_lengths(top).values()) == {1.0}


@pytest.mark.parametrize(("radius", "seed"), [(0.5, 1), (0.35, 8), (1.0, 3)])
def test_random_geometric_links_exactly_the_close_pairs(radius, seed):
    n = 40
    top = build("random-geometric", n, seed=seed, radius=radius)  # seeds with connected draws
    assert_undirected_record(top, n)
    pos = top.positions
    assert pos is not None and set(pos) == set(range(n))
    assert all(0.0 <= x < 1.0 and 0.0 <= y < 1.0 for x, y in pos.values())
    ref = nx.Graph()
    ref.add_nodes_from((i, {"pos": pos[i]}) for i in range(n))
    expected = undirected_set(nx.geometric_edges(ref, radius))
    assert undirected_set(top.undirected_edges()) == expected
    lengths = link_lengths(top)
    assert max(lengths.values()) <= radius
    assert top.params == {"radius": radius, "seed": seed}


def test_erdos_renyi_link_count_is_binomial():
    # G(n, p): each of the n(n-1)/2 pairs independently (Gilbert, Ann. Math. Stat. 30 (1959)).
    n, p, draws = 30, 0.3, 40
    pairs = n * (n - 1) // 2
    total = sum(len(build("erdos-renyi", n, seed=s, p=p).undirected_edges()) for s in range(draws))
    dist = stats.binom(pairs * draws, p)
    assert abs(total - dist.mean()) <= 5 * dist.std()


def test_erdos_renyi_with_p_one_is_complete():
    top = build("erdos-renyi", 7, seed=5, p=1)
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.complete_graph(7).edges)


@pytest.mark.parametrize(("n", "k"), [(10, 2), (12, 4), (15, 6)])
def test_small_world_without_rewiring_is_the_ring_lattice(n, k):
    top = build("small-world", n, seed=4, k=k, p=0.0)
    ref = nx.watts_strogatz_graph(n, k, 0.0)  # p = 0: deterministic ring lattice
    assert undirected_set(top.undirected_edges()) == undirected_set(ref.edges)


def test_small_world_rewiring_keeps_the_edge_count_and_moves_edges():
    n, k = 30, 4
    lattice = undirected_set(nx.watts_strogatz_graph(n, k, 0.0).edges)
    top = build("small-world", n, seed=2, k=k, p=0.3)
    edges = undirected_set(top.undirected_edges())
    assert len(edges) == n * k // 2
    moved = len(edges - lattice)
    # about p * nk/2 = 18 rewired edges; a loose binomial band (5 sd) around it
    dist = stats.binom(n * k // 2, 0.3)
    assert abs(moved - dist.mean()) <= 5 * dist.std() + 2
    assert_undirected_record(top, n)


@pytest.mark.parametrize(
    ("shape", "params"),
    [
        ("random-geometric", {"radius": 0.45}),
        ("erdos-renyi", {"p": 0.3}),
        ("small-world", {"k": 4, "p": 0.2}),
    ],
)
def test_random_shapes_repeat_from_the_seed_and_differ_across_seeds(shape, params):
    a = build(shape, 25, seed=11, **params)
    b = build(shape, 25, seed=11, **params)
    c = build(shape, 25, seed=12, **params)
    assert a == b and hash(a) == hash(b)
    assert a.edges() == b.edges() and a.positions == b.positions
    assert a.edges() != c.edges()
    assert a != c


def test_random_draw_that_is_not_connected_is_refused_with_a_hint():
    with pytest.raises(TopologyError) as err:
        build("random-geometric", 30, seed=1, radius=0.05)
    msg = str(err.value)
    assert msg.startswith("topology: the random-geometric graph with n=30, radius=0.05, seed=1")
    assert "cut off from agent 0" in msg and "larger radius" in msg


# Parameter errors -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("shape", "n", "params", "expected"),
    [
        (
            "random-geometric",
            10,
            {"radius": -1},
            "topology.radius: expected a number in (0, sqrt(2)] (link range in the unit"
            " square), got -1",
        ),
        ("random-geometric", 10, {"radius": 1.5}, "topology.radius: expected a number in (0,"),
        ("random-geometric", 10, {"radius": "0.3"}, "got '0.3'"),
        ("random-geometric", 10, {"radius": True}, "topology.radius: expected a number"),
        ("random-geometric", 10, {"radius": math.nan}, "topology.radius: expected a number"),
        ("random-geometric", 10, {}, "topology.radius: required for shape 'random-geometric'"),
        ("erdos-renyi", 10, {"p": 0}, "topology.p: expected a number in (0, 1]"),
        ("erdos-renyi", 10, {"p": 0.5, "k": 2}, "topology.k: not a parameter of shape"),
        ("small-world", 10, {"k": 3, "p": 0.1}, "topology.k: expected an even integer in [2, 9]"),
        ("small-world", 10, {"k": 10, "p": 0.1}, "got 10"),
        ("small-world", 10, {"k": 4.0, "p": 0.1}, "topology.k: expected an even integer"),
        ("small-world", 10, {"k": 4, "p": 1.5}, "topology.p: expected a number in [0, 1]"),
        ("small-world", 10, {"k": 4}, "topology.p: required for shape 'small-world'"),
        (
            "ring",
            10,
            {"radius": 0.3},
            "topology.radius: not a parameter of shape 'ring'; expected no parameters",
        ),
        ("grid", 10, {"rows": 3, "cols": 4}, "a 3 x 4 grid has 12 agents, expected rows * cols"),
        ("grid", 12, {"rows": 0, "cols": 4}, "topology.rows: expected a positive integer, got 0"),
        ("grid", 12, {"rows": 3}, "topology.cols: required for shape 'grid'"),
        ("ring", 2, {}, "topology: shape 'ring' needs at least 3 agents, got 2"),
        ("star", 1, {}, "topology: shape 'star' needs at least 2 agents, got 1"),
        ("ring", 5.0, {}, "topology: the number of agents must be an integer, got 5.0"),
        ("torus", 10, {}, "topology.shape: expected one of ring, path, grid, star, complete,"),
    ],
)
def test_bad_parameters_are_named(shape, n, params, expected):
    with pytest.raises(TopologyError) as err:
        build(shape, n, seed=0, **params)
    assert expected in str(err.value)


@pytest.mark.parametrize("seed", [-1, 1.5, "7", True, None])
def test_bad_seed_is_refused(seed):
    with pytest.raises(TopologyError, match="seed must be a non-negative integer"):
        build("ring", 5, seed=seed)


def test_where_prefixes_every_message():
    with pytest.raises(TopologyError) as err:
        build("random-geometric", 8, seed=0, radius=-1, where="lab.toml: topology")
    assert str(err.value).startswith("lab.toml: topology.radius: expected")


def test_numpy_integers_and_floats_are_accepted():
    top = build("small-world", np.int64(12), seed=np.int64(3), k=np.int64(4), p=np.float64(0.1))
    assert top.n == 12 and top.params == {"k": 4, "p": 0.1, "seed": 3}
    assert type(top.params["k"]) is int and type(top.params["seed"]) is int


# The record ---------------------------------------------------------------------------------


def relay_topology() -> Topology:
    g = nx.DiGraph()
    g.add_nodes_from(range(4))
    g.add_edges_from(RELAY)
    return from_graph(g, shape="relay")


def test_neighbours_follow_link_direction_and_are_sorted():
    top = relay_topology()
    assert top.directed
    assert top.in_neighbours(0) == (2, 3)
    assert top.out_neighbours(0) == (1, 2)
    assert top.in_neighbours(2) == (0, 1)
    assert top.out_neighbours(2) == (0, 3)
    assert top.edges() == sorted(RELAY)
    # the pair {0, 2} has links both ways but is one undirected edge
    assert top.undirected_edges() == [(0, 1), (0, 2), (0, 3), (1, 2), (2, 3)]


@pytest.mark.parametrize("agent", [-1, 4, 1.0, "0", True])
def test_unknown_agent_is_refused(agent):
    with pytest.raises(TopologyError, match=r"does not exist; agents are 0\.\.3"):
        relay_topology().in_neighbours(agent)


def test_record_is_frozen_and_keeps_its_own_copy_of_the_graph():
    g = nx.DiGraph([(0, 1), (1, 0)])
    top = Topology(graph=g, directed=False)
    g.add_edge(1, 2)
    assert top.edges() == [(0, 1), (1, 0)]
    with pytest.raises(dataclasses.FrozenInstanceError):
        top.directed = True  # type: ignore[misc]
    with pytest.raises(nx.NetworkXError, match="Frozen"):
        top.graph.add_edge(0, 2)


@pytest.mark.parametrize(
    ("graph", "directed", "positions", "expected"),
    [
        (nx.Graph([(0, 1)]), False, None, "expected a networkx.DiGraph, got Graph"),
        (nx.MultiDiGraph([(0, 1)]), True, None, "expected a networkx.DiGraph"),
        (nx.DiGraph(), False, None, "has no agents"),
        (nx.DiGraph([(0, 1), (1, 0), (1, 5)]), True, None, "integers 0..2; found labels [5]"),
        (nx.DiGraph([("a", "b")]), True, None, "found labels ['a', 'b']"),
        (nx.DiGraph([(0, 1), (1, 1)]), True, None, "self-loops on agents [1]"),
        (nx.DiGraph([(0, 1), (1, 0), (1, 2)]), False, None, "link 1 -> 2 has no reverse link"),
        (nx.DiGraph([(0, 1), (1, 0)]), 1, None, "directed must be True or False"),
        (nx.DiGraph([(0, 1), (1, 0)]), False, {0: (0, 0)}, "missing [1]"),
        (nx.DiGraph([(0, 1), (1, 0)]), False, {0: (0, 0), 1: "ab"}, "position of agent 1"),
        (nx.DiGraph([(0, 1), (1, 0)]), False, {0: (0, 0), 1: (1, math.inf)}, "not finite"),
    ],
)
def test_record_rules(graph, directed, positions, expected):
    with pytest.raises(TopologyError) as err:
        Topology(graph=graph, directed=directed, positions=positions)
    assert expected in str(err.value)


def test_equality_covers_links_direction_and_params():
    ring = build("ring", 6, seed=0)
    assert ring == build("ring", 6, seed=99)  # deterministic shapes ignore the seed
    assert ring != build("path", 6, seed=0)
    same_links = Topology(graph=ring.graph, directed=True, shape="ring")
    assert ring != same_links
    assert ring != "ring"
    assert "shape='ring', n=6, directed=False, links=12" in repr(ring)


def test_from_graph_converts_kinds():
    undirected = from_graph(nx.cycle_graph(5))
    assert not undirected.directed and undirected.graph.number_of_edges() == 10
    symmetrized = from_graph(nx.DiGraph(RELAY), directed=False)
    assert not symmetrized.directed
    assert undirected_set(symmetrized.undirected_edges()) == undirected_set(RELAY)
    marked = from_graph(nx.cycle_graph(4), directed=True)
    assert marked.directed and marked.graph.number_of_edges() == 8
    multi = from_graph(nx.MultiGraph([(0, 1), (0, 1), (1, 2)]))
    assert multi.undirected_edges() == [(0, 1), (1, 2)]
    pos = {0: (0.0, 0.0), 1: (1.0, 2.0), 2: (3.0, 2.0)}
    placed = nx.path_graph(3)
    nx.set_node_attributes(placed, pos, "pos")
    assert from_graph(placed).positions == pos


@pytest.mark.parametrize(
    ("graph", "expected"),
    [
        ("not a graph", "expected a networkx graph, got str"),
        (nx.Graph(), "null graph"),
        (nx.path_graph(["a", "b"]), "agent labels must be the integers 0..1"),
        (nx.Graph([(0, 1), (1, 1)]), "self-loop on agent 1 is not allowed"),
        (nx.Graph([(0, 1), (2, 3)]), "agents [2, 3] are cut off from agent 0"),
    ],
)
def test_from_graph_refusals(graph, expected):
    with pytest.raises(TopologyError) as err:
        from_graph(graph, where="field.graphml")
    assert str(err.value).startswith("field.graphml: ")
    assert expected in str(err.value)


def test_partial_positions_are_refused():
    g = nx.path_graph(3)
    g.nodes[0]["x"] = 0.0
    g.nodes[0]["y"] = 1.0
    with pytest.raises(TopologyError, match=r"agents \[1, 2\] do not"):
        from_graph(g)


# Connectivity ------------------------------------------------------------------------------


def test_require_connected_names_the_cut_off_agents_undirected():
    g = nx.path_graph(7)
    g.add_nodes_from([7, 9])
    g.add_edge(8, 6)
    with pytest.raises(TopologyError) as err:
        require_connected(g)
    assert str(err.value) == (
        "topology: the graph is not connected: agents [7, 9] are cut off from agent 0"
    )
    g.add_edges_from([(7, 8)])
    with pytest.raises(TopologyError, match=r"^topology: .*: agent 9 is cut off from agent 0$"):
        require_connected(g)


def test_require_connected_directed_says_who_cannot_reach_or_be_reached():
    chain = nx.DiGraph([(0, 1), (1, 2)])
    with pytest.raises(TopologyError) as err:
        require_connected(chain, where="relay.edges")
    assert str(err.value) == (
        "relay.edges: the directed graph is not strongly connected:"
        " agents [1, 2] cannot reach agent 0"
    )
    feeding = nx.DiGraph([(1, 0), (2, 0), (0, 3), (3, 0)])
    with pytest.raises(TopologyError) as err:
        require_connected(feeding)
    assert "agents [1, 2] cannot be reached from agent 0" in str(err.value)
    assert "cannot reach agent 0" not in str(err.value)
    # both kinds at once, and an isolated agent appears in both lists
    mixed = nx.DiGraph([(0, 1), (2, 0)])
    mixed.add_node(3)
    with pytest.raises(TopologyError) as err:
        require_connected(mixed)
    msg = str(err.value)
    assert "agents [2, 3] cannot be reached from agent 0" in msg
    assert "agents [1, 3] cannot reach agent 0" in msg


def test_require_connected_accepts_connected_inputs():
    require_connected(build("ring", 5, seed=0))
    require_connected(nx.DiGraph(RELAY))
    require_connected(nx.path_graph(1))
    # a one-way link that the undirected view would call connected is not enough
    assert nx.is_weakly_connected(nx.DiGraph([(0, 1)]))
    with pytest.raises(TopologyError, match="agent 1 cannot reach agent 0"):
        require_connected(nx.DiGraph([(0, 1)]))


def test_require_connected_refuses_null_graph_and_non_graphs():
    with pytest.raises(TopologyError, match="null graph"):
        require_connected(nx.Graph())
    with pytest.raises(TopologyError, match="expected a Topology or a networkx graph, got list"):
        require_connected([(0, 1)])


def test_long_listings_are_shortened():
    g = nx.Graph()
    g.add_nodes_from(range(40))
    g.add_edge(0, 1)
    with pytest.raises(TopologyError, match=r"\.\.\.\] \(38 in all\) are cut off"):
        require_connected(g)


# Degrees and matrices (against networkx) -----------------------------------------------------


@pytest.mark.parametrize(
    ("shape", "params"),
    [
        ("ring", {}),
        ("star", {}),
        ("grid", {"rows": 3, "cols": 4}),
        ("random-geometric", {"radius": 0.5}),
        ("small-world", {"k": 4, "p": 0.3}),
    ],
)
def test_degrees_and_laplacian_match_networkx(shape, params):
    top = build(shape, 12, seed=5, **params)
    ref = nx.Graph(top.undirected_edges())
    expected_degrees = [ref.degree(i) for i in range(12)]
    assert degrees(top).tolist() == expected_degrees
    assert degrees(top).dtype == np.int64
    assert max_degree(top) == max(expected_degrees)
    ref_l = nx.laplacian_matrix(ref, nodelist=range(12)).toarray()
    np.testing.assert_array_equal(laplacian(top), ref_l)
    np.testing.assert_array_equal(adjacency(top), nx.to_numpy_array(ref, nodelist=range(12)))


def test_directed_adjacency_convention_is_i_hears_from_j():
    top = relay_topology()
    a = adjacency(top)
    assert a[1, 0] == 1.0 and a[0, 1] == 0.0  # link 0 -> 1: agent 1 hears agent 0
    g = nx.DiGraph(RELAY)
    # networkx puts u -> v at [u, v]; ours is the transpose
    np.testing.assert_array_equal(a, nx.to_numpy_array(g, nodelist=range(4)).T)
    assert degrees(top).tolist() == [g.out_degree(i) for i in range(4)]
    # in-degree Laplacian D_in - A: networkx's out-degree Laplacian of the reversed digraph
    ref_l = nx.laplacian_matrix(g.reverse(), nodelist=range(4)).toarray()
    np.testing.assert_array_equal(laplacian(top), ref_l)
    np.testing.assert_array_equal(laplacian(top).sum(axis=1), np.zeros(4))


def test_undirected_only_rules_refuse_directed_topologies():
    top = relay_topology()
    with pytest.raises(TopologyError, match="push-sum or a row-stochastic"):
        metropolis_weights(top)
    with pytest.raises(TopologyError, match="laplacian_step_bound"):
        laplacian_step_limit(top)


def test_link_lengths_need_positions():
    with pytest.raises(TopologyError, match=r"topology \(ring\): has no agent positions"):
        link_lengths(build("ring", 4, seed=0))


def test_spectral_facts_refuses_bad_matrices():
    with pytest.raises(TopologyError, match=r"non-empty square matrix, got shape \(2, 3\)"):
        spectral_facts(np.ones((2, 3)))
    with pytest.raises(TopologyError, match=r"shape \(3,\)"):
        spectral_facts(np.ones(3))
    with pytest.raises(
        TopologyError, match=r"^weights: expected finite entries, got nan at \(1, 0\)"
    ):
        spectral_facts(np.array([[1.0, 0.0], [math.nan, 1.0]]), where="weights")
    with pytest.raises(TopologyError, match="square matrix of numbers"):
        spectral_facts([["a"]])


def test_graph_facts_are_plain_json():
    facts = graph_facts(build("random-geometric", 15, seed=3, radius=0.5))
    text = json.dumps(facts.as_dict(), allow_nan=False)
    back = json.loads(text)
    assert back["n"] == 15 and back["directed"] is False
    assert back["links"] == 2 * back["edges"]
    assert len(back["metropolis"]["eigenvalues"]) == 15
    assert back["metropolis"]["perron"] == pytest.approx([1 / 15] * 15)
    directed = graph_facts(relay_topology()).as_dict()
    json.dumps(directed, allow_nan=False)
    assert directed["metropolis"] is None and directed["algebraic_connectivity"] is None
    assert directed["edges"] == directed["links"] == 6
    # a nonsymmetric spectrum with complex eigenvalues: [re, im] pairs
    rotation = spectral_facts(np.roll(np.eye(3), 1, axis=1)).as_dict()
    json.dumps(rotation, allow_nan=False)
    # the cyclic shift of 3 agents has the cube roots of unity, by descending real part
    first, second, third = rotation["eigenvalues"]
    assert first == pytest.approx(1.0)
    assert second == pytest.approx([-0.5, math.sqrt(3) / 2])
    assert third == pytest.approx([-0.5, -math.sqrt(3) / 2])


# Edge lists -----------------------------------------------------------------------------------


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_edge_list_example_file():
    path = DATA / "lab-floor.edges"
    top = load(path)
    assert not top.directed and top.n == 6
    grid = nx.relabel_nodes(nx.grid_2d_graph(2, 3), lambda rc: rc[0] * 3 + rc[1])
    assert undirected_set(top.undirected_edges()) == undirected_set(grid.edges) | {
        frozenset((2, 4))
    }
    assert top.shape == "file" and top.params == {"file": str(path)}


def test_directed_marker_and_override():
    top = load(DATA / "relay-directed.edges")
    assert top.directed and top.edges() == sorted(RELAY)
    both_ways = load(DATA / "relay-directed.edges", directed=False)
    assert not both_ways.directed
    assert undirected_set(both_ways.undirected_edges()) == undirected_set(RELAY)


def test_unmarked_file_read_as_directed(tmp_path):
    path = write(tmp_path, "cycle.txt", "0 1\n1 2\n2 0\n")
    assert not load(path).directed
    # an unmarked file read as directed: each line is the link u -> v
    top = load(path, directed=True)
    assert top.directed and top.edges() == [(0, 1), (1, 2), (2, 0)]
    marked = write(tmp_path, "marked.txt", "\n# relay\n#   Directed  \n0 1\n1 0\n")
    assert load(marked).directed
    explicit = write(tmp_path, "explicit.txt", "# undirected\n0 1\n1 2\n")
    assert not load(explicit).directed


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        (
            "0 1\n1 2 3\n",
            "bad.txt, line 2: expected one link 'u v' (two agent ids), got a line of 3 fields",
        ),
        ("0 1\n\n7\n", "bad.txt, line 3: expected one link 'u v'"),
        ("0 1\n1 a\n", "bad.txt, line 2: field 2 is not a non-negative integer"),
        ("0 -1\n", "bad.txt, line 1: field 2 is not a non-negative integer"),
        ("-0 1.5\n", "line 1: field 1 is not"),
        ("# links\n0 1\n1 1\n", "bad.txt, line 3: self-loop on agent 1 is not allowed"),
        ("0 1\n# directed\n1 0\n", "bad.txt, line 2: the '# directed' marker must come before"),
        ("# nothing here\n\n", "bad.txt: no links found"),
        ("0 1\n1 3\n", "bad.txt: agents [2] appear on no line; expected agents numbered 0..3"),
        ("0 1\n2 3\n", "bad.txt: the graph is not connected: agents [2, 3] are cut off"),
        ("# directed\n0 1\n1 2\n", "bad.txt: the directed graph is not strongly connected"),
    ],
)
def test_malformed_edge_lists_name_file_and_line(tmp_path, text, expected):
    path = write(tmp_path, "bad.txt", text)
    with pytest.raises(TopologyError) as err:
        load(path)
    assert str(err.value).startswith(str(path))
    assert expected.replace("bad.txt", str(path)) in str(err.value)


def test_edge_list_errors_never_show_the_file_contents(tmp_path):
    # a topology path may name any readable file: its first line must not reach the screen
    secret = "admin:x9Fq2:19000:0:99999:7:::"
    path = write(tmp_path, "not-a-graph", f"{secret}\nsecond line with words\n")
    with pytest.raises(TopologyError) as err:
        load(path)
    assert "line 1" in str(err.value)
    assert "admin" not in str(err.value) and "x9Fq2" not in str(err.value)


def test_missing_and_binary_files(tmp_path):
    with pytest.raises(TopologyError, match=r"nowhere\.edges: cannot read the graph file"):
        load(tmp_path / "nowhere.edges")
    blob = tmp_path / "blob.edges"
    blob.write_bytes(b"\xff\xfe\x00\x01")
    with pytest.raises(TopologyError, match=r"blob\.edges: not a UTF-8 text file"):
        load(blob)
    with pytest.raises(TopologyError, match="directed must be True, False or None"):
        load(DATA / "lab-floor.edges", directed="yes")


# GraphML ------------------------------------------------------------------------------------


def test_graphml_written_by_networkx(tmp_path):
    undirected = tmp_path / "ring.graphml"
    nx.write_graphml(nx.cycle_graph(6), undirected)
    top = load(undirected)
    assert not top.directed
    assert undirected_set(top.undirected_edges()) == undirected_set(nx.cycle_graph(6).edges)
    assert top.positions is None

    directed = tmp_path / "relay.GraphML"
    nx.write_graphml(nx.DiGraph(RELAY), directed)
    top = load(directed)
    assert top.directed and top.edges() == sorted(RELAY)
    assert not load(directed, directed=False).directed

    with pytest.raises(TopologyError, match=r"ring\.graphml: the file is undirected"):
        load(undirected, directed=True)


def test_graphml_positions_from_x_y(tmp_path):
    g = nx.path_graph(3)
    nx.set_node_attributes(g, {0: 0.0, 1: 0.3, 2: 0.3}, "x")
    nx.set_node_attributes(g, {0: 0.0, 1: 0.4, 2: 1.4}, "y")
    path = tmp_path / "placed.graphml"
    nx.write_graphml(g, path)
    top = load(path)
    assert top.positions == {0: (0.0, 0.0), 1: (0.3, 0.4), 2: (0.3, 1.4)}
    assert link_lengths(top)[(0, 1)] == pytest.approx(0.5)
    assert link_lengths(top)[(2, 1)] == pytest.approx(1.0)


def test_graphml_in_the_primer_style():
    top = load(DATA / "corridor-primer.graphml")
    assert not top.directed
    assert top.undirected_edges() == [(0, 1), (0, 2), (1, 2), (2, 3)]
    # 3-4-5 triangle corners
    assert link_lengths(top)[(0, 2)] == pytest.approx(5.0)
    assert link_lengths(top)[(1, 2)] == pytest.approx(4.0)


@pytest.mark.parametrize(
    ("graph", "expected"),
    [
        (nx.path_graph(["a", "b", "c"]), "GraphML node id 'a' is not an agent number"),
        (nx.Graph([(0, 1), (1, 1)]), "self-loop on agent 1 is not allowed"),
        (nx.Graph([(0, 1), (1, 5)]), "node ids ['5'] are out of range and agents [2] are missing"),
        (nx.Graph([("0", "n1"), ("n1", "2")]), "mix the forms"),
        (nx.Graph([(0, 1), (2, 3)]), "agents [2, 3] are cut off from agent 0"),
    ],
)
def test_malformed_graphml_names_the_file(tmp_path, graph, expected):
    path = tmp_path / "bad.graphml"
    nx.write_graphml(graph, path)
    with pytest.raises(TopologyError) as err:
        load(path)
    assert str(err.value).startswith(f"{path}: ")
    assert expected in str(err.value)


@pytest.mark.parametrize(
    "text",
    [
        "<graphml><graph edgedefault='undirected'><node id='0'/>",  # truncated XML
        "<html><body>not a graph</body></html>",
        "0 1\n1 2\n",
    ],
)
def test_unreadable_graphml_names_the_file(tmp_path, text):
    path = write(tmp_path, "broken.graphml", text)
    with pytest.raises(TopologyError, match=r"broken\.graphml: not a readable GraphML file"):
        load(path)
