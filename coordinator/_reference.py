"""The centralized reference: minimize F(x) = sum_j w_j f_j(x) with the intended priorities.

Quadratics have a closed form, x* = (sum w_j Q_j)^-1 sum w_j Q_j t_j; other objectives are
solved with scipy.optimize and the solver's tolerance is reported with the result.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from node._objectives import Objective, Quadratic

__all__ = ["Reference", "reference_optimum", "total_objective"]


@dataclass(frozen=True, slots=True)
class Reference:
    x_star: np.ndarray
    F_star: float
    #: "closed-form" or the scipy method used
    method: str
    #: solver tolerance (0.0 for a closed form)
    tolerance: float


def total_objective(objectives: Sequence[Objective], weights: np.ndarray, x: np.ndarray) -> float:
    """F(x) = sum_j weights[j] * f_j(x)."""
    return float(sum(w * f.value(x) for w, f in zip(weights, objectives, strict=True)))


def reference_optimum(objectives: Sequence[Objective], weights: np.ndarray) -> Reference:
    weights = np.asarray(weights, dtype=float)
    if all(isinstance(f, Quadratic) for f in objectives):
        H = sum(w * f.curvature for w, f in zip(weights, objectives, strict=True))
        g = sum(w * (f.curvature @ f.target) for w, f in zip(weights, objectives, strict=True))
        x = np.linalg.solve(H, g)
        return Reference(x, total_objective(objectives, weights, x), "closed-form", 0.0)
    raise NotImplementedError("non-quadratic references are not built yet")
