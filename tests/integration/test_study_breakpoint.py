"""A break-point search along the DGD step lands on the linear-stability bound.

For quadratics f_i(x) = c/2 |x - b_i|^2 with mixing matrix W, DGD is the linear iteration
x <- (W - alpha c I) x + alpha c b: it stays bounded iff |lambda(W) - alpha c| < 1 for every
eigenvalue of W, i.e. alpha < (1 + lambda_min(W)) / c (the standard stability argument for
a linear system; the same step bound is in Yuan, Ling and Yin, "On the convergence of
decentralized gradient descent", SIAM J. Optim. 26(3), 2016). On an even ring with
Metropolis–Hastings weights lambda_min(W) = -1/3, so the bound is 2/3 for c = 1.
"""

from __future__ import annotations

import json
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

import coordinator
from coordinator._study import StudyOptions, run_study

# many runs on a shared 2-core machine: a hang guard well above the project's 180 s default
pytestmark = [pytest.mark.integration, pytest.mark.timeout(1200)]

AGENTS = 8
CURVATURE = 1.0
#: starting far from agreement, alternating +-1e5 (the eigenvector of lambda_min): a step
#: beyond the bound by delta grows it by about (1 + delta)^k and reaches the divergence
#: bound 1e12 within the 5000 iterations once delta > ln(1e7) / 5000 = 0.0032 [derived],
#: while a stable step never leaves the region; so the budget hides the bound by less than
#: the search's resolution ((high - low) / 64 = 0.011)
AGENT_TABLES = "\n".join(
    f"[[scenario.agent]]\nid = {i}\ninitial_state = [{(-1) ** i * 1e5}, {(-1) ** i * 1e5}]"
    for i in range(AGENTS)
)

STUDY = f"""
[study]
name = "reef-step"
kind = "breakpoint"
seeds = 3
success = "not diverged"
engine = "batch"

[scenario.swarm]
name = "reef-step"
agents = {AGENTS}
dimension = 2
iterations = 5000
seed = 11
[scenario.telemetry]
every_iterations = 50
[scenario.topology]
shape = "ring"
[scenario.objective]
kind = "quadratic"
curvature = "identity"
[scenario.algorithm]
name = "dgd"
step = 0.5

{AGENT_TABLES}
[search]
key = "algorithm.step"
low = 0.3
high = 1.0
"""


def _metropolis_lambda_min(n: int) -> float:
    """lambda_min of the Metropolis–Hastings matrix of the n-ring, built here from networkx's
    cycle graph (w_ij = 1 / (1 + max(d_i, d_j)), w_ii = 1 - sum_j w_ij) and numpy."""
    g = nx.cycle_graph(n)
    w = np.zeros((n, n))
    for i, j in g.edges:
        w[i, j] = w[j, i] = 1.0 / (1 + max(g.degree[i], g.degree[j]))
    w[np.diag_indices(n)] = 1.0 - w.sum(axis=1)
    return float(np.linalg.eigvalsh(w).min())


def test_breakpoint_search_finds_the_dgd_step_bound(tmp_path: Path) -> None:
    lam_min = _metropolis_lambda_min(AGENTS)
    assert lam_min == pytest.approx(-1.0 / 3.0, abs=1e-12)  # 1/3 + 2/3 cos(pi), even ring
    bound = (1.0 + lam_min) / CURVATURE

    (tmp_path / "reef.toml").write_text(STUDY)
    out = run_study(tmp_path / "reef.toml", StudyOptions(out=tmp_path / "s", workers=2))
    bp = json.loads((out / "breakpoint.json").read_text())
    assert bp["key"] == "algorithm.step" and bp["inside"] is True
    lo, hi = bp["interval"]
    assert lo <= bound <= hi, bp
    assert abs(bp["estimate"] - bound) <= 0.02, bp
    # every point tried is reported, and each one's outcome agrees with the bound: stable
    # steps never diverged, steps beyond the bound (by more than the budget can show) did
    for p in bp["points"]:
        assert p["runs"] >= 3
        if p["value"] < bound:
            assert p["success_rate"] == 1.0, p
        elif p["value"] > bound + 0.0033:
            assert p["success_rate"] == 0.0, p
    frames = coordinator.load_study(out)
    assert set(frames.runs["engine"]) == {"batch"}
    assert len(frames.breakpoint) == len(bp["points"])
    assert (out / "figures" / "success-rate.png").exists()
