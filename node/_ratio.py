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

The array functions here are shared by :class:`RatioConsensus` and by the priority-weighted
method's priority averaging: a block's sums are ``held`` and ``sent`` (one row per agent)
and ``rho`` (one row per in-link).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from node._algorithm import Block, BlockAlgorithm, Heard, Payload, register_algorithm
from topologies._errors import ScenarioError

__all__ = [
    "RatioConsensus",
    "RatioState",
    "ratio_estimate",
    "ratio_start",
    "ratio_update",
]


def ratio_start(block: Block, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Start every row from ``values`` (y(0), (B, m)) with z(0) = 1 and send the first share.

    Returns (held, sent, rho): the kept share [y / D, z / D], sigma (the running sum of the
    shares sent on each out-link, what the agent broadcasts) and, per in-link, the last
    sigma received from it (zeros before anything arrived).
    """
    full = np.concatenate((np.asarray(values, dtype=float), np.ones((block.size, 1))), axis=1)
    share = full / (block.out_degree + 1)[:, None]
    return share, share.copy(), np.zeros((block.links, full.shape[1]))


def ratio_update(
    block: Block,
    held: np.ndarray,
    sent: np.ndarray,
    rho: np.ndarray,
    sigma: np.ndarray,
    fresh: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One step: collect what arrived (``sigma`` on links marked ``fresh``), then split.

    Only fresh links update their rho; a stale or lost packet adds nothing now, and its
    mass arrives with the next packet that gets through.
    """
    full = block.mix(block.coefficients(1.0, fresh.astype(float)), held, sigma - rho)
    rho = np.where(fresh[:, None], sigma, rho)
    share = full / (block.out_degree + 1)[:, None]
    return share, sent + share, rho


def ratio_estimate(held: np.ndarray) -> np.ndarray:
    """Every row's estimate of the average: y / z."""
    return held[:, :-1] / held[:, -1:]


@dataclass(frozen=True, slots=True, kw_only=True)
class RatioState:
    #: the agent's estimate of the average of the initial states
    x: np.ndarray
    #: its estimate of the average priority vector (when averaged), else its initial vector
    priorities: np.ndarray | None
    held: np.ndarray
    sent: np.ndarray
    #: per in-link: the last running sum received on it
    rho: np.ndarray
    p_held: np.ndarray | None = None
    p_sent: np.ndarray | None = None
    p_rho: np.ndarray | None = None
    block: Any = field(default=None, repr=False, compare=False)


@register_algorithm
class RatioConsensus(BlockAlgorithm):
    """Average the initial states (and, with ``params["average_priorities"] = True``, the
    priority vectors) by running-sum ratio consensus; exact under packet drops."""

    name = "ratio-consensus"
    directed_ok = True
    state_type = RatioState
    per_link = frozenset({"rho", "p_rho"})
    option_defaults = MappingProxyType({"average_priorities": False})

    def configure(self) -> None:
        average = self.option("average_priorities")
        if not isinstance(average, bool):
            raise ScenarioError(
                f"agent {self.spec.id}: ratio-consensus 'average_priorities' = {average!r};"
                " expected true or false"
            )
        self._average_priorities = average and self.spec.initial_priorities is not None

    def payload_sizes(self) -> Mapping[str, int]:
        sizes = {"sigma": self.block.dimension + 1}
        if self._average_priorities:
            sizes["w_sigma"] = self.block.n_agents + 1
        return sizes

    def _payload(self, state: RatioState) -> Payload:
        out = {"sigma": state.sent}
        if state.p_sent is not None:
            out["w_sigma"] = state.p_sent
        return out

    def start(self) -> tuple[RatioState, Payload]:
        b = self.block
        x0 = self.initial_states()
        held, sent, rho = ratio_start(b, x0)
        priorities = p_held = p_sent = p_rho = None
        if b.specs[0].initial_priorities is not None:
            priorities = np.array([sp.initial_priorities for sp in b.specs], dtype=float)
        if self._average_priorities:
            p_held, p_sent, p_rho = ratio_start(b, priorities)
            priorities = ratio_estimate(p_held)
        state = RatioState(
            x=x0,
            priorities=priorities,
            held=held,
            sent=sent,
            rho=rho,
            p_held=p_held,
            p_sent=p_sent,
            p_rho=p_rho,
        )
        return state, self._payload(state)

    def advance(self, state: RatioState, heard: Heard, k: int) -> tuple[RatioState, Payload]:
        b = self.block
        held, sent, rho = ratio_update(
            b, state.held, state.sent, state.rho, heard.values["sigma"], heard.fresh
        )
        priorities, p_held, p_sent, p_rho = state.priorities, None, None, None
        if state.p_held is not None:
            p_held, p_sent, p_rho = ratio_update(
                b, state.p_held, state.p_sent, state.p_rho, heard.values["w_sigma"], heard.fresh
            )
            priorities = ratio_estimate(p_held)
        new = RatioState(
            x=ratio_estimate(held),
            priorities=priorities,
            held=held,
            sent=sent,
            rho=rho,
            p_held=p_held,
            p_sent=p_sent,
            p_rho=p_rho,
        )
        return new, self._payload(new)
