"""A frozen picture of a run for the screen, computed by the same code as the files.

The live view never reads the coordinator: it is handed a :class:`Snapshot`, built here
from the coordinator's records with the functions that write the run directory
(:func:`coordinator._metrics.link_accounting` for links.csv,
:func:`coordinator._metrics.final_states` and the run's
:class:`coordinator._results.GapFunction` for summary.json). A snapshot taken after the
results are written therefore shows exactly the numbers of links.csv and summary.json.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from coordinator._metrics import MessageTotals, final_states, link_accounting
from coordinator._results import fault_windows, standing, tolerance_threshold

__all__ = ["AgentRow", "LinkRow", "Snapshot", "take_snapshot"]


@dataclass(frozen=True, slots=True, kw_only=True)
class AgentRow:
    """One agent's line of the live view."""

    id: int
    #: its current incarnation
    epoch: int
    #: joining, running, done, dead or restarting
    state: str
    #: latest iteration reported (None before its first sample)
    iteration: int | None
    #: F(x_i) - F* of its latest state (final report if any, else last sample)
    gap: float | None
    #: links.csv sums: messages it sent (all out-links), and over its in-links what it
    #: got (delivered), what faults dropped, what transport lost, what it refused
    sent: int
    delivered: int
    dropped: int
    lost: int
    rejected: int


@dataclass(frozen=True, slots=True, kw_only=True)
class LinkRow:
    """A directed link as links.csv counts it."""

    src: int
    dst: int
    sent: int
    delivered: int
    #: dropped + lost + rejected, of what is no longer in flight
    not_delivered: int
    #: not_delivered / (sent - in_flight); 0 with nothing settled yet
    share_not_delivered: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Snapshot:
    """Everything the live view shows, frozen at one moment."""

    scenario: str
    algorithm: str
    mode: str
    engine: str
    n: int
    #: seconds since go on the coordinator's (or lockstep's virtual) clock, never negative;
    #: None before go
    t_s: float | None
    #: F(x_hat) - F*, the largest F(x_i) - F* and its agent, max |x_i - x_hat|
    average_gap: float | None
    worst_agent_gap: float | None
    worst_agent: int | None
    agreement: float | None
    threshold: float
    agents: tuple[AgentRow, ...]
    links: tuple[LinkRow, ...]
    totals: MessageTotals
    #: one line per fault acting now ("#0 outage, iterations 300-800")
    faults_active: tuple[str, ...]
    #: True for the frame taken after the run directory was written
    final: bool = False
    #: the run's verdict (final frame only)
    verdict: str | None = None


def _state(a: Any) -> str:
    if a.finished:
        return "done"
    if a.restart_pending:
        return "restarting"
    if a.dead:
        return "dead"
    return "running" if a.running else "joining"


def _latest_iteration(a: Any) -> int | None:
    r = a.records[-1] if a.records else None
    if r is None:
        return None
    if r.final is not None:
        return int(r.final["iteration"])
    return int(r.samples[-1][0]) if r.samples else None


def _active_faults(coord: Any, t: float | None, iterations: list[int]) -> tuple[str, ...]:
    """Faults acting at time ``t``: link faults by their scenario window (iterations against
    the median latest iteration), process faults by what the coordinator did to the agents."""
    if t is None:
        return ()
    median = float(np.median(iterations)) if iterations else -1.0
    out = []
    link_windows = {
        w.index: w for w in fault_windows([f for f in coord.s.faults if "agents" not in f], ())
    }
    for f in coord.s.faults:
        idx, kind = int(f["index"]), f["kind"]
        if idx in link_windows:
            w = link_windows[idx]
            now = median if w.unit == "iteration" else t
            end = float("inf") if w.end is None else w.end
            if w.start is not None and w.start <= now < end:
                unit = "iterations" if w.unit == "iteration" else "s"
                until = "the end" if w.end is None else f"{w.end:g}"
                out.append(f"#{idx} {kind}, {unit} {w.start:g}-{until}")
            continue
        agents = [coord.agents[i] for i in f["agents"]]
        if kind == "crash":
            if any(a.crashed_on_purpose for a in agents):
                out.append(f"#{idx} crash of agents {list(f['agents'])}")
            continue
        if f.get("start_iteration") is not None:
            start = float(f["start_iteration"])
            dur = f.get("duration_iterations")
            end = float("inf") if dur is None else start + float(dur)
            now = median
        else:
            start = float(f.get("start_s") or 0.0)
            dur = f.get("duration_s")
            end = float("inf") if dur is None else start + float(dur)
            now = t
        if start <= now < end:
            out.append(f"#{idx} {kind} of agents {list(f['agents'])}")
    return tuple(out)


def take_snapshot(
    coord: Any, *, final: bool = False, summary: Mapping[str, Any] | None = None
) -> Snapshot:
    """Freeze what the coordinator ``coord`` has recorded so far (see the module)."""
    sw = coord.swarm
    records = [r for a in coord.agents for r in a.records]
    link_rows, totals = link_accounting(records, sw.topology.edges())
    finals = final_states(records)
    st = standing({a: np.asarray(f.x) for a, f in finals.items()}, coord.gap)
    own = dict(zip(st.agents, st.agent_gaps, strict=True))
    per: dict[int, dict[str, int]] = {
        a.id: dict.fromkeys(("sent", "delivered", "dropped", "lost", "rejected"), 0)
        for a in coord.agents
    }
    links = []
    for row in link_rows:
        src, dst = int(row["from"]), int(row["to"])
        per[src]["sent"] += row["sent"]
        d = per[dst]
        d["delivered"] += row["delivered"]
        d["dropped"] += row["dropped_injected"]
        d["lost"] += row["lost_transport"]
        d["rejected"] += row["rejected"]
        bad = row["dropped_injected"] + row["lost_transport"] + row["rejected"]
        settled = row["sent"] - row["in_flight"]
        links.append(
            LinkRow(
                src=src,
                dst=dst,
                sent=row["sent"],
                delivered=row["delivered"],
                not_delivered=bad,
                share_not_delivered=bad / settled if settled > 0 else 0.0,
            )
        )
    agents = []
    iterations = []
    for a in coord.agents:
        it = _latest_iteration(a)
        if it is not None and not a.dead:
            iterations.append(it)
        agents.append(
            AgentRow(
                id=a.id,
                epoch=max(a.epoch, 0),
                state=_state(a),
                iteration=it,
                gap=own.get(a.id),
                **per[a.id],
            )
        )
    t = None if coord.t_go is None else max(0.0, float(coord.now_s()))
    return Snapshot(
        scenario=coord.s.name,
        algorithm=str(sw.algorithm["name"]),
        mode=coord.s.mode,
        engine=coord.opt.engine,
        n=coord.n,
        t_s=t,
        average_gap=st.average_gap,
        worst_agent_gap=st.worst_agent_gap,
        worst_agent=st.worst_agent,
        agreement=st.agreement,
        threshold=tolerance_threshold(coord.s.tolerance, sw.reference.F_star),
        agents=tuple(agents),
        links=tuple(links),
        totals=totals,
        faults_active=() if final else _active_faults(coord, t, iterations),
        final=final,
        verdict=None if summary is None else summary.get("verdict"),
    )
