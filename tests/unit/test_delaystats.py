"""The delay summary of a link (node._delaystats) against numpy on a million delays."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from node._delaystats import EXACT_MAX, RELATIVE_ERROR, DelayStats

QUANTILES = (0.001, 0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99, 0.999)
N = 10**6


def feed(values: np.ndarray) -> DelayStats:
    s = DelayStats()
    # as the receiver does: single messages and batches of a drained socket
    for chunk in np.array_split(values, 997):
        if len(chunk) % 2:
            for v in chunk.tolist():
                s.append(v)
        else:
            s.extend(chunk.tolist())
    return s


@pytest.mark.parametrize(
    "dist",
    [
        stats.lognorm(s=1.0, scale=0.005),  # delays around 5 ms, a heavy right tail
        stats.expon(scale=0.002),  # 2 ms mean, many near zero
        stats.lognorm(s=2.0, scale=1e-3),  # 2 us to 0.5 s between the 0.1 % quantiles
    ],
    ids=["lognormal", "exponential", "wide-lognormal"],
)
def test_quantiles_are_within_the_stated_relative_error_of_numpy(dist: object) -> None:
    values = dist.rvs(size=N, random_state=np.random.default_rng(5))  # type: ignore[attr-defined]
    s = feed(values)
    assert len(s) == N and not s.exact
    for q in QUANTILES:
        # numpy interpolates between the sample values of rank floor and ceil of q (n - 1);
        # the summary is within RELATIVE_ERROR of the lower one, so inside this bracket
        lower = np.quantile(values, q, method="lower")
        higher = np.quantile(values, q, method="higher")
        got = s.quantile(q)
        assert lower * (1 - RELATIVE_ERROR) <= got <= higher * (1 + RELATIVE_ERROR), (q, got)
        assert abs(got - np.quantile(values, q)) <= RELATIVE_ERROR * np.quantile(values, q) + (
            higher - lower
        )
    assert s.max == values.max()  # kept exactly
    ms = s.summary_ms()
    assert ms[2] == 1000.0 * values.max()
    assert ms[0] == pytest.approx(1000.0 * np.median(values), rel=RELATIVE_ERROR * 1.01)


def test_memory_is_constant_in_the_number_of_delays() -> None:
    rng = np.random.default_rng(6)
    s = DelayStats()
    sizes = []
    for _ in range(100):
        s.extend(rng.exponential(0.002, size=10**4).tolist())
        sizes.append(s.nbytes())
    # after the first fold the summary holds the same arrays and at most EXACT_MAX + 1
    # values waiting to be folded, whether it saw 10^5 delays or 10^6
    bound = sizes[10]
    assert all(size <= bound + 8 * (EXACT_MAX + 1) for size in sizes[10:])
    assert len(s) == 10**6
    assert s.values is None


def test_few_delays_are_summarised_exactly_as_numpy_does() -> None:
    rng = np.random.default_rng(7)
    values = rng.gamma(2.0, 0.003, size=EXACT_MAX).tolist()
    s = DelayStats()
    s.extend(values)
    assert s.exact and list(s) == values
    d = np.asarray(values) * 1000.0
    assert s.summary_ms() == [float(np.median(d)), float(np.percentile(d, 95)), float(d.max())]


def test_a_constant_delay_stays_exact_past_the_exact_phase() -> None:
    s = DelayStats()
    s.extend([0.003] * (3 * EXACT_MAX))
    assert not s.exact
    assert s.quantile(0.5) == 0.003 and s.quantile(0.95) == 0.003 and s.max == 0.003


def test_delays_outside_the_bins_keep_their_extremes_and_order() -> None:
    # zero or negative (two hosts' clocks), and very long: the end bins report their own
    values = [-0.001] * 3000 + [0.0] * 1000 + [0.004] * 3000 + [2e5] * 1000
    s = DelayStats()
    s.extend(values)
    assert s.quantile(0.0) == s.quantile(0.25) == -0.001
    assert s.quantile(0.75) == 0.004
    assert s.quantile(1.0) == 2e5 and s.max == 2e5


def test_keeping_every_value_when_asked() -> None:
    s = DelayStats(keep=True)
    values = np.random.default_rng(8).exponential(0.001, size=3 * EXACT_MAX).tolist()
    s.extend(values[:10])
    for v in values[10:]:
        s.append(v)
    assert s.values == values and not s.exact
