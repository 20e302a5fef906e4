"""The priority-weighted method: priority averaging plus a row-stochastic mix of states.

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
:mod:`coordinator._priority_diagnostics`); the state exposes ``mixing_row``, the row used
at the last step, so the coordinator can rebuild A.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from node._algorithm import AgentSpec, Algorithm, Payload, Received, register_algorithm
from node._ratio import RatioSums, fresh_sums, ratio_estimate, ratio_start, ratio_update
from topologies._errors import ScenarioError

__all__ = ["PriorityState", "PriorityWeighted"]

_SUM_TOLERANCE = 1e-9


@dataclass(frozen=True, slots=True, kw_only=True)
class PriorityState:
    x: np.ndarray
    #: this agent's current priority vector (shape (n,))
    priorities: np.ndarray
    #: the mixing row used at the last step: agent id -> weight, self always included,
    #: other agents only with nonzero weight; {id: 1.0} before the first step
    mixing_row: Mapping[int, float]
    #: ratio-consensus sums of the priority vector (``priority_averaging = "ratio"``)
    priority_sums: RatioSums | None = None


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
class PriorityWeighted(Algorithm):
    name = "priority-weighted"
    uses_priorities = True
    #: gain 0 keeps the initial vectors; the coordinator sets it from [priorities].gain
    option_defaults = MappingProxyType(
        {"priority_averaging": "laplacian", "missing": "same-rule", "gain": 0.0}
    )
    missing_policies = ("same-rule", "reuse")

    def __init__(self, spec: AgentSpec) -> None:
        super().__init__(spec)
        averaging = self.option("priority_averaging")
        if averaging not in ("laplacian", "ratio"):
            raise ScenarioError(
                f"agent {spec.id}: priority-weighted 'priority_averaging' = {averaging!r};"
                " expected 'laplacian' or 'ratio'"
            )
        missing = self.option("missing")
        if missing not in self.missing_policies:
            raise ScenarioError(
                f"agent {spec.id}: priority-weighted 'missing' = {missing!r};"
                " expected 'same-rule' or 'reuse'"
            )
        gain = float(self.option("gain"))
        degree = len(spec.in_neighbours)
        # c < 1/degree keeps w_i a convex combination (Olfati-Saber, Fax, Murray 2007)
        if not (gain >= 0.0 and gain * degree < 1.0):
            raise ScenarioError(
                f"agent {spec.id}: priority 'gain' = {gain}; expected 0 <= gain < 1 / degree"
                f" = {1.0 / degree if degree else float('inf')} (it has {degree} neighbours)"
            )
        self._ratio = averaging == "ratio"
        self._reuse = missing == "reuse"
        self._gain = gain
        self._out_degree = len(spec.out_neighbours)
        self._initial = _checked_priorities(spec)

    def payload_sizes(self) -> Mapping[str, int]:
        sizes = {"x": self.spec.dimension}
        if self._ratio:
            sizes["w_sigma"] = self.spec.n_agents + 1
        else:
            sizes["w"] = self.spec.n_agents
        return sizes

    def _payload(self, x: np.ndarray, w: np.ndarray, sums: RatioSums | None) -> Payload:
        if sums is not None:
            return {"x": x, "w_sigma": sums.sent}
        return {"x": x, "w": w}

    def init(self) -> tuple[PriorityState, Payload]:
        x = np.array(self.spec.initial_state, dtype=float)
        w = self._initial
        sums = ratio_start(w, self._out_degree) if self._ratio else None
        state = PriorityState(x=x, priorities=w, mixing_row={self.spec.id: 1.0}, priority_sums=sums)
        return state, self._payload(x, w, sums)

    def step(
        self, state: PriorityState, inbox: Mapping[int, Received], k: int
    ) -> tuple[PriorityState, Payload]:
        spec = self.spec
        me = spec.id
        w = state.priorities
        heard: dict[int, Received] = {}
        for j in spec.in_neighbours:
            r = inbox.get(j)
            if r is not None and (r.fresh or self._reuse):
                heard[j] = r
        # a_ii = w_i^i + every agent not heard from (summed directly, no cancellation)
        not_heard = np.ones(spec.n_agents, dtype=bool)
        not_heard[list(heard)] = False
        a_self = float(w[not_heard].sum())
        row: dict[int, float] = {me: a_self}
        mixed = a_self * state.x
        for j, r in heard.items():
            a = float(w[j])
            if a != 0.0:
                row[j] = a
                mixed = mixed + a * r.payload["x"]
        x = mixed - spec.step(k) * self.gradient(state.x)

        sums = state.priority_sums
        if sums is not None:
            sums = ratio_update(sums, fresh_sums(inbox, "w_sigma"), self._out_degree)
            w_new = ratio_estimate(sums)
        elif self._gain > 0.0 and heard:
            pull = sum(r.payload["w"] - w for r in heard.values())
            w_new = w + self._gain * pull
        else:
            w_new = w
        new = PriorityState(x=x, priorities=w_new, mixing_row=row, priority_sums=sums)
        return new, self._payload(x, w_new, sums)
