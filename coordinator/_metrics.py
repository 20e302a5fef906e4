"""Metrics from recorded telemetry, and the per-link message accounting.

Every figure here is computed from what the agents reported during the run; nothing is
estimated from the scenario.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from coordinator._reference import Reference
from coordinator._results import GapFunction
from node._objectives import Objective

__all__ = [
    "AgentRecord",
    "FinalState",
    "MessageTotals",
    "final_states",
    "final_states_json",
    "forged_by_link",
    "link_accounting",
    "metric_series",
    "refused_frames_event",
    "unattributed_frames",
]

# positions in a link counter row (see node._runtime.COUNTER_FIELDS)
RECEIVED, DELIVERED, DROPPED, REJECTED, DUPLICATED, LOST, MAX_SEQ, HELD, FIRST_SEQ = range(9)
MEDIAN, P95, MAX = 9, 10, 11


@dataclass(slots=True)
class AgentRecord:
    """What the coordinator knows of one incarnation (epoch) of one agent."""

    agent: int
    epoch: int
    offset: float = 0.0  # node clock minus coordinator clock
    #: samples: (iteration, t_s since go on the coordinator clock, x, priorities, value, row)
    samples: list[tuple[int, float, list[float], list[float] | None, float, Any]] = field(
        default_factory=list
    )
    links: dict[int, dict[int, list[Any]]] = field(default_factory=dict)
    counters: dict[str, Any] = field(default_factory=dict)
    final: dict[str, Any] | None = None
    #: False once the process is gone without a final report (crashed)
    alive: bool = True


@dataclass(frozen=True, slots=True, kw_only=True)
class MessageTotals:
    """Swarm-wide message accounting: sent = delivered + dropped_injected + lost_transport
    + rejected + in_flight exactly; duplicates are extra copies and sit apart."""

    #: data messages published by every agent (per link: one copy per out-neighbour)
    sent: int
    #: seen by the receiving algorithm (first copies only)
    delivered: int
    #: dropped by an injected fault
    dropped_injected: int
    #: never arrived, not explained by injection (queue limits, dead peers)
    lost_transport: int
    #: refused: corrupted, malformed, replayed, or from an old epoch
    rejected: int
    #: duplicate copies injected (not part of the sum)
    duplicated: int
    #: sent but not yet seen by a live receiver at stop (including held by delays)
    in_flight: int
    #: frames claiming a link's sender that it never sent as such (an epoch the coordinator
    #: did not announce, a non-finite state, an implausible sequence jump): not sent, so
    #: not part of the sum; see node._receiver
    forged: int = 0
    #: frames from no known sender (undecodable, bad checksum, oversized, not an
    #: in-neighbour), over every receiver
    unattributed: int = 0

    def as_dict(self) -> dict[str, int]:
        return {
            "sent": self.sent,
            "delivered": self.delivered,
            "dropped_injected": self.dropped_injected,
            "lost_transport": self.lost_transport,
            "rejected": self.rejected,
            "duplicated": self.duplicated,
            "in_flight": self.in_flight,
            "forged": self.forged,
            "unattributed": self.unattributed,
        }


def _counters(r: AgentRecord) -> Mapping[str, Any]:
    return (r.final["counters"] if r.final else r.counters) or {}


def _forged(r: AgentRecord) -> dict[int, int]:
    """In-neighbour -> forged frames this incarnation refused (its latest report)."""
    per = _counters(r).get("forged") or {}
    return {int(k): int(v) for k, v in per.items()}


def unattributed_frames(records: Sequence[AgentRecord]) -> dict[int, int]:
    """Agent -> frames from no known sender that its incarnations refused."""
    out: dict[int, int] = {}
    for r in records:
        n = int(_counters(r).get("unattributed_rejected", 0) or 0)
        out[r.agent] = out.get(r.agent, 0) + n
    return out


def forged_by_link(records: Sequence[AgentRecord]) -> dict[tuple[int, int], int]:
    """(sender, receiver) -> forged frames, over the receiver's incarnations (nonzero)."""
    out: dict[tuple[int, int], int] = {}
    for r in records:
        for src, n in _forged(r).items():
            if n:
                out[(src, r.agent)] = out.get((src, r.agent), 0) + n
    return out


def refused_frames_event(records: Sequence[AgentRecord]) -> dict[str, Any] | None:
    """The fields of events.jsonl's one ``data-refused`` line (None when nothing was refused):
    counts per link and per receiver, bounded by the swarm's size, never one line per frame."""
    forged = forged_by_link(records)
    unattributed = {a: n for a, n in unattributed_frames(records).items() if n}
    if not forged and not unattributed:
        return None
    return {
        "forged": sum(forged.values()),
        "forged_by_link": [[s, d, n] for (s, d), n in sorted(forged.items())],
        "unattributed": sum(unattributed.values()),
        "unattributed_by_agent": {str(a): n for a, n in sorted(unattributed.items())},
    }


def _sent_by_epoch(records: Sequence[AgentRecord]) -> dict[tuple[int, int], tuple[int, bool]]:
    """(agent, epoch) -> (messages sent, incarnation still alive at stop)."""
    out = {}
    for r in records:
        c = r.final["counters"] if r.final else r.counters
        out[(r.agent, r.epoch)] = (int(c.get("sent", 0)), r.final is not None)
    return out


def link_accounting(
    records: Sequence[AgentRecord], links: Sequence[tuple[int, int]]
) -> tuple[list[dict[str, Any]], MessageTotals]:
    """Rows of links.csv and the swarm totals.

    Per directed link and sender epoch, the receiver's incarnations are taken in order.
    A receiver incarnation that died (no final report) loses what it held; sequence numbers
    between what one incarnation last reported and the next one first saw went to a dead
    peer and count as lost in transport. For a sender incarnation that died, nothing is on
    the way any more: what no receiver saw is lost; what a live receiver still holds behind
    a delay did arrive and is in flight, whoever sent it.
    """
    sent = _sent_by_epoch(records)
    by_agent: dict[int, list[AgentRecord]] = {}
    for r in records:
        by_agent.setdefault(r.agent, []).append(r)
    for lst in by_agent.values():
        lst.sort(key=lambda r: r.epoch)
    rows = []
    tot = dict.fromkeys((f.name for f in dataclasses.fields(MessageTotals)), 0)
    tot["unattributed"] = sum(unattributed_frames(records).values())
    for src, dst in links:
        row = {k: 0 for k in tot if k != "unattributed"}
        medians, p95s, maxes, weights = [], [], [], []
        sender_epochs = sorted(e for (a, e) in sent if a == src)
        for se in sender_epochs:
            s_count, s_alive = sent[(src, se)]
            max_seen = -1
            for rec in by_agent.get(dst, []):
                c = rec.final["links"] if rec.final else rec.links
                per = c.get(src, {}).get(se)
                if per is None:
                    continue
                s_count = max(s_count, int(per[MAX_SEQ]) + 1)
            for rec in by_agent.get(dst, []):
                live = rec.final is not None
                c = rec.final["links"] if rec.final else rec.links
                per = c.get(src, {}).get(se)
                if per is None:
                    continue
                row["delivered"] += int(per[DELIVERED])
                row["dropped_injected"] += int(per[DROPPED])
                row["rejected"] += int(per[REJECTED])
                row["duplicated"] += int(per[DUPLICATED])
                lost = int(per[LOST])
                first = int(per[FIRST_SEQ])
                # The node counts the gap before its first message from -1; for a restarted
                # receiver only the part after what the previous incarnation saw is lost.
                row["lost_transport"] += (lost - first) + max(0, first - (max_seen + 1))
                held = int(per[HELD])
                if live:
                    row["in_flight"] += held
                else:
                    row["lost_transport"] += held
                max_seen = max(max_seen, int(per[MAX_SEQ]))
                if per[MEDIAN] is not None and int(per[DELIVERED]) > 0:
                    medians.append(per[MEDIAN])
                    p95s.append(per[P95])
                    maxes.append(per[MAX])
                    weights.append(int(per[DELIVERED]))
            beyond = s_count - (max_seen + 1)
            receiver_alive = any(r.final is not None for r in by_agent.get(dst, []))
            if s_alive and receiver_alive:
                row["in_flight"] += beyond
            else:
                row["lost_transport"] += beyond
            row["sent"] += s_count
        row["forged"] = sum(_forged(r).get(src, 0) for r in by_agent.get(dst, []))
        for k in row:
            tot[k] += row[k]
        rows.append(
            {
                "from": src,
                "to": dst,
                **row,
                # several incarnations: the delivery-weighted median, the largest p95 and max
                "delay_median_ms": None
                if not weights
                else float(np.average(medians, weights=weights)),
                "delay_p95_ms": None if not weights else float(max(p95s)),
                "delay_max_ms": None if not weights else float(max(maxes)),
            }
        )
    return rows, MessageTotals(**tot)


def metric_series(
    records: Sequence[AgentRecord],
    n: int,
    objectives: Sequence[Objective],
    intended: np.ndarray,
    reference: Reference,
    *,
    by_iteration: bool,
    max_points: int = 600,
    gap: GapFunction | None = None,
) -> list[dict[str, Any]]:
    """The metrics.csv rows: at each grid point, every agent's latest sample at or before it.

    Rounds mode uses the sampled iterations as the grid (every agent samples the same
    iterations), async mode a time grid. An agent not yet sampled at a grid point is left
    out of that point. ``gap`` (default: built from objectives, intended and reference) is
    the run's one gap function: ``gap`` is that of the average, ``worst_agent_gap`` the
    largest of the agents' own.
    """
    gap = gap or GapFunction(objectives, intended, reference)
    per_agent: dict[int, list[tuple]] = {}
    for r in sorted(records, key=lambda r: (r.agent, r.epoch)):
        lst = per_agent.setdefault(r.agent, [])
        if by_iteration and lst:
            # A restarted agent repeats the iterations its old incarnation reached after its
            # last sample; a row at iteration k shows the state the agent first had at k
            # (which matches the row's time); the repeats stay in telemetry/.
            reached = max(s[0] for s in lst)
            lst.extend(s for s in r.samples if s[0] > reached)
        else:
            lst.extend(r.samples)
    if not per_agent:
        return []
    for lst in per_agent.values():
        lst.sort(key=lambda s: (s[1], s[0]))
    col = 0 if by_iteration else 1
    keys = np.unique(np.concatenate([[s[col] for s in lst] for lst in per_agent.values()]))
    if len(keys) > max_points:
        idx = np.unique(np.linspace(0, len(keys) - 1, max_points).round().astype(int))
        keys = keys[idx]
    agents = sorted(per_agent)
    cols = {}
    for a in agents:
        lst = per_agent[a]
        if by_iteration:
            lst = sorted(lst, key=lambda s: s[0])
        cols[a] = (
            np.array([s[col] for s in lst], dtype=float),
            np.array([s[2] for s in lst], dtype=float),
            lst,
        )
    rows = []
    for key in keys:
        xs, ws, its, ts = [], [], [], []
        for a in agents:
            k_arr, x_arr, lst = cols[a]
            pos = int(np.searchsorted(k_arr, key, side="right")) - 1
            if pos < 0:
                continue
            s = lst[pos]
            xs.append(x_arr[pos])
            its.append(s[0])
            ts.append(s[1])
            if s[3] is not None:
                ws.append(s[3])
        if not xs:
            continue
        X = np.asarray(xs)
        x_hat = X.mean(axis=0)
        own = gap.many(X)
        worst = float(np.max(np.where(np.isnan(own), np.inf, own)))
        cons = float(np.max(np.linalg.norm(X - x_hat, axis=1)))
        if ws:
            Wm = np.asarray(ws)
            w_bar = Wm.mean(axis=0)
            pdis = float(np.max(np.linalg.norm(Wm - w_bar, axis=1)))
            pdrift = float(np.linalg.norm(w_bar - intended))
        else:
            pdis = pdrift = 0.0
        rows.append(
            {
                "t_s": float(np.median(ts)) if by_iteration else float(key),
                "gap": gap(x_hat),
                "worst_agent_gap": worst,
                "consensus_error": cons,
                "priority_disagreement": pdis,
                "priority_drift": pdrift,
                "iteration_min": int(min(its)),
                "iteration_median": float(np.median(its)),
                "iteration_max": int(max(its)),
            }
        )
    return rows


@dataclass(frozen=True, slots=True, kw_only=True)
class FinalState:
    """One agent's state at the end of the run, as final_states.json records it."""

    agent: int
    #: the incarnation it came from
    epoch: int
    iteration: int
    x: list[float]
    #: "final report" (the agent's own last word) or "last sample" (it died before one)
    source: str


def final_states(records: Sequence[AgentRecord]) -> dict[int, FinalState]:
    """Every agent's final state: its last incarnation's final report, else that
    incarnation's last telemetry sample; agents with neither are absent."""
    last: dict[int, AgentRecord] = {}
    for r in records:
        if r.agent not in last or r.epoch >= last[r.agent].epoch:
            last[r.agent] = r
    out = {}
    for a, r in sorted(last.items()):
        if r.final is not None:
            x, it, src = r.final["state"]["x"], int(r.final["iteration"]), "final report"
        elif r.samples:
            x, it, src = r.samples[-1][2], int(r.samples[-1][0]), "last sample"
        else:
            continue
        out[a] = FinalState(
            agent=a, epoch=r.epoch, iteration=it, x=[float(v) for v in x], source=src
        )
    return out


def final_states_json(
    finals: Mapping[int, FinalState], n: int, gap: GapFunction
) -> list[dict[str, Any]]:
    """final_states.json: one object per agent id 0..n-1 (id, epoch, iteration, source, x,
    gap = F(x) - F*); an agent that never reported has x, gap and epoch null."""
    out = []
    for a in range(n):
        f = finals.get(a)
        if f is None:
            out.append(
                {"id": a, "epoch": None, "iteration": None, "source": None, "x": None, "gap": None}
            )
            continue
        out.append(
            {
                "id": a,
                "epoch": f.epoch,
                "iteration": f.iteration,
                "source": f.source,
                "x": f.x,
                "gap": gap(np.asarray(f.x)),
            }
        )
    return out
