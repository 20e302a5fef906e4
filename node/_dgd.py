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
from types import MappingProxyType

import numpy as np

from node._algorithm import AgentSpec, Algorithm, Payload, Received, register_algorithm
from topologies._errors import ScenarioError

__all__ = ["DGD", "DGDState"]


@dataclass(frozen=True, slots=True)
class DGDState:
    x: np.ndarray
    priorities: None = None


@register_algorithm
class DGD(Algorithm):
    name = "dgd"
    option_defaults = MappingProxyType({"missing": "reuse"})
    missing_policies = ("reuse", "self")

    def __init__(self, spec: AgentSpec) -> None:
        super().__init__(spec)
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {spec.id}: dgd 'missing' = {missing!r}; expected 'reuse' or 'self'"
            )
        self._reuse = missing == "reuse"
        self._w_self = spec.weights[spec.id]
        self._rows = tuple((j, spec.weights[j]) for j in spec.in_neighbours)

    def payload_sizes(self) -> Mapping[str, int]:
        return {"x": self.spec.dimension}

    def init(self) -> tuple[DGDState, Payload]:
        x = np.array(self.spec.initial_state, dtype=float)
        return DGDState(x=x), {"x": x}

    def step(
        self, state: DGDState, inbox: Mapping[int, Received], k: int
    ) -> tuple[DGDState, Payload]:
        spec = self.spec
        reuse = self._reuse
        x = state.x
        mixed = self._w_self * x
        for j, w in self._rows:
            r = inbox.get(j)
            if r is None or not (reuse or r.fresh):
                mixed = mixed + w * x
            else:
                mixed = mixed + w * r.payload["x"]
        x = mixed - spec.step(k) * self.gradient(x)
        return DGDState(x=x), {"x": x}
