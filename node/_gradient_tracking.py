"""Gradient tracking (DIGing): Nedić, Olshevsky, Shi, SIAM J. Optim. 27 (2017).

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
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from node._algorithm import AgentSpec, Algorithm, Payload, Received, register_algorithm
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


@register_algorithm
class GradientTracking(Algorithm):
    name = "gradient-tracking"
    option_defaults = MappingProxyType({"missing": "self"})
    missing_policies = ("self", "reuse")

    def __init__(self, spec: AgentSpec) -> None:
        super().__init__(spec)
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {spec.id}: gradient-tracking 'missing' = {missing!r};"
                " expected 'self' or 'reuse'"
            )
        self._reuse = missing == "reuse"

    def payload_sizes(self) -> Mapping[str, int]:
        d = self.spec.dimension
        return {"x": d, "y": d}

    def init(self) -> tuple[TrackingState, Payload]:
        x = np.array(self.spec.initial_state, dtype=float)
        g = self.gradient(x)
        return TrackingState(x=x, y=g, g=g), {"x": x, "y": g}

    def step(
        self, state: TrackingState, inbox: Mapping[int, Received], k: int
    ) -> tuple[TrackingState, Payload]:
        spec = self.spec
        w_self = spec.weights[spec.id]
        mx = w_self * state.x
        my = w_self * state.y
        for j in spec.in_neighbours:
            w = spec.weights[j]
            r = inbox.get(j)
            if r is None or not (r.fresh or self._reuse):
                mx = mx + w * state.x
                my = my + w * state.y
            else:
                mx = mx + w * r.payload["x"]
                my = my + w * r.payload["y"]
        x = mx - spec.step(k) * state.y
        g = self.gradient(x)
        y = my + g - state.g
        return TrackingState(x=x, y=y, g=g), {"x": x, "y": y}
