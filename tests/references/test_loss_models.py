"""Fault models against closed forms and scipy.stats.

Loss: Bernoulli counts against the binomial law; Gilbert–Elliott against its stationary law
and burst statistics (Gilbert, Bell System Technical Journal 39 (1960); Elliott, BSTJ 42
(1963)). Delays: Kolmogorov–Smirnov tests against the configured scipy distributions.
All runs are seeded, so every check is deterministic; a p-value floor of 1e-3 and a
99.9% interval are common practice, no source.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from node._links import LinkFault, LinkModel

N = 200_000
CONF = 0.999  # common practice, no source
P_FLOOR = 1e-3  # common practice, no source


def losses(model: LinkModel, n: int = N) -> np.ndarray:
    return np.fromiter((not model.decide(s, s, 0.0).deliver for s in range(n)), bool, n)


def runs(x: np.ndarray, value: bool) -> np.ndarray:
    """Lengths of the maximal runs equal to ``value``, without a run cut by the end."""
    padded = np.concatenate(([False], x == value, [False]))
    edges = np.flatnonzero(np.diff(padded.astype(np.int8)))
    starts, stops = edges[::2], edges[1::2]
    lengths = stops - starts
    return lengths[:-1] if stops.size and stops[-1] == x.size else lengths


def ge_fault(p: float, r: float, good: float = 0.0, bad: float = 1.0) -> LinkFault:
    params = {"p_enter": p, "p_leave": r, "loss_good": good, "loss_bad": bad}
    return LinkFault(index=0, kind="burst-loss", params=params)


def stationary(p: float, r: float) -> np.ndarray:
    """Stationary law of the two-state chain [good, bad], from numpy's eigen-solver."""
    P = np.array([[1 - p, p], [r, 1 - r]])
    w, v = np.linalg.eig(P.T)
    pi = np.real(v[:, np.argmin(abs(w - 1))])
    return pi / pi.sum()


def loss_rate_se(p: float, r: float, good: float, bad: float, n: int) -> float:
    """Standard error of a measured loss rate: sqrt of the asymptotic variance of the mean,
    Var(L) + 2 sum_k Cov(L_0, L_k), the covariances from matrix powers of the chain."""
    P = np.array([[1 - p, p], [r, 1 - r]])
    pi = stationary(p, r)
    ell = np.array([good, bad])
    m = pi @ ell
    var = m * (1 - m)
    Pk = np.eye(2)
    for _ in range(2000):  # |rho|^2000 is far below rounding for these chains
        Pk = Pk @ P
        var += 2 * (pi * ell) @ Pk @ ell - 2 * m * m
    return math.sqrt(var / n)


# ------------------------------------------------------------------ independent loss


def test_independent_loss_rate_in_binomial_interval() -> None:
    q = 0.1
    count = int(
        losses(LinkModel(21, 0, 1, [LinkFault(index=0, kind="loss", params={"rate": q})])).sum()
    )
    lo, hi = stats.binom.interval(CONF, N, q)
    assert lo <= count <= hi, (count, lo, hi)


def test_independent_loss_has_no_memory() -> None:
    q = 0.3
    x = losses(LinkModel(22, 0, 1, [LinkFault(index=0, kind="loss", params={"rate": q})]), 100_000)
    after_loss = x[1:][x[:-1]]
    lo, hi = stats.binom.interval(CONF, after_loss.size, q)
    assert lo <= after_loss.sum() <= hi


@pytest.mark.parametrize("kind", ["duplicate", "corrupt"])
def test_duplicate_and_corrupt_rates_in_binomial_interval(kind: str) -> None:
    q, n = 0.07, 50_000
    m = LinkModel(23, 2, 5, [LinkFault(index=1, kind=kind, params={"rate": q})])
    ds = [m.decide(s, s, 0.0) for s in range(n)]
    hit = sum(d.copies == 2 for d in ds) if kind == "duplicate" else sum(d.corrupt for d in ds)
    lo, hi = stats.binom.interval(CONF, n, q)
    assert lo <= hit <= hi


def test_streams_of_links_and_purposes_are_independent() -> None:
    # chi-squared test of independence (Pearson 1900) on 2x2 tables of simultaneous events
    n = 50_000
    loss = LinkFault(index=0, kind="loss", params={"rate": 0.4})
    dup = LinkFault(index=1, kind="duplicate", params={"rate": 0.4})
    a = losses(LinkModel(24, 0, 1, [loss]), n)
    b = losses(LinkModel(24, 1, 0, [loss]), n)
    m = LinkModel(24, 0, 1, [dup])
    c = np.array([m.decide(s, s, 0.0).copies == 2 for s in range(n)])
    for x, y in ((a, b), (a, c)):
        table = [[np.sum(x & y), np.sum(x & ~y)], [np.sum(~x & y), np.sum(~x & ~y)]]
        assert stats.chi2_contingency(table).pvalue > P_FLOOR


# ------------------------------------------------------------------ Gilbert–Elliott


def test_stationary_law_matches_closed_form() -> None:
    # Gilbert (1960): pi_B = p / (p + r)
    for p, r in ((0.05, 0.25), (0.3, 0.1), (0.9, 0.9)):
        assert stationary(p, r)[1] == pytest.approx(p / (p + r), rel=1e-12)


def test_loss_rate_se_reduces_to_the_methods_formula() -> None:
    # methods.md [derived]: sqrt(pi_B pi_G (1 + rho) / ((1 - rho) N)), rho = 1 - p - r
    p, r = 0.05, 0.25
    pb = p / (p + r)
    rho = 1 - p - r
    closed = math.sqrt(pb * (1 - pb) * (1 + rho) / ((1 - rho) * N))
    assert loss_rate_se(p, r, 0.0, 1.0, N) == pytest.approx(closed, rel=1e-9)
    q = 0.2  # Bernoulli(q) is the chain with p = q, r = 1 - q
    assert loss_rate_se(q, 1 - q, 0.0, 1.0, N) == pytest.approx(math.sqrt(q * (1 - q) / N))


def test_simple_gilbert_loss_rate_bursts_and_gaps() -> None:
    p, r = 0.05, 0.25
    x = losses(LinkModel(31, 3, 4, [ge_fault(p, r)]))
    pb = p / (p + r)
    rho = 1 - p - r
    # loss rate p / (p + r), Gilbert (1960); standard error of methods.md
    se = math.sqrt(pb * (1 - pb) * (1 + rho) / ((1 - rho) * N))
    assert abs(x.mean() - pb) < 5 * se, (x.mean(), pb, se)
    # bursts are geometric with mean 1/r, gaps with mean 1/p, Gilbert (1960)
    bursts, gaps = runs(x, True), runs(x, False)
    se_burst = math.sqrt(1 - r) / r / math.sqrt(bursts.size)
    se_gap = math.sqrt(1 - p) / p / math.sqrt(gaps.size)
    assert abs(bursts.mean() - 1 / r) < 5 * se_burst, (bursts.mean(), 1 / r, se_burst)
    assert abs(gaps.mean() - 1 / p) < 5 * se_gap, (gaps.mean(), 1 / p, se_gap)
    # P(loss | previous loss) = 1 - r, Gilbert (1960); Bernoulli given the bad state
    after_loss = x[1:][x[:-1]]
    lo, hi = stats.binom.interval(CONF, after_loss.size, 1 - r)
    assert lo <= after_loss.sum() <= hi
    # and the burst lengths follow the geometric law itself, not only its mean
    assert stats.chisquare(*_geometric_table(bursts, r)).pvalue > P_FLOOR


def _geometric_table(lengths: np.ndarray, r: float, top: int = 12) -> tuple[np.ndarray, np.ndarray]:
    """Observed and expected counts of lengths 1..top-1 and >= top under geometric(r)."""
    k = np.arange(1, top)
    observed = np.append([np.sum(lengths == i) for i in k], np.sum(lengths >= top))
    probs = np.append(stats.geom.pmf(k, r), stats.geom.sf(top - 1, r))
    return observed, probs * lengths.size


def test_general_gilbert_elliott_loss_rate() -> None:
    # Elliott (1963): loss rate pi_G (1 - k) + pi_B (1 - h); here 1 - k = 0.05, 1 - h = 0.6
    p, r, good, bad = 0.1, 0.3, 0.05, 0.6
    x = losses(LinkModel(32, 0, 7, [ge_fault(p, r, good, bad)]))
    pi_g, pi_b = stationary(p, r)
    expected = pi_g * good + pi_b * bad
    se = loss_rate_se(p, r, good, bad, N)
    assert abs(x.mean() - expected) < 5 * se, (x.mean(), expected, se)


def test_ge_with_bernoulli_parameters_is_memoryless() -> None:
    # p = q, r = 1 - q: the state is fresh at every message (methods.md)
    q = 0.2
    x = losses(LinkModel(33, 1, 2, [ge_fault(q, 1 - q)]), 100_000)
    lo, hi = stats.binom.interval(CONF, x.size, q)
    assert lo <= x.sum() <= hi
    after_loss = x[1:][x[:-1]]
    lo, hi = stats.binom.interval(CONF, after_loss.size, q)
    assert lo <= after_loss.sum() <= hi


# ------------------------------------------------------------------ delays

M = 4000


def delays_ms(params: dict, seed: int = 41) -> np.ndarray:
    m = LinkModel(seed, 0, 1, [LinkFault(index=2, kind="delay", params=params)])
    return np.array([m.decide(s, s, 0.0).delay_s * 1000.0 for s in range(M)])


# scipy parametrizations, from scipy.stats' documentation: lognorm(s = sigma, scale = median);
# pareto(b = shape, scale = minimum) is the classic Pareto law; truncnorm bounds in sd units.
DELAY_CASES = [
    ({"distribution": "uniform", "low_ms": 2.0, "high_ms": 7.0}, stats.uniform(loc=2, scale=5)),
    (
        {"distribution": "normal", "mean_ms": 5.0, "sd_ms": 2.0},
        stats.truncnorm(a=-2.5, b=np.inf, loc=5, scale=2),
    ),
    (
        {"distribution": "normal", "mean_ms": -1.0, "sd_ms": 3.0},
        stats.truncnorm(a=1 / 3, b=np.inf, loc=-1, scale=3),
    ),
    (
        {"distribution": "normal", "mean_ms": -20.0, "sd_ms": 2.0},
        stats.truncnorm(a=10, b=np.inf, loc=-20, scale=2),
    ),
    ({"distribution": "lognormal", "median_ms": 4.0, "sigma": 0.8}, stats.lognorm(s=0.8, scale=4)),
    ({"distribution": "pareto", "scale_ms": 2.0, "shape": 1.5}, stats.pareto(b=1.5, scale=2)),
    (
        {"distribution": "constant", "ms": 3.0, "jitter_ms": 2.0},
        stats.uniform(loc=3, scale=2),
    ),
]


@pytest.mark.parametrize(("params", "law"), DELAY_CASES, ids=lambda c: str(c)[:40])
def test_delay_follows_the_configured_law(params: dict, law: stats.rv_continuous) -> None:
    # Kolmogorov–Smirnov one-sample test (scipy.stats.kstest)
    x = delays_ms(params)
    assert (x >= 0).all()
    assert stats.kstest(x, law.cdf).pvalue > P_FLOOR


def test_kolmogorov_smirnov_sees_a_wrong_shape() -> None:
    # the check above has power: a nearby Pareto shape is rejected on the same sample
    x = delays_ms({"distribution": "pareto", "scale_ms": 2.0, "shape": 1.5})
    assert stats.kstest(x, stats.pareto(b=1.8, scale=2).cdf).pvalue < P_FLOOR


def test_constant_delay_is_exact() -> None:
    assert set(delays_ms({"distribution": "constant", "ms": 12.5}).tolist()) == {12.5}


def test_jitter_adds_an_independent_uniform() -> None:
    # lognormal + uniform(0, 3) against a scipy sample of the same sum (two-sample KS)
    x = delays_ms({"distribution": "lognormal", "median_ms": 4.0, "sigma": 0.5, "jitter_ms": 3.0})
    rng = np.random.default_rng(5)
    ref = stats.lognorm(s=0.5, scale=4).rvs(20_000, random_state=rng) + stats.uniform(scale=3).rvs(
        20_000, random_state=rng
    )
    assert stats.ks_2samp(x, ref).pvalue > P_FLOOR
    without = delays_ms({"distribution": "lognormal", "median_ms": 4.0, "sigma": 0.5})
    jitter = x - without  # the base draw is the same: only the jitter stream was added
    assert stats.kstest(jitter, stats.uniform(scale=3).cdf).pvalue > P_FLOOR
