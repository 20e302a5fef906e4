"""Decentralized gradient descent (Nedić & Ozdaglar, IEEE TAC 54(1), 2009).

x_i(k+1) = sum_j w_ij x_j(k) - alpha_k grad f_i(x_i(k)), with the mixing row of the plan
(Metropolis–Hastings weights by default). A neighbour never heard from gives its weight to
the agent itself; after that the latest value received is reused (``missing = "reuse"``),
or, with ``missing = "self"``, a neighbour not heard from since the last step gives its
weight to the agent itself for that step.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from node._algorithm import Algorithm, Payload, Received, register_algorithm

__all__ = ["DGD", "DGDState"]


@dataclass(frozen=True, slots=True)
class DGDState:
    x: np.ndarray
    priorities: None = None


@register_algorithm
class DGD(Algorithm):
    name = "dgd"

    def payload_sizes(self) -> Mapping[str, int]:
        return {"x": self.spec.dimension}

    def init(self) -> tuple[DGDState, Payload]:
        x = np.array(self.spec.initial_state, dtype=float)
        return DGDState(x=x), {"x": x}

    def step(self, state: DGDState, inbox: Mapping[int, Received], k: int) -> tuple[DGDState, Payload]:
        spec = self.spec
        reuse = spec.params.get("missing", "reuse") == "reuse"
        w_self = spec.weights[spec.id]
        mixed = w_self * state.x
        for j in spec.in_neighbours:
            w = spec.weights[j]
            r = inbox.get(j)
            if r is None or not (r.fresh or reuse):
                mixed = mixed + w * state.x
            else:
                mixed = mixed + w * r.payload["x"]
        x = mixed - spec.step(k) * self.gradient(state.x)
        return DGDState(x=x), {"x": x}
