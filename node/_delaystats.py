"""Message delays of one link, summarised in fixed memory however long the run.

The first :data:`EXACT_MAX` delays are kept as they are and summarised exactly (numpy's
median and 95th percentile, as every short run always was). Past that they go into a fixed
histogram of log-spaced bins (ratio :data:`RATIO` between bin edges, from :data:`LOW` to
:data:`HIGH` seconds, plus one bin below and one above), each bin with its count and the
smallest and largest value it holds. A quantile is the geometric middle of the bin holding
that rank, clamped to the bin's smallest and largest value: within :data:`RELATIVE_ERROR`
(sqrt(RATIO) - 1, 0.5 %) of a sample value of that rank (numpy's "lower" and "higher"
quantiles bracket it), and exact when a bin holds one value only (a constant delay). The
largest delay is kept exactly. Delays outside [LOW, HIGH] (zero, negative across two hosts'
clocks, or days) fall into the two end bins, which report their own extremes.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np

__all__ = ["EXACT_MAX", "RELATIVE_ERROR", "DelayStats"]

#: delays kept one by one before the histogram takes over
EXACT_MAX = 4096
#: bin edges (seconds): LOW * RATIO**k up to HIGH
LOW = 1e-7
HIGH = 1e5
RATIO = 1.01
RELATIVE_ERROR = math.sqrt(RATIO) - 1.0
_LOG_LOW = math.log(LOW)
_LOG_RATIO = math.log(RATIO)
#: regular bins, plus bin 0 (below LOW) and the last bin (at or above HIGH)
_BINS = math.ceil((math.log(HIGH) - _LOG_LOW) / _LOG_RATIO)
_EDGES = LOW * RATIO ** np.arange(_BINS + 1, dtype=float)


class DelayStats:
    """Delays (seconds) of one link and sender epoch: ``append``/``extend`` like a list,
    ``len``, ``quantile(q)`` and ``max``. ``keep=True`` also keeps every value (the
    scenario's ``[telemetry].delay_samples``: asked for, so paid for) in ``values``."""

    __slots__ = ("_buf", "_counts", "_hi", "_lo", "_max", "_n", "values")

    def __init__(self, keep: bool = False) -> None:
        self._buf: list[float] = []
        self._n = 0  # values folded into the histogram
        self._max = -math.inf
        self._counts: np.ndarray | None = None
        self._lo: np.ndarray | None = None
        self._hi: np.ndarray | None = None
        self.values: list[float] | None = [] if keep else None

    def append(self, d: float) -> None:
        buf = self._buf
        buf.append(d)
        if self.values is not None:
            self.values.append(d)
        if len(buf) > EXACT_MAX:
            self._fold()

    def extend(self, ds: list[float]) -> None:
        self._buf.extend(ds)
        if self.values is not None:
            self.values.extend(ds)
        if len(self._buf) > EXACT_MAX:
            self._fold()

    def __iter__(self) -> Iterator[float]:
        """The delays one by one, while they are all held (``exact``)."""
        if self._counts is not None:
            raise ValueError(f"more than {EXACT_MAX} delays: only their summary is held")
        return iter(self._buf)

    def __len__(self) -> int:
        return self._n + len(self._buf)

    def __bool__(self) -> bool:
        return len(self) > 0

    @property
    def exact(self) -> bool:
        """Every value is still held one by one (quantiles are numpy's, exactly)."""
        return self._counts is None

    @property
    def max(self) -> float:
        m = self._max
        return max(m, max(self._buf)) if self._buf else m

    def nbytes(self) -> int:
        """Memory held for the summary (not counting ``values``): bounded by construction."""
        arrays = 0 if self._counts is None else 3 * self._counts.nbytes
        return arrays + 8 * len(self._buf)

    def _fold(self) -> None:
        if self._counts is None:
            self._counts = np.zeros(_BINS + 2, dtype=np.int64)
            self._lo = np.full(_BINS + 2, np.inf)
            self._hi = np.full(_BINS + 2, -np.inf)
        d = np.asarray(self._buf, dtype=float)
        self._buf = []
        d = d[np.isfinite(d)]  # (a delay is a difference of two clock readings: finite)
        idx = np.zeros(len(d), dtype=np.int64)
        regular = (d >= LOW) & (d < HIGH)
        r = d[regular]
        k = np.floor((np.log(r) - _LOG_LOW) / _LOG_RATIO).astype(np.int64)
        k = np.clip(k, 0, _BINS - 1)
        # floating error at an edge: every value lands in the bin whose edges hold it
        k -= (r < _EDGES[k]) & (k > 0)
        k += (r >= _EDGES[k + 1]) & (k < _BINS - 1)
        idx[regular] = k + 1
        idx[d >= HIGH] = _BINS + 1
        np.add.at(self._counts, idx, 1)
        np.minimum.at(self._lo, idx, d)
        np.maximum.at(self._hi, idx, d)
        self._n += len(d)
        if len(d):
            self._max = max(self._max, float(d.max()))

    def quantile(self, q: float) -> float:
        """The q-quantile (0 <= q <= 1) of every delay so far; exact while few."""
        if self._counts is None:
            if not self._buf:
                raise ValueError("no delays recorded")
            return float(np.percentile(np.asarray(self._buf, dtype=float), 100.0 * q))
        if self._buf:
            self._fold()
        assert self._lo is not None and self._hi is not None
        rank = q * (self._n - 1)  # the 0-based rank numpy interpolates at
        cum = np.cumsum(self._counts)
        b = int(np.searchsorted(cum, math.floor(rank) + 1))
        if 0 < b <= _BINS:
            mid = math.sqrt(_EDGES[b - 1] * _EDGES[b])
        else:  # an end bin: its smallest or largest value, whichever half the rank is in
            below = int(cum[b - 1]) if b else 0
            mid = self._lo[b] if 2 * (math.floor(rank) - below) < self._counts[b] else self._hi[b]
        return float(min(max(mid, self._lo[b]), self._hi[b]))

    def summary_ms(self) -> list[Any]:
        """[median, 95th percentile, max] in ms (links.csv), or three None."""
        if not self:
            return [None, None, None]
        if self._counts is None:
            d = np.asarray(self._buf) * 1000.0
            return [float(np.median(d)), float(np.percentile(d, 95)), float(d.max())]
        return [1000.0 * self.quantile(0.5), 1000.0 * self.quantile(0.95), 1000.0 * self.max]
