"""Gradient tracking (DIGing): Nedić, Olshevsky, Shi, SIAM J. Optim. 27 (2017), in array form.

    x_i(k+1) = sum_j w_ij x_j(k) - alpha y_i(k)
    y_i(k+1) = sum_j w_ij y_j(k) + grad f_i(x_i(k+1)) - grad f_i(x_i(k)),  y_i(0) = grad f_i(x_i(0))

With a doubly stochastic W, sum_i y_i(k) = sum_i grad f_i(x_i(k)) at every step, so y_i
tracks the average gradient and a small constant step converges exactly under strong
convexity. Missing messages: by default (``missing = "self"``) a neighbour not heard from
since the last step gives its weight to the agent itself for that step, for x and y alike;
with ``missing = "reuse"`` the latest values received from it are mixed again (a neighbour
never heard from still gives its weight to the agent). Either way a lost message breaks the
tracking invariant, which is a useful diagnostic.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from node._algorithm import BlockAlgorithm, Heard, Payload, register_algorithm
from topologies._errors import ScenarioError

__all__ = ["GradientTracking", "TrackingState"]


@dataclass(frozen=True, slots=True, kw_only=True)
class TrackingState:
    x: np.ndarray
    #: tracker of the average gradient (sum over agents = sum of local gradients)
    y: np.ndarray
    #: grad f_i(x), kept so the next step needs one gradient evaluation
    g: np.ndarray
    priorities: None = None
    block: Any = field(default=None, repr=False, compare=False)


@register_algorithm
class GradientTracking(BlockAlgorithm):
    name = "gradient-tracking"
    state_type = TrackingState
    option_defaults = MappingProxyType({"missing": "self"})
    missing_policies = ("self", "reuse")

    def configure(self) -> None:
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {self.spec.id}: gradient-tracking 'missing' = {missing!r};"
                " expected 'self' or 'reuse'"
            )
        self._reuse = missing == "reuse"
        b = self.block
        self._data = b.coefficients(b.self_weight, b.link_weight)

    def payload_sizes(self) -> Mapping[str, int]:
        d = self.block.dimension
        return {"x": d, "y": d}

    def start(self) -> tuple[TrackingState, Payload]:
        x = self.initial_states()
        g = self.gradients(x)
        return TrackingState(x=x, y=g, g=g), {"x": x, "y": g}

    def advance(self, state: TrackingState, heard: Heard, k: int) -> tuple[TrackingState, Payload]:
        b = self.block
        d = b.dimension
        use = (heard.ever if self._reuse else heard.fresh)[:, None]
        own = np.concatenate((state.x, state.y), axis=1)
        held = np.concatenate((heard.values["x"], heard.values["y"]), axis=1)
        if not use.all():
            held = np.where(use, held, own[b.link_dst])
        mixed = b.mix(self._data, own, held)
        x = mixed[:, :d] - self.step_rule(k) * state.y
        g = self.gradients(x)
        y = mixed[:, d:] + g - state.g
        return TrackingState(x=x, y=y, g=g), {"x": x, "y": y}
