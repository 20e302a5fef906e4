"""Test helpers: agent specs from a numpy weight matrix, Metropolis weights, seeded drops.

Kept independent of the topologies package on purpose: the reference tests build their
graphs and weights here with numpy and networkx, so a bug there cannot hide one in the
algorithms.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import networkx as nx
import numpy as np

from node._algorithm import AgentSpec, Algorithm, StepRule
from node._objectives import Objective, Quadratic
from node._rng import stream_key, uniform


def metropolis(adjacency: np.ndarray) -> np.ndarray:
    """w_ij = 1/(1 + max(d_i, d_j)) on edges, w_ii = 1 - sum_j w_ij (Xiao, Boyd, Lall 2005)."""
    h = (np.asarray(adjacency) > 0).astype(float)
    np.fill_diagonal(h, 0.0)
    d = h.sum(axis=1)
    w = h / (1.0 + np.maximum.outer(d, d))
    np.fill_diagonal(w, 1.0 - w.sum(axis=1))
    return w


def ring_adjacency(n: int) -> np.ndarray:
    h = np.zeros((n, n))
    for i in range(n):
        h[i, (i + 1) % n] = h[(i + 1) % n, i] = 1.0
    return h


def path_adjacency(n: int) -> np.ndarray:
    h = np.zeros((n, n))
    for i in range(n - 1):
        h[i, i + 1] = h[i + 1, i] = 1.0
    return h


def digraph_in_matrix(edges: Sequence[tuple[int, int]], n: int) -> np.ndarray:
    """H[i, j] = 1 when j -> i (i hears j)."""
    h = np.zeros((n, n))
    for src, dst in edges:
        h[dst, src] = 1.0
    return h


def in_neighbour_average(in_matrix: np.ndarray) -> np.ndarray:
    """Row-stochastic: each agent averages itself and its in-neighbours equally."""
    h = (np.asarray(in_matrix) > 0).astype(float)
    np.fill_diagonal(h, 1.0)
    return h / h.sum(axis=1, keepdims=True)


def connected_geometric_graph(n: int, radius: float, first_seed: int) -> tuple[np.ndarray, int]:
    """Adjacency of the first connected networkx random geometric graph from ``first_seed``."""
    for seed in range(first_seed, first_seed + 200):
        g = nx.random_geometric_graph(n, radius, seed=seed)
        if nx.is_connected(g):
            return nx.to_numpy_array(g, nodelist=range(n)), seed
    raise AssertionError(f"no connected random geometric graph for n={n}, radius={radius}")


def unit_quadratics(targets: np.ndarray, curvature: float = 1.0) -> list[Objective]:
    """f_i(x) = (curvature/2) ||x - b_i||^2, one per row of ``targets``."""
    t = np.atleast_2d(np.asarray(targets, dtype=float))
    d = t.shape[1]
    return [Quadratic(target=row, curvature=curvature * np.eye(d)) for row in t]


def make_specs(
    weights: np.ndarray,
    objectives: Sequence[Objective],
    x0: np.ndarray,
    *,
    priorities: np.ndarray | None = None,
    step: float | Mapping[str, Any] = 0.05,
    params: Mapping[str, Any] | None = None,
) -> list[AgentSpec]:
    """One AgentSpec per row of ``weights``: W[i, j] > 0 (j != i) means i hears j."""
    w = np.asarray(weights, dtype=float)
    n = w.shape[0]
    x0 = np.asarray(x0, dtype=float).reshape(n, -1)  # one row per agent
    hears = (w > 0) & ~np.eye(n, dtype=bool)
    ins = [tuple(int(j) for j in np.flatnonzero(hears[i])) for i in range(n)]
    outs = [tuple(int(i) for i in np.flatnonzero(hears[:, j])) for j in range(n)]
    specs = []
    for i in range(n):
        row = {j: float(w[i, j]) for j in ins[i]}
        row[i] = float(w[i, i])
        specs.append(
            AgentSpec(
                id=i,
                n_agents=n,
                dimension=x0.shape[1],
                in_neighbours=ins[i],
                out_neighbours=outs[i],
                weights=row,
                objective=objectives[i],
                initial_state=x0[i].copy(),
                initial_priorities=None if priorities is None else np.asarray(priorities[i]),
                step=StepRule.from_spec(step),
                in_neighbour_out_degree={j: len(outs[j]) for j in ins[i]},
                params=dict(params or {}),
            )
        )
    return specs


def build(cls: type[Algorithm], specs: Sequence[AgentSpec]) -> list[Algorithm]:
    return [cls(s) for s in specs]


def bernoulli_loss(seed: int, rate: float) -> Callable[[int, int, int], bool]:
    """deliver(src, dst, k): each message independently lost with probability ``rate``."""

    def deliver(src: int, dst: int, k: int) -> bool:
        return uniform(stream_key(seed, src, dst), k) >= rate

    return deliver
