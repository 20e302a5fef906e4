"""What the priority-weighted mix really optimizes, from the mixing the agents did.

The matrix that counts is the mix in expectation over the run: each agent's row built from
its priorities and the delivery rate of each in-link (:func:`expected_mixing_matrix`). The
rows of the last round (each agent's last ``mixing_row``) are a snapshot of which messages
happened to arrive then, reported apart and labelled as such.

With a row-stochastic mixing matrix A and
pi^T A = pi^T, the pi-weighted average of the states follows gradient descent on
sum_i pi_i f_i, so pi are the *effective* priorities; they equal the intended ones when
every agent holds the same vector on a connected undirected graph (the chain is reversible)
and drift away when vectors disagree or a link fails one way.

Rule for a reducible A: the effective priorities are ``(1/n) 1^T A_inf`` where ``A_inf`` is
the Cesàro limit of A^k, i.e. the weights with which the *average of the agents' limits*
(x_hat) depends on the agents' values. With exactly one closed class (the usual case, e.g.
one agent no longer heard by anyone) this is that class's stationary vector and agents
outside it get priority 0. With several closed classes the swarm cannot agree; the rule then
mixes the classes' stationary vectors, each weighted by the share of agents that end up
following it (its mean absorption probability), and the report says so.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.sparse.csgraph import connected_components

from coordinator._reference import reference_optimum, total_objective
from node._objectives import Objective
from topologies._errors import SwarmrigError

__all__ = [
    "Influence",
    "delivery_rates",
    "effective_priorities",
    "expected_mixing_matrix",
    "influence",
    "mixing_matrix",
    "priority_report",
]

_ROW_TOLERANCE = 1e-9


def mixing_matrix(rows: Mapping[int, Mapping[int, float]], n: int) -> np.ndarray:
    """The n x n matrix with A[i, j] = rows[i][j] (0 where absent); ids may be strings.

    Every agent 0..n-1 must have a row; entries must be >= 0 with ids in 0..n-1 and each
    row must sum to 1 (within 1e-9), else SwarmrigError naming the agent.
    """
    # telemetry that went through JSON has string keys
    rows = {int(i): row for i, row in rows.items()}
    a = np.zeros((n, n))
    for i in range(n):
        if i not in rows:
            raise SwarmrigError(f"mixing matrix: agent {i} reported no mixing row")
        for j, v in rows[i].items():
            j = int(j)
            if not 0 <= j < n:
                raise SwarmrigError(
                    f"mixing matrix: agent {i}'s row names agent {j}; expected ids 0..{n - 1}"
                )
            if not (np.isfinite(v) and v >= 0.0):
                raise SwarmrigError(
                    f"mixing matrix: agent {i}'s weight for agent {j} is {v}; expected >= 0"
                )
            a[i, j] = float(v)
        total = float(a[i].sum())
        if abs(total - 1.0) > _ROW_TOLERANCE:
            raise SwarmrigError(
                f"mixing matrix: agent {i}'s row sums to {total!r}; expected 1 (row-stochastic)"
            )
    return a


@dataclass(frozen=True, slots=True, kw_only=True)
class Influence:
    """How much each agent's objective counts in the limit of x <- A x."""

    #: effective priorities: nonnegative, summing to one (see the module's rule)
    priorities: np.ndarray
    #: closed communicating classes of the chain A, each sorted
    closed_classes: tuple[tuple[int, ...], ...]
    #: agents in no closed class (their objectives get priority 0)
    transient: tuple[int, ...]
    #: one sentence saying which case applied
    note: str


def _stationary(block: np.ndarray) -> np.ndarray:
    """The stationary vector of an irreducible stochastic block: pi^T (P - I) = 0, sum 1."""
    m = block.shape[0]
    system = np.vstack([(block - np.eye(m)).T, np.ones((1, m))])
    rhs = np.zeros(m + 1)
    rhs[-1] = 1.0
    pi = np.linalg.lstsq(system, rhs, rcond=None)[0]
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum()


def influence(a: np.ndarray) -> Influence:
    """Effective priorities of a row-stochastic A with the reducible-case rule of the module."""
    a = np.asarray(a, dtype=float)
    n = a.shape[0]
    if a.shape != (n, n) or np.any(a < 0.0) or np.any(np.abs(a.sum(axis=1) - 1.0) > 1e-9):
        raise SwarmrigError(
            f"effective priorities: A has shape {a.shape}; expected a square, nonnegative,"
            " row-stochastic matrix"
        )
    adjacency = a > 0.0
    count, labels = connected_components(adjacency, directed=True, connection="strong")
    classes = [np.flatnonzero(labels == c) for c in range(count)]
    closed = [c for c in classes if not np.any(adjacency[np.ix_(c, np.setdiff1d(range(n), c))])]
    closed.sort(key=lambda c: int(c[0]))
    in_closed = np.zeros(n, dtype=bool)
    for c in closed:
        in_closed[c] = True
    transient = np.flatnonzero(~in_closed)

    # absorption probabilities h[:, c]: chance that the chain from agent i ends in class c
    h = np.zeros((n, len(closed)))
    for ci, c in enumerate(closed):
        h[c, ci] = 1.0
    if transient.size:
        t = transient
        into = np.column_stack([a[np.ix_(t, c)].sum(axis=1) for c in closed])
        h[t] = np.linalg.solve(np.eye(t.size) - a[np.ix_(t, t)], into)

    pi = np.zeros(n)
    share = h.mean(axis=0)
    for ci, c in enumerate(closed):
        pi[c] += share[ci] * _stationary(a[np.ix_(c, c)])
    pi = pi / pi.sum()

    if len(closed) == 1 and not transient.size:
        note = "A is irreducible: the unique left Perron vector"
    elif len(closed) == 1:
        note = (
            f"A is reducible: one closed class {closed[0].tolist()}; agents"
            f" {transient.tolist()} are not heard by it and get priority 0"
        )
    else:
        note = (
            f"A has {len(closed)} closed classes {[c.tolist() for c in closed]}: the swarm"
            " cannot agree; each class's stationary vector is weighted by the share of agents"
            " that follow it"
        )
    return Influence(
        priorities=pi,
        closed_classes=tuple(tuple(int(i) for i in c) for c in closed),
        transient=tuple(int(i) for i in transient),
        note=note,
    )


def effective_priorities(a: np.ndarray) -> np.ndarray:
    """The left Perron vector of row-stochastic A (sums to one); reducible A: module rule."""
    return influence(a).priorities


def delivery_rates(
    link_rows: Sequence[Mapping[str, Any]], *, reuse: bool = False
) -> dict[tuple[int, int], float]:
    """(from, to) -> the share of the link's settled messages that arrived, from links.csv
    rows: delivered / (sent - in_flight). With ``reuse`` (a silent neighbour's last value is
    used) a link that delivered anything counts as always heard."""
    out = {}
    for r in link_rows:
        settled = int(r["sent"]) - int(r["in_flight"])
        q = int(r["delivered"]) / settled if settled > 0 else 0.0
        if reuse:
            q = 1.0 if int(r["delivered"]) > 0 else 0.0
        out[(int(r["from"]), int(r["to"]))] = min(1.0, q)
    return out


def expected_mixing_matrix(
    priorities: np.ndarray,
    in_neighbours: Mapping[int, Sequence[int]],
    rates: Mapping[tuple[int, int], float],
) -> np.ndarray:
    """The mixing matrix in expectation over the run (methods.md, "Expected mixing under
    independent loss"): agent i hears in-neighbour j with probability q_ji = rates[(j, i)],
    so row i puts q_ji w_i^j on j and the rest, w_i^i + sum_j (1 - q_ji) w_i^j plus every
    non-neighbour's priority, on itself. ``priorities``: row i is agent i's vector."""
    w = np.asarray(priorities, dtype=float)
    n = w.shape[0]
    a = np.zeros((n, n))
    for i in range(n):
        for j in in_neighbours.get(i, ()):
            if j != i:
                a[i, j] = rates.get((j, i), 0.0) * w[i, j]
        a[i, i] = 1.0 - a[i].sum()
    return a


def priority_report(
    initial_priorities: np.ndarray,
    final_priorities: np.ndarray,
    final_rows: Mapping[int, Mapping[int, float]] | None,
    objectives: Sequence[Objective],
    x_hat: np.ndarray,
    *,
    expected: np.ndarray | None = None,
) -> dict[str, Any]:
    """Intended vs agreed vs effective priorities, and the gap of x_hat under each weighting.

    ``expected`` is the mixing matrix over the run (:func:`expected_mixing_matrix` from the
    links' delivery rates); the rows of the last round (``final_rows``) are only a snapshot
    of which messages happened to arrive then. Keys: ``intended_priorities`` (mean of the
    initial vectors), ``agreed_priorities`` (``mean`` of the final vectors and
    ``max_disagreement``, the largest |w_i^j - mean^j|), ``effective_priorities`` (from
    ``expected``, or from the last round when it is not given), ``effective_source``,
    ``effective_note``, ``closed_classes``, ``effective_vs_intended`` ({l1, max} distance),
    ``last_round_priorities`` (the left Perron vector of the last round's rows, labelled as
    such), ``last_round_note``, ``last_round_vs_intended``, ``gap_to_intended`` and
    ``gap_to_effective`` (F_w(x_hat) - F_w* for each weighting), ``x_star_intended``,
    ``x_star_effective``, and ``intended_vs_effective_l1``; with neither rows nor
    ``expected`` (a method that mixes no states) only the intended and agreed keys. Plain
    floats and lists only, so the dict is JSON-able.
    """
    w0 = np.asarray(initial_priorities, dtype=float)
    wf = np.asarray(final_priorities, dtype=float)
    n = len(objectives)
    if w0.shape != (n, n) or wf.shape != (n, n):
        raise SwarmrigError(
            f"priority report: priorities of shapes {w0.shape} and {wf.shape} for {n} agents;"
            f" expected ({n}, {n}) each"
        )
    x_hat = np.asarray(x_hat, dtype=float)
    intended = w0.mean(axis=0)
    agreed = wf.mean(axis=0)
    ref_intended = reference_optimum(objectives, intended)

    def distance(p: np.ndarray) -> dict[str, float]:
        d = np.abs(p - intended)
        return {"l1": float(d.sum()), "max": float(d.max())}

    report: dict[str, Any] = {
        "intended_priorities": intended.tolist(),
        "agreed_priorities": {
            "mean": agreed.tolist(),
            "max_disagreement": float(np.max(np.abs(wf - agreed))),
        },
        "gap_to_intended": total_objective(objectives, intended, x_hat) - ref_intended.F_star,
        "x_star_intended": ref_intended.x_star.tolist(),
    }
    if final_rows is None and expected is None:
        # a method that mixes no states (ratio consensus): no effective row
        return report
    last = None if final_rows is None else influence(mixing_matrix(final_rows, n))
    inf = influence(expected) if expected is not None else last
    assert inf is not None
    ref_effective = reference_optimum(objectives, inf.priorities)
    report.update(
        {
            "effective_priorities": inf.priorities.tolist(),
            "effective_source": "last round" if expected is None else "delivery rates over the run",
            "effective_note": inf.note,
            "closed_classes": [list(c) for c in inf.closed_classes],
            "effective_vs_intended": distance(inf.priorities),
            "gap_to_effective": total_objective(objectives, inf.priorities, x_hat)
            - ref_effective.F_star,
            "x_star_effective": ref_effective.x_star.tolist(),
            "intended_vs_effective_l1": float(np.abs(intended - inf.priorities).sum()),
        }
    )
    if last is not None:
        report.update(
            {
                "last_round_priorities": last.priorities.tolist(),
                "last_round_note": "snapshot: the rows of the last round only; " + last.note,
                "last_round_vs_intended": distance(last.priorities),
            }
        )
    return report
