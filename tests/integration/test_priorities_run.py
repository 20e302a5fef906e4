"""Priority diagnostics from real agent processes (methods.md, priority-weighted method)."""

from __future__ import annotations

import csv

import numpy as np
import pytest

import coordinator
from coordinator._rundir import read_telemetry

pytestmark = pytest.mark.integration

B = (0.0, 1.0, 4.0)
UNEQUAL = [[0.5, 0.3, 0.2], [0.2, 0.2, 0.6], [0.1, 0.1, 0.8]]


def _path_scenario(name: str, prios: list[list[float]], gain: float, **extra) -> dict:
    return {
        "swarm": {
            "name": name,
            "agents": 3,
            "dimension": 1,
            "seed": 1,
            "mode": "rounds",
            "iterations": 3000,
        },
        "topology": {"shape": "path"},
        "priorities": {"initial": prios, "gain": gain},
        "algorithm": {"name": "priority-weighted", "step": 0.05, **extra},
        "agent": [{"id": i, "target": [b]} for i, b in enumerate(B)],
    }


def test_unequal_priorities_report_effective_weights_and_reach_their_optimum(processes, tmp_path):
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    result = coordinator.run(_path_scenario("unequal", UNEQUAL, 0.0), out=out)
    s = result.summary
    assert result.exit_code == 0, s["exit"]
    # the row-stochastic mix each agent builds from its own vector (methods.md): a_ij = w_i^j
    # for a neighbour heard, a_ii = w_i^i plus the priorities of agents it does not hear
    W = np.asarray(UNEQUAL)
    A = np.array(
        [
            [W[0, 0] + W[0, 2], W[0, 1], 0.0],
            [W[1, 0], W[1, 1], W[1, 2]],
            [0.0, W[2, 1], W[2, 2] + W[2, 0]],
        ]
    )
    ev, vecs = np.linalg.eig(A.T)  # left Perron vector, recomputed with numpy
    pi = np.real(vecs[:, np.argmin(np.abs(ev - 1.0))])
    pi /= pi.sum()
    np.testing.assert_allclose(s["effective_priorities"], pi, atol=1e-9)
    np.testing.assert_allclose(s["intended_priorities"], W.mean(axis=0), atol=1e-12)
    assert np.abs(pi - W.mean(axis=0)).max() > 0.2  # the swarm weighs other than asked
    finals = []
    for i in range(3):
        last = [b for b in read_telemetry(out / "telemetry" / f"agent-{i}.msgpack") if "final" in b]
        finals.append(last[-1]["final"]["state"]["x"][0])
    # the pi-weighted average of the fixed point is the effective optimum pi^T b (derived)
    assert abs(pi @ np.asarray(finals) - pi @ np.asarray(B)) < 1e-8
    assert abs(pi @ np.asarray(B) - 3.260870) < 1e-6  # methods.md worked example
    assert s["gap_to_effective"] < s["gap_to_intended"]


def _last_drift(run_dir) -> float:
    with (run_dir / "metrics.csv").open() as f:
        rows = list(csv.DictReader(f))
    return float(rows[-1]["priority_drift"])


@pytest.mark.parametrize("averaging", ["laplacian", "ratio"])
def test_thirty_percent_loss_drifts_laplacian_averaging_but_not_ratio_consensus(
    processes, tmp_path, averaging
):
    # Vaidya, Hadjicostis, Domínguez-García (2011): running sums make ratio consensus exact
    # under drops; plain Laplacian averaging loses mass and drifts (Fagnani & Zampieri).
    n = 6
    rng = np.random.default_rng(5)
    prios = rng.dirichlet(np.ones(n), size=n).tolist()
    sc = _path_scenario(f"drift-{averaging}", prios, 0.3, priority_averaging=averaging)
    sc["swarm"].update(agents=n, iterations=1500)
    sc["topology"] = {"shape": "ring"}
    sc["agent"] = []
    sc["fault"] = [{"kind": "loss", "links": "all", "rate": 0.3}]
    out = tmp_path / averaging
    processes.watch_run_dir(out)
    result = coordinator.run(sc, out=out)
    assert result.exit_code == 0, result.summary["exit"]
    assert result.summary["messages"]["dropped_injected"] > 0
    drift = _last_drift(out)
    if averaging == "laplacian":
        assert drift > 1e-3, drift
    else:
        assert drift < 1e-9, drift
