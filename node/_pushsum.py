"""Push-sum (Kempe, Dobra, Gehrke, FOCS 2003) and subgradient-push (Nedić & Olshevsky,
IEEE TAC 60 (2015)) for directed graphs, in array form.

Each agent i holds a numerator s_i (s_i(0) = x_i(0)) and a weight w_i (w_i(0) = 1) and
broadcasts the shares s_i / D_i and w_i / D_i, D_i = out-degree + 1, keeping one share
itself. It then sums its own share and the shares that arrived since the last step (a
stale message is not added again):

    S_i = s_i / D_i + sum_j s_j / D_j,   W_i = w_i / D_i + sum_j w_j / D_j,   z_i = S_i / W_i

``params["mode"]``:

* ``"average"``: s_i <- S_i. Without losses sum s and sum w never change and z_i tends to
  the average of the initial states on a strongly connected digraph.
* ``"optimize"`` (default): subgradient-push, s_i <- S_i - alpha_t grad f_i(z_i), with
  alpha_t = scale / sqrt(t + 1) (``params["scale"]``, default 1.0) unless
  ``params["step_rule"]`` gives a rule: ``"plan"`` (the plan's step rule) or a constant /
  table accepted by :meth:`StepRule.from_spec`.

The estimate ``x`` is z_i. A lost message loses its mass for good, so push-sum under drops
converges to a biased value (Gerencsér & Hendrickx, 2015); see ratio consensus for the
drop-robust variant.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from node._algorithm import BlockAlgorithm, Heard, Payload, StepRule, register_algorithm
from topologies._errors import ScenarioError

__all__ = ["PushSum", "PushSumState"]


@dataclass(frozen=True, slots=True, kw_only=True)
class PushSumState:
    #: the ratio estimate z = S / W
    x: np.ndarray
    #: numerator held after the step, before splitting (x_i in Nedić–Olshevsky's notation)
    s: np.ndarray
    #: weight held after the step (y_i in Nedić–Olshevsky's notation); (B,)
    w: np.ndarray
    priorities: None = None
    block: Any = field(default=None, repr=False, compare=False)


@register_algorithm
class PushSum(BlockAlgorithm):
    name = "push-sum"
    directed_ok = True
    state_type = PushSumState
    #: step_rule, absent by default, replaces scale when given
    option_defaults = MappingProxyType({"mode": "optimize", "scale": 1.0})

    def configure(self) -> None:
        params, me = self.params, self.spec.id
        mode = self.option("mode")
        if mode not in ("average", "optimize"):
            raise ScenarioError(
                f"agent {me}: push-sum 'mode' = {mode!r}; expected 'average' or 'optimize'"
            )
        self._optimize = mode == "optimize"
        self._shares = (self.block.out_degree + 1).astype(float)
        rule = params.get("step_rule")
        if rule is None:
            scale = float(self.option("scale"))
            self._rule = StepRule(rule="diminishing", scale=scale, power=0.5)
        elif rule == "plan":
            self._rule = self.step_rule
        elif isinstance(rule, int | float | Mapping):
            self._rule = StepRule.from_spec(rule)
        else:
            raise ScenarioError(
                f"agent {me}: push-sum 'step_rule' = {rule!r}; expected 'plan', a number"
                " or a table {rule, step, scale, power}"
            )

    def step_size(self, k: int) -> float:
        """alpha used at step k (t = k in alpha_t = scale / sqrt(t + 1))."""
        return self._rule(k)

    def payload_sizes(self) -> Mapping[str, int]:
        return {"s": self.block.dimension, "w": 1}

    def _payload(self, s: np.ndarray, w: np.ndarray) -> Payload:
        return {"s": s / self._shares[:, None], "w": (w / self._shares)[:, None]}

    def start(self) -> tuple[PushSumState, Payload]:
        x = self.initial_states()
        w = np.ones(self.block.size)
        return PushSumState(x=x, s=x, w=w), self._payload(x, w)

    def advance(self, state: PushSumState, heard: Heard, k: int) -> tuple[PushSumState, Payload]:
        b = self.block
        d = b.dimension
        # own share plus every share that arrived since the last step (a stale one is not
        # added again: coefficient 0)
        own = np.concatenate(
            (state.s / self._shares[:, None], (state.w / self._shares)[:, None]), axis=1
        )
        held = np.concatenate((heard.values["s"], heard.values["w"]), axis=1)
        mixed = b.mix(b.coefficients(1.0, heard.fresh.astype(float)), own, held)
        s = mixed[:, :d]
        w = mixed[:, d]
        z = s / w[:, None]
        if self._optimize:
            s = s - self._rule(k) * self.gradients(z)
        return PushSumState(x=z, s=s, w=w), self._payload(s, w)
