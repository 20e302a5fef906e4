"""What the terminal shows: a live view while a run goes, a summary table at the end.

The view only renders what the coordinator recorded (latest telemetry samples and link
counters); it computes nothing the run directory would not also show.
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

from coordinator._reference import total_objective

__all__ = ["LiveView", "summary_table"]

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


class LiveView:
    """Call with the coordinator at any rate; redraws at most ``hz`` times a second."""

    def __init__(self, console: Console | None = None, hz: float = 4.0) -> None:
        self.console = console or Console(stderr=True)
        self.period = 1.0 / hz
        self.next = 0.0
        self.gaps: list[float] = []
        self.live: Live | None = None

    def __call__(self, coord: Any) -> None:
        now = time.monotonic()
        if now < self.next:
            return
        self.next = now + self.period
        if self.live is None:
            self.live = Live(console=self.console, auto_refresh=False, transient=False)
            self.live.start()
        self.live.update(self.render(coord), refresh=True)

    def close(self) -> None:
        if self.live is not None:
            self.live.stop()
            self.live = None

    def render(self, coord: Any) -> Any:
        sw = coord.swarm
        xs, rows = [], []
        for a in coord.agents:
            r = a.records[-1] if a.records else None
            last = r.samples[-1] if r is not None and r.samples else None
            if last is not None:
                xs.append(np.asarray(last[2], dtype=float))
            recv = deliv = drop = lost = 0
            if r is not None:
                for per in r.links.values():
                    for row in per.values():
                        recv += row[0]
                        deliv += row[1]
                        drop += row[2]
                        lost += row[5]
            status = (
                "done"
                if a.finished
                else "dead"
                if a.dead
                else "running"
                if a.running
                else "joining"
            )
            rows.append(
                (
                    a.id,
                    a.epoch,
                    status,
                    None if last is None else last[0],
                    r.counters.get("sent", 0) if r else 0,
                    deliv,
                    drop,
                    lost,
                )
            )
        gap = None
        if xs:
            x_hat = np.mean(xs, axis=0)
            gap = total_objective(sw.objectives, sw.intended, x_hat) - sw.reference.F_star
            self.gaps.append(gap)
        head = Text()
        head.append(f"{sw.scenario.name}", style="bold")
        head.append(
            f"  {sw.algorithm['name']} · {sw.scenario.mode} · {sw.n} agents · "
            f"t = {coord.now_s():.2f} s"
        )
        if gap is not None:
            thr = sw.scenario.tolerance * max(abs(sw.reference.F_star), 1.0)
            head.append(f"\ngap {gap:.3e}  (tolerance {thr:.1e})  ", style="bold")
            head.append(_spark(self.gaps), style="cyan")
        tab = Table(expand=False, box=None, padding=(0, 1))
        for c in ("agent", "epoch", "state", "iteration", "sent", "delivered", "dropped", "lost"):
            tab.add_column(c, justify="right")
        shown = rows if len(rows) <= 24 else rows[:12] + rows[-12:]
        for row in shown:
            tab.add_row(*("-" if v is None else str(v) for v in row))
        parts: list[Any] = [head, tab, self.link_health(coord)]
        if coord.active_faults:
            kinds = ", ".join(
                f"#{k} {v.get('kind', '?')}" for k, v in sorted(coord.active_faults.items())
            )
            parts.append(Text(f"faults armed/active: {kinds}", style="yellow"))
        return Panel(Group(*parts), title="swarmrig", border_style="blue")

    @staticmethod
    def link_health(coord: Any) -> Text:
        """The links' state from the receivers' latest counters: how many carry, how many
        drop (injected), lose (transport) or refuse, and the worst ones by share not delivered."""
        rows = []
        for a in coord.agents:
            r = a.records[-1] if a.records else None
            if r is None:
                continue
            for src, per in r.links.items():
                # received counts what was dropped or refused; lost never arrived at all
                seen = sum(row[0] + row[5] for row in per.values())
                bad = sum(row[2] + row[3] + row[5] for row in per.values())
                if seen:
                    rows.append((bad / seen, src, a.id, seen, bad))
        if not rows:
            return Text("links: no traffic yet", style="dim")
        healthy = sum(1 for share, *_ in rows if share == 0.0)
        worst = sorted(rows, reverse=True)[:4]
        text = Text(f"links: {healthy}/{len(rows)} clean")
        hurt = [w for w in worst if w[0] > 0]
        if hurt:
            text.append("   worst: ", style="bold")
            text.append(
                ", ".join(f"{s}→{d} {share:.0%} not delivered" for share, s, d, _, _ in hurt),
                style="red",
            )
        return text


def summary_table(summary: dict[str, Any]) -> Table:
    t = Table(title=f"swarmrig · {summary['scenario']}", show_header=False, box=None)
    t.add_column(style="bold")
    t.add_column()

    def fmt(v: Any) -> str:
        if v is None:
            return "-"
        if isinstance(v, float):
            return f"{v:.6g}"
        if isinstance(v, list):
            return "[" + ", ".join(fmt(x) for x in v[:6]) + (", …]" if len(v) > 6 else "]")
        return str(v)

    m = summary["messages"]
    for key in (
        "verdict",
        "exit",
        "algorithm",
        "mode",
        "agents",
        "final_gap",
        "tolerance_threshold",
        "final_consensus_error",
        "time_to_tolerance_s",
        "F_star",
        "x_star",
        "x_hat",
        "iterations_per_s",
        "startup_s",
        "wall_s",
    ):
        t.add_row(key, fmt(summary.get(key)))
    t.add_row("messages", ", ".join(f"{k} {v}" for k, v in m.items()))
    for key in ("intended_priorities", "effective_priorities", "gap_to_effective"):
        if key in summary:
            t.add_row(key, fmt(summary[key]))
    if "baseline" in summary:
        b = summary["baseline"]
        t.add_row(
            "baseline (no faults)",
            f"gap {fmt(b.get('final_gap'))}, consensus {fmt(b.get('final_consensus_error'))},"
            f" time to tolerance {fmt(b.get('time_to_tolerance_s'))}",
        )
    t.add_row("run directory", summary["run_dir"])
    return t
