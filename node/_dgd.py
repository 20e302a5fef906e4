"""Decentralized gradient descent (Nedić & Ozdaglar, IEEE TAC 54(1), 2009), in array form.

x_i(k+1) = sum_j w_ij x_j(k) - alpha_k grad f_i(x_i(k)), with the mixing row of the plan
(Metropolis–Hastings weights by default). A neighbour never heard from gives its weight to
the agent itself; after that the latest value received is reused (``missing = "reuse"``),
or, with ``missing = "self"``, a neighbour not heard from since the last step gives its
weight to the agent itself for that step.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from node._algorithm import BlockAlgorithm, Heard, Payload, register_algorithm
from topologies._errors import ScenarioError

__all__ = ["DGD", "DGDState"]


@dataclass(frozen=True, slots=True)
class DGDState:
    #: (B, d) estimates (one agent's (d,) in a per-agent view)
    x: np.ndarray
    priorities: None = None
    block: Any = field(default=None, repr=False, compare=False)


@register_algorithm
class DGD(BlockAlgorithm):
    name = "dgd"
    state_type = DGDState
    option_defaults = MappingProxyType({"missing": "reuse"})
    missing_policies = ("reuse", "self")

    def configure(self) -> None:
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {self.spec.id}: dgd 'missing' = {missing!r}; expected 'reuse' or 'self'"
            )
        self._reuse = missing == "reuse"
        b = self.block
        self._data = b.coefficients(b.self_weight, b.link_weight)

    def payload_sizes(self) -> Mapping[str, int]:
        return {"x": self.block.dimension}

    def start(self) -> tuple[DGDState, Payload]:
        x = self.initial_states()
        return DGDState(x=x), {"x": x}

    def advance(self, state: DGDState, heard: Heard, k: int) -> tuple[DGDState, Payload]:
        b = self.block
        x = state.x
        use = heard.ever if self._reuse else heard.fresh
        # a neighbour not used this step contributes w_ij x_i (its weight goes to the agent)
        held = heard.values["x"]
        if not use.all():
            held = np.where(use[:, None], held, x[b.link_dst])
        x = b.mix(self._data, x, held) - self.step_rule(k) * self.gradients(x)
        return DGDState(x=x), {"x": x}
