"""Statistics of studies: score intervals, logistic crossing, simplex lattices, fronts.

Pure functions of numbers; no files, no runs.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence

import numpy as np
from scipy import optimize, stats

__all__ = [
    "das_dennis",
    "das_dennis_count",
    "dominated",
    "hypervolume",
    "logistic_crossing",
    "wilson",
]


def wilson(successes: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson, JASA 22 (1927)).

    Returns (low, high); (0, 1) when n is 0.
    """
    if n <= 0:
        return 0.0, 1.0
    z = float(stats.norm.ppf(0.5 + confidence / 2))
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    # at k = 0 (k = n) the bound is exactly 0 (1); rounding would leave 1e-17 or so
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == n else min(1.0, centre + half)
    return low, high


def logistic_crossing(
    x: Sequence[float],
    successes: Sequence[int],
    counts: Sequence[int],
    level: float = 0.5,
    confidence: float = 0.95,
) -> dict[str, object]:
    """Where a logistic curve fitted to binomial outcomes crosses ``level``.

    Maximum likelihood fit of p(x) = 1 / (1 + exp(-(a + b (x - m)))) (m the mean of x, for
    conditioning) with scipy.optimize; the crossing is x* = m + (logit(level) - a) / b and its
    interval comes from the profile likelihood (the x* where the deviance rises by the
    chi-square quantile with one degree of freedom; Venzon and Moolgavkar, Appl. Stat. 37
    (1988)). When the outcomes separate perfectly (every point below some x succeeds and
    every one above fails, or the reverse) the likelihood has no finite maximum: then the
    result says so (``method = "bracket"``) and the crossing is bracketed by the two
    neighbouring points instead.

    Returns ``{"method", "estimate", "low", "high", "slope"}`` (values may be None).
    """
    xs = np.asarray(x, dtype=float)
    k = np.asarray(successes, dtype=float)
    n = np.asarray(counts, dtype=float)
    order = np.argsort(xs)
    xs, k, n = xs[order], k[order], n[order]
    rate = k / n
    bracket = _bracket(xs, rate, level)
    m = float(xs.mean())
    scale = float(xs.max() - xs.min()) or 1.0
    u = (xs - m) / scale
    target = math.log(level / (1 - level))

    def nll(theta: np.ndarray) -> float:
        z = theta[0] + theta[1] * u
        # -log L = sum n log(1 + e^z) - k z, written stably
        return float(np.sum(n * np.logaddexp(0.0, z) - k * z))

    separated = _separated(u, k, n)
    if separated or len(xs) < 2:
        lo, hi = bracket
        est = None if lo is None else (lo + hi) / 2
        return {"method": "bracket", "estimate": est, "low": lo, "high": hi, "slope": None}
    fit = optimize.minimize(nll, np.zeros(2), method="BFGS")
    a, b = fit.x
    if not np.isfinite(fit.fun) or abs(b) < 1e-12:
        lo, hi = bracket
        est = None if lo is None else (lo + hi) / 2
        return {"method": "bracket", "estimate": est, "low": lo, "high": hi, "slope": None}
    est_u = (target - a) / b
    best = fit.fun
    crit = float(stats.chi2.ppf(confidence, 1)) / 2

    def profile(cu: float) -> float:
        # the crossing fixed at cu: a = target - b cu, minimize over b alone
        res = optimize.minimize_scalar(
            lambda bb: nll(np.array([target - bb * cu, bb])), bracket=(b * 0.5, b), tol=1e-10
        )
        return float(res.fun) - best - crit

    lo_u = _root_out(profile, est_u, -1.0)
    hi_u = _root_out(profile, est_u, +1.0)
    to_x = lambda v: None if v is None else m + v * scale  # noqa: E731
    return {
        "method": "logistic",
        "estimate": to_x(est_u),
        "low": to_x(lo_u),
        "high": to_x(hi_u),
        "slope": float(b / scale),
    }


def _root_out(f, start: float, direction: float, span: float = 8.0) -> float | None:
    """The first root of f going from ``start`` in ``direction`` (None if none within span)."""
    step = 0.01
    prev = start
    while step <= span:
        cur = start + direction * step
        if f(cur) >= 0:
            return float(optimize.brentq(f, min(prev, cur), max(prev, cur), xtol=1e-10))
        prev = cur
        step *= 1.5
    return None


def _separated(u: np.ndarray, k: np.ndarray, n: np.ndarray) -> bool:
    """Perfect (or quasi) separation: some threshold splits all-success from all-failure."""
    allk = k == n
    none = k == 0
    if not np.all(allk | none):
        return False
    # sorted by u: successes form one run at one end
    pattern = allk.astype(int)
    return bool(np.all(np.diff(pattern) <= 0) or np.all(np.diff(pattern) >= 0))


def _bracket(xs: np.ndarray, rate: np.ndarray, level: float) -> tuple[float | None, float | None]:
    """The two neighbouring points (in x order) between which the rate crosses ``level``."""
    above = rate > level
    for i in range(len(xs) - 1):
        if above[i] != above[i + 1]:
            return float(xs[i]), float(xs[i + 1])
    return None, None


# --------------------------------------------------------------------------- lattices


def das_dennis_count(divisions: int, groups: int) -> int:
    """C(H + M - 1, M - 1): points of the simplex lattice (Das and Dennis, SIAM J. Optim.
    8(3) (1998))."""
    return math.comb(divisions + groups - 1, groups - 1)


def das_dennis(divisions: int, groups: int) -> list[tuple[float, ...]]:
    """Every weight vector with entries in {0, 1/H, ..., 1} summing to one, in
    lexicographic order of the integer parts (Das and Dennis 1998)."""
    h = divisions
    out = []
    for cut in itertools.combinations(range(h + groups - 1), groups - 1):
        parts, prev = [], -1
        for c in (*cut, h + groups - 1):
            parts.append(c - prev - 1)
            prev = c
        out.append(tuple(p / h for p in parts))
    return sorted(out, reverse=True)


# --------------------------------------------------------------------------- fronts


def dominated(point: Sequence[float], others: Sequence[Sequence[float]], eps: float = 0.0) -> bool:
    """Whether some point of ``others`` is at least as good in every group and better in one
    (minimization), beyond ``eps`` relative."""
    p = np.asarray(point, dtype=float)
    for q in others:
        q = np.asarray(q, dtype=float)
        tol = eps * np.maximum(np.abs(p), 1.0)
        if np.all(q <= p + tol) and np.any(q < p - tol):
            return True
    return False


def hypervolume(points: Sequence[Sequence[float]], reference: Sequence[float]) -> float:
    """Volume of the region dominated by ``points`` and bounded by ``reference``
    (minimization), exactly, by cutting space into the cells of the points' coordinates.

    Cost O(N^(M+1)) for N points in M groups: meant for the few dozen points of a study.
    Points not strictly better than the reference in every group add nothing.
    """
    r = np.asarray(reference, dtype=float)
    pts = np.asarray([p for p in points if np.all(np.asarray(p, dtype=float) < r)], dtype=float)
    if len(pts) == 0:
        return 0.0
    m = pts.shape[1]
    axes = [np.unique(np.concatenate([pts[:, j], [r[j]]])) for j in range(m)]
    widths = [np.diff(a) for a in axes]
    total = 0.0
    for idx in itertools.product(*(range(len(w)) for w in widths)):
        corner = np.array([axes[j][i] for j, i in enumerate(idx)])
        if np.any(np.all(pts <= corner, axis=1)):
            total += float(np.prod([widths[j][i] for j, i in enumerate(idx)]))
    return total
