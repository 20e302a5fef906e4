"""What the terminal shows: a live view while a run goes, a summary table at the end.

The view only renders a frozen :class:`~coordinator._snapshot.Snapshot`, whose numbers come
from the same functions as links.csv and summary.json; it computes nothing itself.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from rich.console import Console, Group
from rich.live import Live
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from coordinator._snapshot import Snapshot

__all__ = ["LiveView", "recovery_text", "summary_table"]

_BARS = "▁▂▃▄▅▆▇█"


def _spark(values: list[float], width: int = 40) -> str:
    v = [x for x in values if x is not None and np.isfinite(x) and x > 0]
    if len(v) < 2:
        return ""
    v = np.log10(np.asarray(v[-width:]))
    lo, hi = float(v.min()), float(v.max())
    if hi - lo < 1e-12:
        return _BARS[0] * len(v)
    return "".join(_BARS[int((x - lo) / (hi - lo) * (len(_BARS) - 1))] for x in v)


def _g(v: float | None) -> str:
    return "-" if v is None else f"{v:.3e}"


class LiveView:
    """Call with a :class:`~coordinator._snapshot.Snapshot`; redraws at most ``hz`` times a
    second; :meth:`final` always draws. ``last`` is the last snapshot drawn."""

    def __init__(self, console: Console | None = None, hz: float = 4.0) -> None:
        self.console = console or Console(stderr=True)
        self.period = 1.0 / hz
        self.next = 0.0
        self.gaps: list[float] = []
        self.live: Live | None = None
        self.last: Snapshot | None = None

    def wants_frame(self) -> bool:
        """Whether a snapshot handed now would be drawn (the coordinator builds one only
        then)."""
        return time.monotonic() >= self.next

    def final(self, snap: Snapshot) -> None:
        """The frame taken after the run directory was written: always drawn."""
        self.next = 0.0
        self(snap)

    def __call__(self, snap: Snapshot) -> None:
        now = time.monotonic()
        if now < self.next:
            return
        self.next = now + self.period
        self.last = snap
        if snap.worst_agent_gap is not None:
            self.gaps.append(snap.worst_agent_gap)
        if self.live is None:
            self.live = Live(console=self.console, auto_refresh=False, transient=False)
            self.live.start()
        self.live.update(self.render(snap), refresh=True)

    def close(self) -> None:
        if self.live is not None:
            self.live.stop()
            self.live = None

    def render(self, snap: Snapshot) -> Any:
        head = Text()
        head.append(f"{snap.scenario}", style="bold")
        when = "starting" if snap.t_s is None else f"t = {snap.t_s:.2f} s"
        head.append(f"  {snap.algorithm} · {snap.mode} · {snap.engine} · {snap.n} agents · {when}")
        if snap.average_gap is not None:
            head.append(f"\ngap of the average {_g(snap.average_gap)}", style="bold")
            head.append(
                f" · worst agent {snap.worst_agent}: {_g(snap.worst_agent_gap)}"
                f" · agreement {_g(snap.agreement)}  (tolerance {snap.threshold:.1e})  ",
                style="bold",
            )
            head.append(_spark(self.gaps), style="cyan")
        if snap.verdict is not None:
            head.append(f"\nverdict: {snap.verdict}", style="bold green")
        tab = Table(expand=False, box=None, padding=(0, 1))
        for c in (
            "agent",
            "epoch",
            "state",
            "iteration",
            "own gap",
            "sent",
            "delivered",
            "dropped",
            "lost",
            "rejected",
        ):
            tab.add_column(c, justify="right")
        rows = snap.agents if len(snap.agents) <= 24 else snap.agents[:12] + snap.agents[-12:]
        for r in rows:
            tab.add_row(
                str(r.id),
                str(r.epoch),
                r.state,
                "-" if r.iteration is None else str(r.iteration),
                _g(r.gap),
                str(r.sent),
                str(r.delivered),
                str(r.dropped),
                str(r.lost),
                str(r.rejected),
            )
        parts: list[Any] = [head, tab, self.link_health(snap)]
        if snap.faults_active:
            parts.append(Text("faults active: " + "; ".join(snap.faults_active), style="yellow"))
        return Panel(Group(*parts), title="swarmrig", border_style="blue")

    @staticmethod
    def link_health(snap: Snapshot) -> Text:
        """The links as links.csv counts them: how many carry everything settled so far,
        and the worst ones by share not delivered (dropped, lost or refused)."""
        rows = [r for r in snap.links if r.sent > 0]
        if not rows:
            return Text("links: no traffic yet", style="dim")
        healthy = sum(1 for r in rows if r.not_delivered == 0)
        text = Text(f"links: {healthy}/{len(rows)} clean")
        hurt = sorted(
            (r for r in rows if r.not_delivered > 0),
            key=lambda r: (-r.share_not_delivered, r.src, r.dst),
        )[:4]
        if hurt:
            text.append("   worst: ", style="bold")
            text.append(
                ", ".join(
                    f"{r.src}→{r.dst} {r.share_not_delivered:.0%} not delivered"
                    f" ({r.delivered}/{r.sent})"
                    for r in hurt
                ),
                style="red",
            )
        return text


def _fmt(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, list):
        return "[" + ", ".join(_fmt(x) for x in v[:6]) + (", …]" if len(v) > 6 else "]")
    if isinstance(v, dict):
        return ", ".join(f"{k} {_fmt(x)}" for k, x in v.items())
    return str(v)


def _rank(fig: dict[str, Any]) -> float:
    v = fig.get("worst_agent_gap")
    return float("inf") if v is None else float(v)


def recovery_text(rec: dict[str, Any]) -> str:
    """One fault window's recovery figures in a line (summary.json's ``recovery`` entry)."""
    if "start_iteration" in rec:
        end = rec.get("end_iteration")
        window = f"iterations {_fmt(rec['start_iteration'])}-{'end' if end is None else _fmt(end)}"
    else:
        end = rec.get("end_s")
        window = f"{_fmt(rec.get('start_s'))}-{'end' if end is None else _fmt(end)} s"
    parts = [f"#{rec['fault']} {rec['kind']}, {window}"]
    before, peak = rec.get("before"), rec.get("peak")
    if before is not None:
        parts.append(
            f"before: worst-agent gap {_fmt(before['worst_agent_gap'])},"
            f" agreement {_fmt(before['agreement'])}"
        )
    if peak is not None:
        parts.append(f"peak inside: worst-agent gap {_fmt(peak['worst_agent_gap'])}")
    if rec.get("peak_agreement") is not None:
        parts.append(f"agreement {_fmt(rec['peak_agreement']['agreement'])}")
    after = rec.get("peak_after_end")
    if after is not None and (peak is None or _rank(after) > _rank(peak)):
        parts.append(f"after it: worst-agent gap up to {_fmt(after['worst_agent_gap'])}")
    if rec.get("recovered_after_s") is not None:
        parts.append(f"back within tolerance {_fmt(rec['recovered_after_s'])} s after it")
    else:
        parts.append(f"no recovery: {rec.get('not_recovered')}")
    return "; ".join(parts)


def summary_table(summary: dict[str, Any]) -> Table:
    t = Table(title=f"swarmrig · {summary['scenario']}", show_header=False, box=None)
    t.add_column(style="bold")
    t.add_column()
    fmt = _fmt
    m = summary["messages"]
    for key in (
        "verdict",
        "exit",
        "algorithm",
        "mode",
        "agents",
        "final_gap",
        "worst_agent_gap",
        "worst_agent",
        "median_agent_gap",
        "agents_within_tolerance",
        "tolerance_threshold",
        "final_consensus_error",
        "agreement_relative",
        "time_to_tolerance_s",
        "first_within_tolerance_s",
        "F_star",
        "x_star",
        "x_hat",
        "iterations_per_s",
        "startup_s",
        "wall_s",
    ):
        t.add_row(key, fmt(summary.get(key)))
    t.add_row("messages", ", ".join(f"{k} {v}" for k, v in m.items()))
    for rec in summary.get("recovery", []):
        t.add_row("recovery", recovery_text(rec))
    for key in (
        "intended_priorities",
        "effective_priorities",
        "effective_vs_intended",
        "last_round_priorities",
        "last_round_vs_intended",
        "gap_to_effective",
    ):
        if key in summary:
            t.add_row(key, fmt(summary[key]))
    if "baseline" in summary:
        b = summary["baseline"]
        t.add_row(
            "baseline (no faults)",
            f"{b.get('verdict')}: gap {fmt(b.get('final_gap'))}, worst-agent gap"
            f" {fmt(b.get('worst_agent_gap'))}, consensus {fmt(b.get('final_consensus_error'))},"
            f" time to tolerance {fmt(b.get('time_to_tolerance_s'))}",
        )
    t.add_row("run directory", summary["run_dir"])
    return t
