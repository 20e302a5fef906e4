"""Local objectives f_i: value and gradient, plus a plain-dict spec for agents.json.

An objective is built from its spec (``{"kind": ..., ...}``) with :func:`objective_from_spec`;
new kinds register with :func:`register_objective`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from node._errors import ObjectiveError

__all__ = [
    "Objective",
    "Quadratic",
    "objective_from_spec",
    "register_objective",
]

_KINDS: dict[str, Callable[[Mapping[str, Any]], Objective]] = {}


class Objective:
    """A smooth (or subdifferentiable) local objective on R^d."""

    kind: ClassVar[str] = ""
    dimension: int

    def value(self, x: np.ndarray) -> float:
        raise NotImplementedError

    def grad(self, x: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def value_and_grad(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        return self.value(x), self.grad(x)

    def spec(self) -> dict[str, Any]:
        """Plain data (lists, floats) from which :func:`objective_from_spec` rebuilds this."""
        raise NotImplementedError


def register_objective(kind: str) -> Callable[[type], type]:
    def deco(cls: type) -> type:
        cls.kind = kind
        _KINDS[kind] = cls.from_spec
        return cls

    return deco


def objective_from_spec(spec: Mapping[str, Any]) -> Objective:
    kind = spec.get("kind")
    if kind not in _KINDS:
        raise ObjectiveError(
            f"objective kind {kind!r} is not known; expected one of {sorted(_KINDS)}"
        )
    return _KINDS[kind](spec)


@register_objective("quadratic")
@dataclass(frozen=True, slots=True, eq=False)
class Quadratic(Objective):
    """f(x) = 1/2 (x - t)^T Q (x - t) with Q symmetric positive definite."""

    target: np.ndarray
    curvature: np.ndarray

    @property
    def dimension(self) -> int:  # type: ignore[override]
        return int(self.target.shape[0])

    def value(self, x: np.ndarray) -> float:
        e = x - self.target
        return 0.5 * float(e @ self.curvature @ e)

    def grad(self, x: np.ndarray) -> np.ndarray:
        return self.curvature @ (x - self.target)

    def spec(self) -> dict[str, Any]:
        return {
            "kind": "quadratic",
            "target": self.target.tolist(),
            "curvature": self.curvature.tolist(),
        }

    @classmethod
    def from_spec(cls, spec: Mapping[str, Any]) -> Quadratic:
        t = np.asarray(spec["target"], dtype=float)
        q = np.asarray(spec["curvature"], dtype=float)
        if t.ndim != 1 or q.shape != (t.shape[0], t.shape[0]):
            raise ObjectiveError(
                f"quadratic objective: target has shape {t.shape} and curvature {q.shape};"
                " expected a vector of length d and a d x d matrix"
            )
        return cls(target=t, curvature=q)
