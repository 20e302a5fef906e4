"""A priority front on quadratic objectives against the closed form and pymoo.

For f_i(x) = 1/2 (x - b_i)^T A_i (x - b_i) and weights p_i >= 0, the minimizer of
sum_i p_i f_i solves sum_i p_i A_i (x - b_i) = 0, i.e. x* = (sum p_i A_i)^-1 sum p_i A_i b_i
(the normal equations of a weighted least-squares problem) [derived]. The lattice of
weightings is Das and Dennis (SIAM J. Optim. 8(3), 1998): C(H + M - 1, M - 1) points.
The hypervolumes are checked against pymoo's indicator (pymoo.indicators.hv.HV).
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest

import coordinator
from coordinator._study import StudyOptions, run_study

# many runs on a shared 2-core machine: a hang guard well above the project's 180 s default
pytestmark = [pytest.mark.integration, pytest.mark.timeout(1200)]

TARGETS = [[4.0, -1.0], [-2.0, 3.0], [1.0, 5.0]]
CURVATURES = [[[1.0, 0.0], [0.0, 1.0]], [[2.0, 0.5], [0.5, 1.0]], [[0.5, 0.0], [0.0, 1.5]]]
DIVISIONS = 3


def _agent_tables() -> str:
    out = []
    for i, (b, a) in enumerate(zip(TARGETS, CURVATURES, strict=True)):
        out.append(f"[[scenario.agent]]\nid = {i}\ntarget = {b}\ncurvature = {a}")
    return "\n".join(out)


STUDY = f"""
[study]
name = "orchard-front"
kind = "front"
seeds = [5]
engine = "batch"

[scenario.swarm]
name = "orchard-front"
agents = 3
dimension = 2
iterations = 4000
[scenario.topology]
shape = "ring"
[scenario.objective]
kind = "quadratic"
[scenario.algorithm]
name = "gradient-tracking"
step = 0.04
[[scenario.fault]]
kind = "loss"
name = "hedge"
links = "all"
rate = 0.3
{_agent_tables()}

[front]
divisions = {DIVISIONS}
without_faults = true
"""


def _closed_form(w: tuple[float, ...]) -> tuple[np.ndarray, list[float]]:
    a = [np.asarray(c) for c in CURVATURES]
    b = [np.asarray(t) for t in TARGETS]
    h = sum(wi * ai for wi, ai in zip(w, a, strict=True))
    x = np.linalg.solve(h, sum(wi * ai @ bi for wi, ai, bi in zip(w, a, b, strict=True)))
    f = [0.5 * float((x - bi) @ ai @ (x - bi)) for ai, bi in zip(a, b, strict=True)]
    return x, f


def _dominated_brute(p: np.ndarray, front: np.ndarray) -> bool:
    return bool(np.any(np.all(front <= p, axis=1) & np.any(front < p, axis=1)))


def test_front_matches_the_closed_form_and_pymoo(tmp_path: Path) -> None:
    from pymoo.indicators.hv import HV

    (tmp_path / "orchard.toml").write_text(STUDY)
    out = run_study(tmp_path / "orchard.toml", StudyOptions(out=tmp_path / "s", workers=2))
    frames = coordinator.load_study(out)
    front = frames.front
    m = len(TARGETS)
    # Das–Dennis count, twice (with and without the loss fault)
    assert len(front) == 2 * math.comb(DIVISIONS + m - 1, m - 1)
    meta = json.loads((out / "front.json").read_text())
    assert meta["lattice_points"] == math.comb(DIVISIONS + m - 1, m - 1)

    ref_cols = [f"reference_f{g}" for g in range(m)]
    reach_cols = [f"reached_f{g}" for g in range(m)]
    for _, row in front.iterrows():
        w = tuple(row[f"w{g}"] for g in range(m))
        x, f = _closed_form(w)
        np.testing.assert_allclose(json.loads(row["x_star"]), x, rtol=0, atol=1e-6)
        np.testing.assert_allclose(row[ref_cols].to_numpy(float), f, rtol=0, atol=1e-6)
        if not row["faults"]:
            # fault-free gradient tracking converges exactly: the reached point is the optimum
            np.testing.assert_allclose(row[reach_cols].to_numpy(float), f, rtol=0, atol=1e-6)
            assert row["distance"] < 1e-6

    for entry in meta["fronts"]:
        grp = front[front["faults"] == entry["faults"]]
        ref_pts = grp[ref_cols].to_numpy(float)
        reached = grp[reach_cols].to_numpy(float)
        # dominated flags against a brute-force dominance check of our own
        for (_, row), r in zip(grp.iterrows(), reached, strict=True):
            assert bool(row["dominated"]) == _dominated_brute(r, ref_pts)
        rp = np.asarray(entry["reference_point"])
        assert entry["hypervolume_reference"] == pytest.approx(HV(ref_point=rp)(ref_pts), rel=1e-9)
        ok = reached[np.all(reached < rp, axis=1)]
        expected = HV(ref_point=rp)(ok) if len(ok) else 0.0
        assert entry["hypervolume_reached"] == pytest.approx(expected, rel=1e-9, abs=1e-12)
    # one reference point for both fronts of the seed, so their hypervolumes compare
    assert len({tuple(e["reference_point"]) for e in meta["fronts"]}) == 1
    fault_free = next(e for e in meta["fronts"] if not e["faults"])
    assert fault_free["reached_dominated"] == 0
    assert fault_free["hypervolume_ratio"] == pytest.approx(1.0, abs=1e-6)
    # the weightings themselves: every point of the lattice once per faults flag
    lattice = {
        tuple(c / DIVISIONS for c in combo)
        for combo in itertools.product(range(DIVISIONS + 1), repeat=m)
        if sum(combo) == DIVISIONS
    }
    for flag in (True, False):
        got = {
            tuple(r) for r in front[front["faults"] == flag][[f"w{g}" for g in range(m)]].to_numpy()
        }
        assert got == lattice
