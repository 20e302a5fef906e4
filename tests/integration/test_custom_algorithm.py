"""The template of DEVELOPERS.md: a user's algorithm, selected by name, on real processes."""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pytest

import coordinator
from coordinator._rundir import read_telemetry
from node import AgentSpec, StepRule, objective_from_spec, run_in_memory
from tests.plugins.lazy_dgd import LazyDGD

pytestmark = pytest.mark.integration

N, ALPHA, LAM = 8, 0.1, 0.5


def _ring_weights(n: int) -> np.ndarray:
    # Metropolis–Hastings weights (Xiao, Boyd, Lall 2005), recomputed with networkx degrees
    G = nx.cycle_graph(n)
    W = np.zeros((n, n))
    for i, j in G.edges():
        W[i, j] = W[j, i] = 1.0 / (1 + max(G.degree[i], G.degree[j]))
    return W + np.diag(1.0 - W.sum(axis=1))


def _fixed_point(b: np.ndarray, W: np.ndarray) -> np.ndarray:
    # lam (I - W) x + alpha (x - b) = 0 for f_i = 1/2 (x - b_i)^2 (derived, as for DGD)
    n = len(b)
    return ALPHA * np.linalg.solve(ALPHA * np.eye(n) + LAM * (np.eye(n) - W), b)


def test_in_memory_first():
    """Step 1 of the template: the pure core, no sockets."""
    W = _ring_weights(N)
    b = np.linspace(-3.0, 4.0, N)
    specs = [
        AgentSpec(
            id=i,
            n_agents=N,
            dimension=1,
            in_neighbours=((i - 1) % N, (i + 1) % N),
            out_neighbours=((i - 1) % N, (i + 1) % N),
            weights={j: W[i, j] for j in ((i - 1) % N, (i + 1) % N, i)},
            objective=objective_from_spec(
                {"kind": "quadratic", "target": [b[i]], "curvature": [[1.0]]}
            ),
            initial_state=np.zeros(1),
            initial_priorities=None,
            step=StepRule(step=ALPHA),
            params={"lam": LAM},
        )
        for i in range(N)
    ]
    states = run_in_memory([LazyDGD(s) for s in specs], 600)
    x = np.array([s.x[0] for s in states])
    assert np.max(np.abs(x - _fixed_point(b, W))) < 1e-10


def test_selected_by_name_in_a_scenario(processes, tmp_path):
    """Step 2: the same class in agent processes, selected by name from a scenario."""
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    result = coordinator.run(
        {
            "swarm": {
                "name": "lazy",
                "agents": N,
                "dimension": 1,
                "seed": 2,
                "mode": "rounds",
                "iterations": 600,
            },
            "topology": {"shape": "ring"},
            "algorithm": {
                "name": "lazy-dgd",
                "module": "tests.plugins.lazy_dgd",
                "step": ALPHA,
                "params": {"lam": LAM},
            },
        },
        out=out,
    )
    assert result.exit_code == 0, result.summary["exit"]
    assert result.summary["algorithm"] == "lazy-dgd"
    agents = json.loads((out / "agents.json").read_text())
    b = np.array([a["objective"]["target"][0] for a in agents])
    finals = []
    for i in range(N):
        last = [x for x in read_telemetry(out / "telemetry" / f"agent-{i}.msgpack") if "final" in x]
        finals.append(last[-1]["final"]["state"]["x"][0])
    x_star = _fixed_point(b, _ring_weights(N))
    assert np.max(np.abs(np.array(finals) - x_star)) < 1e-8
