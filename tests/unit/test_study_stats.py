"""Study statistics against outside references: scipy's Wilson interval, the Das–Dennis
count formula, hypervolumes by rectangle sums and by pymoo's indicator."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from coordinator._study_stats import (
    das_dennis,
    das_dennis_count,
    dominated,
    hypervolume,
    logistic_crossing,
    wilson,
)


@pytest.mark.parametrize(("k", "n"), [(0, 5), (5, 5), (3, 10), (17, 20), (1, 1), (50, 120)])
def test_wilson_matches_scipy(k: int, n: int) -> None:
    # outside check: scipy.stats.binomtest(...).proportion_ci(method="wilson")
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = wilson(k, n)
    assert lo == pytest.approx(ci.low, abs=1e-12)
    assert hi == pytest.approx(ci.high, abs=1e-12)


@pytest.mark.parametrize(("h", "m"), [(1, 2), (4, 2), (4, 3), (6, 3), (3, 4), (12, 3)])
def test_das_dennis_count_and_points(h: int, m: int) -> None:
    pts = das_dennis(h, m)
    # Das and Dennis, SIAM J. Optim. 8(3) (1998): C(H + M - 1, M - 1) points
    assert len(pts) == das_dennis_count(h, m) == math.comb(h + m - 1, m - 1)
    # independently: every vector of multiples of 1/H summing to one, by brute force
    brute = {
        tuple(c / h for c in combo)
        for combo in itertools.product(range(h + 1), repeat=m)
        if sum(combo) == h
    }
    assert set(pts) == brute
    assert all(abs(sum(p) - 1.0) < 1e-12 for p in pts)


def _rectangle_sum(points: np.ndarray, ref: np.ndarray) -> float:
    """2-objective hypervolume by sorting and summing rectangles (minimization)."""
    pts = points[np.all(points < ref, axis=1)]
    pts = pts[np.argsort(pts[:, 0])]
    total, best_y = 0.0, ref[1]
    for x, y in pts:
        if y < best_y:
            total += (ref[0] - x) * (best_y - y)
            best_y = y
    return total


def test_hypervolume_two_groups_is_the_rectangle_sum() -> None:
    rng = np.random.default_rng(4)
    for _ in range(20):
        pts = rng.uniform(0, 1, size=(rng.integers(1, 15), 2))
        ref = np.array([1.1, 1.2])
        assert hypervolume(pts, ref) == pytest.approx(_rectangle_sum(pts, ref), rel=1e-12)
    # a hand-checked case: (1,3), (2,2), (3,1) against (4,4): 3 + 2 + 1 = 6
    assert hypervolume([[1, 3], [2, 2], [3, 1]], [4, 4]) == pytest.approx(6.0)


def test_hypervolume_three_groups_matches_pymoo() -> None:
    from pymoo.indicators import hv as hv_mod

    rng = np.random.default_rng(9)
    for _ in range(10):
        pts = rng.uniform(0, 1, size=(rng.integers(2, 12), 3))
        ref = np.array([1.1, 1.05, 1.2])
        # outside check: pymoo's hypervolume indicator
        expected = hv_mod.HV(ref_point=ref)(pts)
        assert hypervolume(pts, ref) == pytest.approx(expected, rel=1e-9)


def test_dominance() -> None:
    front = [[1.0, 3.0], [2.0, 2.0], [3.0, 1.0]]
    assert dominated([2.5, 2.5], front)
    assert not dominated([1.5, 2.5], front)
    assert not dominated([2.0, 2.0], front)  # equal is not dominated


def test_logistic_crossing_recovers_a_known_curve() -> None:
    # synthetic outcomes from p(x) = 1 / (1 + exp(12 (x - 0.4))): crossing 0.4 [derived]
    rng = np.random.default_rng(1)
    xs = np.linspace(0.1, 0.7, 9)
    n = np.full(len(xs), 200)
    k = rng.binomial(n, 1 / (1 + np.exp(12 * (xs - 0.4))))
    fit = logistic_crossing(xs, k, n, 0.5)
    assert fit["method"] == "logistic"
    assert fit["low"] < 0.4 < fit["high"]
    assert abs(fit["estimate"] - 0.4) < 0.02
    assert fit["slope"] < 0


def test_separated_outcomes_give_the_bracket() -> None:
    fit = logistic_crossing([0.1, 0.3, 0.5, 0.7], [5, 5, 0, 0], [5, 5, 5, 5], 0.5)
    assert fit["method"] == "bracket"
    assert (fit["low"], fit["high"]) == (0.3, 0.5)
    assert fit["estimate"] == pytest.approx(0.4)
