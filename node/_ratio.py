"""Running-sum ratio consensus, robust to packet drops.

Vaidya, Hadjicostis, Domínguez-García, "Robust average consensus over packet dropping
links" (CDC 2011); Domínguez-García, Hadjicostis, Vaidya, IEEE TAC (2016).

Every agent i runs the same linear update on a numerator vector y and a denominator z
(z(0) = 1), stored side by side as one array ``[y..., z]``:

* it keeps ``held = full / D_i`` of its current value (D_i = out-degree + 1) and adds the
  same share to its running sum ``sent`` (sigma_i), which it broadcasts;
* a receiver keeps, per in-neighbour j, ``received[j]`` (rho_ji): the last sigma_j it got,
  updated only when a packet arrives; its next value is
  ``full = held + sum_j (sigma_j,new - rho_ji,old)``.

A dropped packet is not lost mass: the difference sigma_j - rho_ji stays "in flight" and is
collected by the next packet that gets through, so
``sum_i held_i + sum_(j->i) (sent_j - received_ji) = sum_i [x_i(0), 1]`` at every step and
``y_i / z_i`` tends to the exact average on a strongly connected digraph. The running sums
grow linearly with the step count, so after k steps differences lose about log10(k) digits.

The pure functions here are shared by :class:`RatioConsensus` and by the priority-weighted
method's priority averaging.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from node._algorithm import AgentSpec, Algorithm, Payload, Received, register_algorithm
from topologies._errors import ScenarioError

__all__ = [
    "RatioConsensus",
    "RatioState",
    "RatioSums",
    "fresh_sums",
    "ratio_estimate",
    "ratio_start",
    "ratio_update",
]


@dataclass(frozen=True, slots=True, kw_only=True)
class RatioSums:
    """One agent's running-sum ratio consensus on one vector; last entry is the denominator."""

    #: the share of its value the agent keeps after the last split: [y / D, z / D]
    held: np.ndarray
    #: sigma: running sum of the shares sent on each out-link (what the agent broadcasts)
    sent: np.ndarray
    #: rho: per in-neighbour, the last running sum received from it (absent = zeros)
    received: Mapping[int, np.ndarray] = field(default_factory=dict)


def ratio_start(value: np.ndarray, out_degree: int) -> RatioSums:
    """Start from ``value`` (y(0)) with z(0) = 1 and send the first share."""
    full = np.append(np.asarray(value, dtype=float), 1.0)
    share = full / (out_degree + 1)
    return RatioSums(held=share, sent=share.copy(), received={})


def ratio_update(sums: RatioSums, fresh: Mapping[int, np.ndarray], out_degree: int) -> RatioSums:
    """One step: collect what arrived (``fresh``: in-neighbour -> its sigma), then split.

    Only neighbours present in ``fresh`` update their rho; a stale or lost packet adds
    nothing now, and its mass arrives with the next packet that gets through.
    """
    full = sums.held.copy()
    received = dict(sums.received)
    for j, sigma in fresh.items():
        old = received.get(j)
        full += sigma if old is None else sigma - old
        received[j] = sigma
    share = full / (out_degree + 1)
    return RatioSums(held=share, sent=sums.sent + share, received=received)


def ratio_estimate(sums: RatioSums) -> np.ndarray:
    """The agent's estimate of the average: y / z."""
    return sums.held[:-1] / sums.held[-1]


def fresh_sums(inbox: Mapping[int, Received], key: str) -> dict[int, np.ndarray]:
    """The running sums under ``key`` of every message that arrived since the last step."""
    return {j: np.asarray(r.payload[key], dtype=float) for j, r in inbox.items() if r.fresh}


@dataclass(frozen=True, slots=True, kw_only=True)
class RatioState:
    #: the agent's estimate of the average of the initial states
    x: np.ndarray
    #: its estimate of the average priority vector (when averaged), else its initial vector
    priorities: np.ndarray | None
    sums: RatioSums
    priority_sums: RatioSums | None = None


@register_algorithm
class RatioConsensus(Algorithm):
    """Average the initial states (and, with ``params["average_priorities"] = True``, the
    priority vectors) by running-sum ratio consensus; exact under packet drops."""

    name = "ratio-consensus"
    directed_ok = True
    option_defaults = MappingProxyType({"average_priorities": False})

    def __init__(self, spec: AgentSpec) -> None:
        super().__init__(spec)
        average = self.option("average_priorities")
        if not isinstance(average, bool):
            raise ScenarioError(
                f"agent {spec.id}: ratio-consensus 'average_priorities' = {average!r};"
                " expected true or false"
            )
        self._average_priorities = average and spec.initial_priorities is not None
        self._out_degree = len(spec.out_neighbours)

    def payload_sizes(self) -> Mapping[str, int]:
        sizes = {"sigma": self.spec.dimension + 1}
        if self._average_priorities:
            sizes["w_sigma"] = self.spec.n_agents + 1
        return sizes

    def _payload(self, sums: RatioSums, priority_sums: RatioSums | None) -> Payload:
        out = {"sigma": sums.sent}
        if priority_sums is not None:
            out["w_sigma"] = priority_sums.sent
        return out

    def init(self) -> tuple[RatioState, Payload]:
        spec = self.spec
        x0 = np.array(spec.initial_state, dtype=float)
        sums = ratio_start(x0, self._out_degree)
        psums = None
        priorities = spec.initial_priorities
        if self._average_priorities:
            psums = ratio_start(np.asarray(priorities, dtype=float), self._out_degree)
            priorities = ratio_estimate(psums)
        state = RatioState(x=x0, priorities=priorities, sums=sums, priority_sums=psums)
        return state, self._payload(sums, psums)

    def step(
        self, state: RatioState, inbox: Mapping[int, Received], k: int
    ) -> tuple[RatioState, Payload]:
        sums = ratio_update(state.sums, fresh_sums(inbox, "sigma"), self._out_degree)
        psums = state.priority_sums
        priorities = state.priorities
        if psums is not None:
            psums = ratio_update(psums, fresh_sums(inbox, "w_sigma"), self._out_degree)
            priorities = ratio_estimate(psums)
        new = RatioState(
            x=ratio_estimate(sums), priorities=priorities, sums=sums, priority_sums=psums
        )
        return new, self._payload(sums, psums)
