"""The priority-weighted method: priority averaging plus a row-stochastic mix of states
(array form).

Every agent i holds a priority vector w_i over all n agents (entries >= 0, summing to 1).
Each step, with H_i the set of in-neighbours it hears from (see ``missing`` below):

* mixing row from its own current priorities: a_ij = w_i^j for j in H_i, and
  a_ii = w_i^i + sum of w_i^m over every other agent m not in H_i (non-neighbours
  included: their priority mass goes to the agent itself);
* x_i <- sum_j a_ij x_j - alpha_k grad f_i(x_i);
* priority averaging, ``params["priority_averaging"]``:
  ``"laplacian"`` (default): w_i <- w_i + c sum_{j in H_i} (w_j - w_i) with gain
  c = ``params["gain"]`` (default 0: keep the initial vectors), 0 <= c < 1 / degree
  (Olfati-Saber, Fax, Murray, Proc. IEEE 95 (2007));
  ``"ratio"``: running-sum ratio consensus on the vectors (see :mod:`node._ratio`),
  which reaches the exact average even when packets are lost.

``params["missing"]``: ``"same-rule"`` (default) hears only neighbours whose message
arrived since the last step; ``"reuse"`` hears every neighbour ever heard from, with its
latest values.

The intended objective is sum_j wbar^j f_j, wbar the average of the initial vectors. What
the mix really optimizes is sum_i pi_i f_i with pi the left Perron vector of A (see
:mod:`coordinator._priority_diagnostics`); the state keeps the row used at the last step
(``a_self`` and ``a_link``; ``mixing_row`` in a per-agent view), so the coordinator can
rebuild A.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from node._algorithm import AgentSpec, BlockAlgorithm, Heard, Payload, register_algorithm
from node._ratio import ratio_estimate, ratio_start, ratio_update
from topologies._errors import ScenarioError

__all__ = ["PriorityState", "PriorityWeighted"]

_SUM_TOLERANCE = 1e-9


@dataclass(frozen=True, slots=True, kw_only=True)
class PriorityState:
    x: np.ndarray
    #: each agent's current priority vector (shape (n,) per agent)
    priorities: np.ndarray
    #: the mixing row used at the last step: own weight (per agent) and weight per in-link
    a_self: np.ndarray
    a_link: np.ndarray
    #: ratio-consensus sums of the priority vector (``priority_averaging = "ratio"``)
    p_held: np.ndarray | None = None
    p_sent: np.ndarray | None = None
    p_rho: np.ndarray | None = None
    #: per-agent view only: agent id -> weight, self always included, other agents only
    #: with nonzero weight; {id: 1.0} before the first step
    mixing_row: Mapping[int, float] | None = None
    block: Any = field(default=None, repr=False, compare=False)


def _checked_priorities(spec: AgentSpec) -> np.ndarray:
    n = spec.n_agents
    if spec.initial_priorities is None:
        return np.full(n, 1.0 / n)
    w = np.array(spec.initial_priorities, dtype=float)
    if w.shape != (n,) or not np.all(np.isfinite(w)):
        raise ScenarioError(
            f"agent {spec.id}: initial priorities have shape {w.shape}; expected {n} finite"
            " numbers, one per agent"
        )
    if np.any(w < 0.0) or abs(float(w.sum()) - 1.0) > _SUM_TOLERANCE:
        raise ScenarioError(
            f"agent {spec.id}: initial priorities {w.tolist()} must be >= 0 and sum to 1"
            f" (they sum to {float(w.sum())!r})"
        )
    return w


@register_algorithm
class PriorityWeighted(BlockAlgorithm):
    name = "priority-weighted"
    uses_priorities = True
    state_type = PriorityState
    per_link = frozenset({"a_link", "p_rho"})
    has_rows = True
    #: gain 0 keeps the initial vectors; the coordinator sets it from [priorities].gain
    option_defaults = MappingProxyType(
        {"priority_averaging": "laplacian", "missing": "same-rule", "gain": 0.0}
    )
    missing_policies = ("same-rule", "reuse")

    def configure(self) -> None:
        me = self.spec.id
        averaging = self.option("priority_averaging")
        if averaging not in ("laplacian", "ratio"):
            raise ScenarioError(
                f"agent {me}: priority-weighted 'priority_averaging' = {averaging!r};"
                " expected 'laplacian' or 'ratio'"
            )
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {me}: priority-weighted 'missing' = {missing!r};"
                " expected 'same-rule' or 'reuse'"
            )
        gain = float(self.option("gain"))
        for sp in self.block.specs:
            degree = len(sp.in_neighbours)
            # c < 1/degree keeps w_i a convex combination (Olfati-Saber, Fax, Murray 2007)
            if not (gain >= 0.0 and gain * degree < 1.0):
                raise ScenarioError(
                    f"agent {sp.id}: priority 'gain' = {gain}; expected 0 <= gain < 1 / degree"
                    f" = {1.0 / degree if degree else float('inf')} (it has {degree} neighbours)"
                )
        self._ratio = averaging == "ratio"
        self._reuse = missing == "reuse"
        self._gain = gain
        self._initial = np.array([_checked_priorities(sp) for sp in self.block.specs])

    def payload_sizes(self) -> Mapping[str, int]:
        sizes = {"x": self.block.dimension}
        if self._ratio:
            sizes["w_sigma"] = self.block.n_agents + 1
        else:
            sizes["w"] = self.block.n_agents
        return sizes

    def _payload(self, state: PriorityState) -> Payload:
        if state.p_sent is not None:
            return {"x": state.x, "w_sigma": state.p_sent}
        return {"x": state.x, "w": state.priorities}

    def mixing_rows(self, state: PriorityState) -> list[dict[int, float]]:
        b = self.block
        rows: list[dict[int, float]] = [
            {int(i): float(a)} for i, a in zip(b.ids, state.a_self, strict=True)
        ]
        for link in np.flatnonzero(state.a_link).tolist():
            rows[b.link_dst[link]][int(b.link_src[link])] = float(state.a_link[link])
        return rows

    def start(self) -> tuple[PriorityState, Payload]:
        b = self.block
        x = self.initial_states()
        w = self._initial
        p_held = p_sent = p_rho = None
        if self._ratio:
            p_held, p_sent, p_rho = ratio_start(b, w)
        state = PriorityState(
            x=x,
            priorities=w,
            a_self=np.ones(b.size),
            a_link=np.zeros(b.links),
            p_held=p_held,
            p_sent=p_sent,
            p_rho=p_rho,
        )
        return state, self._payload(state)

    def advance(self, state: PriorityState, heard: Heard, k: int) -> tuple[PriorityState, Payload]:
        b = self.block
        w = state.priorities
        hear = heard.ever if self._reuse else heard.fresh
        # a_ii = w_i^i + every agent not heard from (summed directly, no cancellation)
        not_heard = np.ones(w.shape, dtype=bool)
        not_heard[b.link_dst[hear], b.link_src[hear]] = False
        starts = np.zeros(b.size, dtype=np.int64)
        np.cumsum(not_heard.sum(axis=1)[:-1], out=starts[1:])
        a_self = np.add.reduceat(w[not_heard], starts)
        a_link = np.where(hear, w[b.link_dst, b.link_src], 0.0)
        mixed = b.mix(b.coefficients(a_self, a_link), state.x, heard.values["x"])
        x = mixed - self.step_rule(k) * self.gradients(state.x)

        p_held, p_sent, p_rho = state.p_held, state.p_sent, state.p_rho
        if p_held is not None:
            p_held, p_sent, p_rho = ratio_update(
                b, p_held, p_sent, p_rho, heard.values["w_sigma"], heard.fresh
            )
            w_new = ratio_estimate(p_held)
        elif self._gain > 0.0:
            # sum over the heard neighbours of (w_j - w_i), in link order from zero
            pull = b.mix(
                b.coefficients(0.0, hear.astype(float)),
                np.zeros_like(w),
                heard.values["w"] - w[b.link_dst],
            )
            w_new = w + self._gain * pull
        else:
            w_new = w
        new = PriorityState(
            x=x,
            priorities=w_new,
            a_self=a_self,
            a_link=a_link,
            p_held=p_held,
            p_sent=p_sent,
            p_rho=p_rho,
        )
        return new, self._payload(new)
