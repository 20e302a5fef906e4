"""User objectives for the tests: one that works, one that raises, one that returns NaN."""

from __future__ import annotations

import numpy as np


def bowl(x: np.ndarray) -> tuple[float, np.ndarray]:
    """f(x) = 1/2 |x - 1|^2."""
    e = np.asarray(x, dtype=float) - 1.0
    return 0.5 * float(e @ e), e


def explode(x: np.ndarray) -> tuple[float, np.ndarray]:
    raise RuntimeError("sensor model not calibrated")


def not_a_number(x: np.ndarray) -> tuple[float, np.ndarray]:
    return float("nan"), np.zeros_like(x)
