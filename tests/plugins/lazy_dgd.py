"""A user-defined algorithm, the way DEVELOPERS.md describes: one module, one class.

Lazy decentralized gradient descent: x <- (1 - lam) x + lam (W x) - alpha grad f(x). With
lam = 1 it is DGD; a smaller lam mixes less per step. Selected in a scenario with
``[algorithm] name = "lazy-dgd"`` and ``module = "tests.plugins.lazy_dgd"``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from node import AgentSpec, Algorithm, Payload, Received, register_algorithm


@dataclass(frozen=True, slots=True)
class LazyState:
    x: np.ndarray
    priorities: None = None


@register_algorithm
class LazyDGD(Algorithm):
    name = "lazy-dgd"

    def __init__(self, spec: AgentSpec) -> None:
        super().__init__(spec)
        self.lam = float(spec.params.get("lam", 0.5))

    def payload_sizes(self) -> Mapping[str, int]:
        return {"x": self.spec.dimension}

    def init(self) -> tuple[LazyState, Payload]:
        x = np.array(self.spec.initial_state, dtype=float)
        return LazyState(x=x), {"x": x}

    def step(
        self, state: LazyState, inbox: Mapping[int, Received], k: int
    ) -> tuple[LazyState, Payload]:
        spec = self.spec
        mixed = spec.weights[spec.id] * state.x
        for j in spec.in_neighbours:
            r = inbox.get(j)
            mixed = mixed + spec.weights[j] * (state.x if r is None else r.payload["x"])
        x = (1 - self.lam) * state.x + self.lam * mixed - spec.step(k) * self.gradient(state.x)
        return LazyState(x=x), {"x": x}
