"""Fault scopes resolved to directed links, checked against networkx and scipy."""

from __future__ import annotations

from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from coordinator._scopes import links_in_scope
from topologies._errors import ScenarioError

WHERE = "scenario.toml: [[fault]] #1: links"


@dataclass(frozen=True)
class StandIn:
    """The three members of a topology that scopes use."""

    n: int
    links: tuple[tuple[int, int], ...]
    positions: dict[int, tuple[float, float]] | None = field(default=None)

    def edges(self) -> list[tuple[int, int]]:
        return sorted(self.links)


def from_graph(g: nx.Graph, positions: dict | None = None) -> StandIn:
    d = g.to_directed() if not g.is_directed() else g
    return StandIn(g.number_of_nodes(), tuple(d.edges()), positions)


RING = from_graph(nx.cycle_graph(6))
DIGRAPH = from_graph(nx.DiGraph([(0, 1), (1, 2), (2, 0), (0, 2), (2, 3), (3, 0)]))


def test_all_is_every_directed_link() -> None:
    assert links_in_scope("all", RING, where=WHERE) == sorted(
        nx.cycle_graph(6).to_directed().edges()
    )


def test_one_directed_link() -> None:
    assert links_in_scope({"from": 2, "to": 3}, RING, where=WHERE) == [(2, 3)]
    with pytest.raises(
        ScenarioError, match=r"\[\[fault\]\] #1: links: the topology has no link 0 -> 3"
    ):
        links_in_scope({"from": 0, "to": 3}, RING, where=WHERE)


def test_edge_is_both_directions_that_exist() -> None:
    assert links_in_scope({"edge": [4, 3]}, RING, where=WHERE) == [(3, 4), (4, 3)]
    assert links_in_scope({"edge": [1, 2]}, DIGRAPH, where=WHERE) == [(1, 2)]
    with pytest.raises(ScenarioError, match="no link between 1 and 3"):
        links_in_scope({"edge": [1, 3]}, DIGRAPH, where=WHERE)
    with pytest.raises(ScenarioError, match="two different agents"):
        links_in_scope({"edge": [2, 2]}, RING, where=WHERE)
    with pytest.raises(ScenarioError, match=r"links.edge: expected a pair"):
        links_in_scope({"edge": [1, 2, 3]}, RING, where=WHERE)


def test_out_and_in_links_match_networkx() -> None:
    g = nx.DiGraph(list(DIGRAPH.links))
    for a in range(4):
        assert links_in_scope({"from": a}, DIGRAPH, where=WHERE) == sorted(g.out_edges(a))
        assert links_in_scope({"to": a}, DIGRAPH, where=WHERE) == sorted(g.in_edges(a))


def test_between_is_the_cut_of_the_partition() -> None:
    g = nx.petersen_graph()
    topo = from_graph(g)
    groups = [[0, 1, 2, 3], [5, 6, 7]]  # 4, 8, 9 in no group
    got = links_in_scope({"between": groups}, topo, where=WHERE)
    d = g.to_directed()
    a, b = set(groups[0]), set(groups[1])
    expected = sorted(nx.edge_boundary(d, a, b)) + sorted(nx.edge_boundary(d, b, a))
    assert got == sorted(expected)
    assert all(4 not in e and 8 not in e and 9 not in e for e in got)


def test_between_three_groups() -> None:
    got = links_in_scope({"between": [[0, 1], [2, 3], [4, 5]]}, RING, where=WHERE)
    assert got == sorted([(1, 2), (2, 1), (3, 4), (4, 3), (5, 0), (0, 5)])


@pytest.mark.parametrize(
    ("groups", "match"),
    [
        ([[0, 1, 2]], "at least two groups"),
        ([[0, 1], [1, 2]], r"between\[1\]\[0\]: agent 1 is already in group 0; expected disjoint"),
        ([[0, 1], []], r"between\[1\]: expected a non-empty list"),
        ([[0, 1], [9]], r"between\[1\]\[0\]: agent 9 does not exist; expected an id in 0..5"),
        ([[0, 1], ["a"]], r"expected an agent id \(integer\)"),
    ],
)
def test_between_rejects_bad_groups(groups: list, match: str) -> None:
    with pytest.raises(ScenarioError, match=match):
        links_in_scope({"between": groups}, RING, where=WHERE)


def test_longer_than_matches_scipy_distances() -> None:
    g = nx.random_geometric_graph(30, 0.35, seed=4)
    pos = {i: tuple(map(float, g.nodes[i]["pos"])) for i in g}
    topo = from_graph(g, pos)
    xy = np.array([pos[i] for i in range(30)])
    dist = cdist(xy, xy)
    for r in (0.0, 0.1, 0.2, 0.3):
        got = links_in_scope({"longer_than": r}, topo, where=WHERE)
        assert got == sorted((s, d) for s, d in topo.edges() if dist[s, d] > r)
    assert links_in_scope({"longer_than": 0.35}, topo, where=WHERE) == []
    assert links_in_scope({"longer_than": 0}, topo, where=WHERE) == topo.edges()


def test_longer_than_needs_positions() -> None:
    with pytest.raises(ScenarioError, match='shape must be "random-geometric" or "grid"'):
        links_in_scope({"longer_than": 0.3}, RING, where=WHERE)
    with pytest.raises(ScenarioError, match="expected a non-negative length"):
        links_in_scope({"longer_than": -1}, RING, where=WHERE)


@pytest.mark.parametrize(
    ("scope", "match"),
    [
        ("none", r"\[\[fault\]\] #1: links: expected a link scope \"all\""),
        ({}, "expected a link scope"),
        ({"from": 1, "edge": [1, 2]}, "expected a link scope"),
        ({"form": 1}, "expected a link scope"),
        (3, "expected a link scope"),
        ({"from": 6}, r"links.from: agent 6 does not exist; expected an id in 0..5"),
        ({"to": True}, r"links.to: expected an agent id"),
        ({"from": 1, "to": -1}, r"links.to: agent -1 does not exist"),
    ],
)
def test_bad_scopes_name_where_and_what_was_expected(scope: object, match: str) -> None:
    with pytest.raises(ScenarioError, match=match):
        links_in_scope(scope, RING, where=WHERE)
