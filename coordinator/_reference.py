"""The centralized reference: minimize F(x) = sum_j w_j f_j(x) for any nonnegative weights.

Quadratics have a closed form, x* = (sum w_j Q_j)^-1 sum w_j Q_j t_j; other objectives are
solved with scipy.optimize (L-BFGS-B with a tight gradient tolerance, then a root solve of
grad F = 0 from its point, which F's rounding cannot stall the way it stalls a line search)
and the solver's method and tolerance are reported with the result.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize, root

from node._errors import ObjectiveError
from node._objectives import Objective, Quadratic
from topologies._errors import ScenarioError

__all__ = [
    "Reference",
    "reference_optimum",
    "total_gradient",
    "total_objective",
    "weighted_quadratic_point",
]

#: gradient tolerance (max-norm of the weighted gradient) asked of scipy
GTOL = 1e-10
#: a solve whose final gradient max-norm is above this is reported as failed
_ACCEPT = 1e-7


@dataclass(frozen=True, slots=True)
class Reference:
    x_star: np.ndarray
    F_star: float
    #: "closed-form" or the scipy method used
    method: str
    #: solver tolerance (0.0 for a closed form)
    tolerance: float
    #: max-norm of the weighted gradient at x_star, as the solver left it
    grad_norm: float = 0.0


def _checked_weights(objectives: Sequence[Objective], weights: np.ndarray) -> np.ndarray:
    w = np.asarray(weights, dtype=float)
    if w.shape != (len(objectives),):
        raise ScenarioError(
            f"reference: {w.shape} weights for {len(objectives)} objectives; expected one"
            " weight per agent"
        )
    if not np.all(np.isfinite(w)) or np.any(w < 0.0) or float(w.sum()) <= 0.0:
        raise ScenarioError(
            f"reference: weights {w.tolist()} must be finite, >= 0 and not all zero"
        )
    return w


def total_objective(objectives: Sequence[Objective], weights: np.ndarray, x: np.ndarray) -> float:
    """F(x) = sum_j weights[j] * f_j(x)."""
    return float(sum(w * f.value(x) for w, f in zip(weights, objectives, strict=True)))


def total_gradient(
    objectives: Sequence[Objective], weights: np.ndarray, x: np.ndarray
) -> np.ndarray:
    """grad F(x) = sum_j weights[j] * grad f_j(x) (objectives with weight 0 are skipped)."""
    g = np.zeros_like(np.asarray(x, dtype=float))
    for w, f in zip(weights, objectives, strict=True):
        if w != 0.0:
            g = g + w * np.asarray(f.grad(x), dtype=float)
    return g


def weighted_quadratic_point(objectives: Sequence[Objective], weights: np.ndarray) -> np.ndarray:
    """x(lambda) = (sum lambda_i Q_i)^-1 sum lambda_i Q_i t_i for quadratic objectives.

    The minimizer of the weighted sum of quadratics: the Pareto point that weight vector
    picks (Miettinen, Nonlinear Multiobjective Optimization, 1999).
    """
    w = _checked_weights(objectives, weights)
    for i, f in enumerate(objectives):
        if not isinstance(f, Quadratic):
            raise ScenarioError(
                f"weighted_quadratic_point: agent {i} has a {f.kind!r} objective; expected"
                " quadratics only (use reference_optimum for other kinds)"
            )
    quads = [f for f in objectives if isinstance(f, Quadratic)]
    h = sum(wi * f.curvature for wi, f in zip(w, quads, strict=True))
    g = sum(wi * (f.curvature @ f.target) for wi, f in zip(w, quads, strict=True))
    try:
        return np.linalg.solve(h, g)
    except np.linalg.LinAlgError as exc:
        raise ScenarioError(
            "weighted_quadratic_point: sum of weighted curvatures is singular; expected it"
            " positive definite"
        ) from exc


def _dimension(objectives: Sequence[Objective]) -> int:
    for f in objectives:
        d = getattr(f, "dimension", None)
        if d is not None:
            return int(d)
    raise ScenarioError(
        "reference: no objective states its dimension; pass x0 (or give 'dimension' in the"
        " custom objective's spec)"
    )


def reference_optimum(
    objectives: Sequence[Objective], weights: np.ndarray, *, x0: np.ndarray | None = None
) -> Reference:
    """The minimizer of F(x) = sum_j weights[j] f_j(x), weights >= 0 and not all zero.

    All-quadratic problems use the closed form (``method="closed-form"``, tolerance 0).
    Otherwise scipy's L-BFGS-B runs from ``x0`` (default: zeros) with gradient tolerance
    ``GTOL``; then scipy's ``root`` (hybr) solves grad F = 0 from its point and is kept
    when it lowers the gradient without raising F (``method="L-BFGS-B+hybr"``). The result
    carries the method(s) used, ``GTOL``, and the final gradient max-norm; a solve that
    ends with a gradient max-norm above 1e-7 raises ObjectiveError.
    """
    w = _checked_weights(objectives, weights)
    if all(isinstance(f, Quadratic) for f in objectives):
        x = weighted_quadratic_point(objectives, w)
        return Reference(x, total_objective(objectives, w, x), "closed-form", 0.0, 0.0)

    active = [(wi, f) for wi, f in zip(w, objectives, strict=True) if wi != 0.0]

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        value = 0.0
        grad = np.zeros_like(x)
        for wi, f in active:
            v, g = f.value_and_grad(x)
            value += wi * float(v)
            grad = grad + wi * np.asarray(g, dtype=float)
        return value, grad

    start = np.zeros(_dimension(objectives)) if x0 is None else np.array(x0, dtype=float)
    # ftol 0: stop on the gradient, not on a small decrease of F
    res = minimize(
        fun,
        start,
        jac=True,
        method="L-BFGS-B",
        options={"gtol": GTOL, "ftol": 0.0, "maxiter": 20000, "maxcor": 30},
    )
    method = "L-BFGS-B"
    x = res.x
    gnorm = float(np.max(np.abs(fun(x)[1])))
    if gnorm > 0.0:
        polish = root(lambda z: fun(z)[1], x, method="hybr", options={"xtol": 1e-15})
        f2, grad2 = fun(polish.x)
        g2 = float(np.max(np.abs(grad2)))
        # kept only if it did not climb: a root of grad F can also be a saddle or a maximum
        f1 = fun(x)[0]
        if np.all(np.isfinite(polish.x)) and g2 < gnorm and f2 <= f1 + 1e-12 * max(1.0, abs(f1)):
            x, gnorm, method = polish.x, g2, "L-BFGS-B+hybr"
    if not (np.all(np.isfinite(x)) and gnorm <= _ACCEPT):
        raise ObjectiveError(
            f"reference: {method} stopped at a point with gradient max-norm {gnorm:.3g}"
            f" (expected <= {_ACCEPT}): {res.message}"
        )
    return Reference(x, total_objective(objectives, w, x), method, GTOL, gnorm)
