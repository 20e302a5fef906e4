"""The one home of the run's verdict figures: gap, threshold, verdict, times, recovery.

Every engine (agent processes, lockstep, and whatever else writes a run directory), the
live view and the summary table take these figures from here, so the screen and the files
cannot disagree:

* the gap of a point, F(x) - F* with F the intended-priority sum of the agents' objectives
  (:class:`GapFunction`), for the average x_hat and for every agent's own state;
* the threshold, ``tolerance * max(|F*|, 1)`` (:func:`tolerance_threshold`);
* the verdict (:func:`verdict`): "reached tolerance" only when *every* agent's own gap is
  within the threshold; a run whose average is within it while the agents are apart gets
  "average within tolerance but agents disagree" (with identity curvatures and a doubly
  stochastic mix the average follows x̄ <- x̄ - alpha (x̄ - b̄) whatever the agents do, so the
  average's gap alone says nothing about agreement);
* the times (:func:`tolerance_times`): ``time_to_tolerance_s`` is the first time the
  worst agent's gap is within the threshold *and stays there to the end*; the first touch
  is reported apart;
* the recovery after each fault window (:func:`recovery`), from the metrics rows.

Everything here is pure: numbers in, numbers out.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from coordinator._reference import Reference, reference_optimum, total_objective
from node._objectives import Objective, Quadratic

__all__ = [
    "EXIT_DIVERGED",
    "EXIT_NOT_REACHED",
    "VERDICTS",
    "VERDICT_DISAGREE",
    "VERDICT_DIVERGED",
    "VERDICT_FAILED",
    "VERDICT_INTERRUPTED",
    "VERDICT_NOT_REACHED",
    "VERDICT_REACHED",
    "FaultWindow",
    "GapFunction",
    "Standing",
    "fault_windows",
    "quiet_line",
    "recovery",
    "standing",
    "strict_exit_status",
    "target_spread",
    "tolerance_threshold",
    "tolerance_times",
    "verdict",
    "verdict_figures",
]

VERDICT_REACHED = "reached tolerance"
VERDICT_DISAGREE = "average within tolerance but agents disagree"
VERDICT_NOT_REACHED = "tolerance not reached"
VERDICT_DIVERGED = "diverged"
VERDICT_INTERRUPTED = "interrupted"
VERDICT_FAILED = "failed"
#: every verdict a run can get, best first
VERDICTS = (
    VERDICT_REACHED,
    VERDICT_DISAGREE,
    VERDICT_NOT_REACHED,
    VERDICT_DIVERGED,
    VERDICT_INTERRUPTED,
    VERDICT_FAILED,
)

#: ``--strict-exit`` statuses (README, exit-status table)
EXIT_NOT_REACHED = 4
EXIT_DIVERGED = 5


def tolerance_threshold(tolerance: float, F_star: float) -> float:
    """The gap at or below which a point is within tolerance: tolerance * max(|F*|, 1)."""
    return float(tolerance) * max(abs(float(F_star)), 1.0)


def _within(value: float | None, threshold: float) -> bool:
    # NaN, inf and None are never within tolerance
    return value is not None and math.isfinite(value) and value <= threshold


class GapFunction:
    """F(x) - F*, with F = sum_j w_j f_j and the reference optimum F* for those weights.

    For quadratics f_j = 1/2 (x - t_j)^T Q_j (x - t_j) it is the exact identity
    F(x) - F* = 1/2 (x - x*)^T H (x - x*), H = sum_j w_j Q_j (grad F(x*) = 0), evaluated for
    many points at once and never negative by rounding; other objectives are evaluated as
    the sum and F* subtracted.
    """

    def __init__(
        self, objectives: Sequence[Objective], weights: np.ndarray, reference: Reference
    ) -> None:
        self.objectives = tuple(objectives)
        self.weights = np.asarray(weights, dtype=float)
        self.reference = reference
        self._hessian: np.ndarray | None = None
        if self.objectives and all(isinstance(f, Quadratic) for f in self.objectives):
            self._hessian = sum(
                w * f.curvature
                for w, f in zip(self.weights, self.objectives, strict=True)  # type: ignore[union-attr]
            )

    @classmethod
    def for_swarm(cls, swarm: Any) -> GapFunction:
        """The gap of a built swarm (its objectives, intended priorities and reference)."""
        return cls(swarm.objectives, swarm.intended, swarm.reference)

    def many(self, points: np.ndarray) -> np.ndarray:
        """The gap of every row of ``points`` (m x d)."""
        X = np.atleast_2d(np.asarray(points, dtype=float))
        if self._hessian is not None:
            e = X - self.reference.x_star
            with np.errstate(over="ignore", invalid="ignore"):
                return 0.5 * np.einsum("md,de,me->m", e, self._hessian, e)
        out = np.empty(X.shape[0])
        for k, x in enumerate(X):
            if not np.all(np.isfinite(x)):
                out[k] = math.inf
                continue
            out[k] = total_objective(self.objectives, self.weights, x) - self.reference.F_star
        return out

    def __call__(self, x: np.ndarray) -> float:
        return float(self.many(np.asarray(x, dtype=float)[None, :])[0])


def target_spread(objectives: Sequence[Objective], x_star: np.ndarray) -> float | None:
    """How far apart the agents' own optima lie: max_i |argmin f_i - x*|.

    Quadratics: their targets. Other objectives: each one minimized alone (scipy, as for the
    reference); None when one of them has no minimizer the solver can find. This is the
    disagreement the swarm would show if every agent ignored the others, the yardstick of
    ``agreement_relative``.
    """
    x_star = np.asarray(x_star, dtype=float)
    n = len(objectives)
    own = []
    for i, f in enumerate(objectives):
        if isinstance(f, Quadratic):
            own.append(np.asarray(f.target, dtype=float))
            continue
        one_hot = np.zeros(n)
        one_hot[i] = 1.0
        try:
            own.append(reference_optimum(objectives, one_hot, x0=x_star).x_star)
        except Exception:  # an objective without a proper minimizer: no yardstick
            return None
    if not own:
        return None
    return float(np.max(np.linalg.norm(np.asarray(own) - x_star, axis=1)))


@dataclass(frozen=True, slots=True, kw_only=True)
class Standing:
    """Where the swarm stands at one moment: the average and every agent on its own."""

    #: agent ids, in the order of the arrays below
    agents: tuple[int, ...]
    #: x_hat, the average of the agents' states (None without states)
    x_hat: np.ndarray | None
    #: F(x_hat) - F*
    average_gap: float | None
    #: F(x_i) - F* per agent, in the order of ``agents``
    agent_gaps: tuple[float, ...]
    #: the largest F(x_i) - F*, the median, and the agent with the largest
    worst_agent_gap: float | None
    median_agent_gap: float | None
    worst_agent: int | None
    #: the largest |x_i - x_hat| (final_consensus_error)
    agreement: float | None


def standing(states: Mapping[int, np.ndarray], gap: GapFunction) -> Standing:
    """The standing of ``states`` (agent id -> state); agents without a state are left out."""
    ids = tuple(sorted(states))
    if not ids:
        return Standing(
            agents=(),
            x_hat=None,
            average_gap=None,
            agent_gaps=(),
            worst_agent_gap=None,
            median_agent_gap=None,
            worst_agent=None,
            agreement=None,
        )
    X = np.asarray([np.asarray(states[i], dtype=float) for i in ids])
    x_hat = X.mean(axis=0)
    gaps = gap.many(X)
    # a non-finite gap is the worst of all
    key = np.where(np.isfinite(gaps), gaps, np.inf)
    worst = int(np.argmax(key))
    return Standing(
        agents=ids,
        x_hat=x_hat,
        average_gap=gap(x_hat),
        agent_gaps=tuple(float(g) for g in gaps),
        worst_agent_gap=float(gaps[worst]),
        median_agent_gap=float(np.median(gaps)),
        worst_agent=ids[worst],
        agreement=float(np.max(np.linalg.norm(X - x_hat, axis=1))),
    )


def verdict(
    s: Standing,
    threshold: float,
    *,
    n_agents: int,
    exit_code: int = 0,
    diverged: bool = False,
) -> str:
    """The run's verdict in plain words (one of :data:`VERDICTS`).

    Interrupted (exit 130) and failed (other non-zero exits) runs say so; a run stopped by
    divergence is "diverged". Otherwise "reached tolerance" needs every one of the
    ``n_agents`` agents to have a state whose own gap is within ``threshold``; if only the
    average is within it the agents disagree; else the tolerance was not reached.
    """
    if diverged:
        return VERDICT_DIVERGED
    if exit_code == 130:
        return VERDICT_INTERRUPTED
    if exit_code != 0:
        return VERDICT_FAILED
    if len(s.agents) == n_agents and _within(s.worst_agent_gap, threshold):
        return VERDICT_REACHED
    if _within(s.average_gap, threshold):
        return VERDICT_DISAGREE
    return VERDICT_NOT_REACHED


def tolerance_times(
    rows: Sequence[Mapping[str, Any]], threshold: float, column: str = "worst_agent_gap"
) -> tuple[float | None, float | None]:
    """(settled, first touch) of ``column`` in the metrics rows, in ``t_s``.

    settled: the first time from which the value is within ``threshold`` in every later row
    (None if the last row is not within it); first touch: the first row within it at all.
    """
    first = next((float(r["t_s"]) for r in rows if _within(r[column], threshold)), None)
    settled = None
    for r in reversed(rows):
        if not _within(r[column], threshold):
            break
        settled = float(r["t_s"])
    return settled, first


# -- fault windows and recovery ---------------------------------------------------------
@dataclass(frozen=True, slots=True, kw_only=True)
class FaultWindow:
    """When one fault acted, on the axis its scenario gives (iterations or seconds)."""

    index: int
    kind: str
    #: "iteration" (rows are placed by their median iteration) or "s" (by t_s)
    unit: str
    #: None: the fault never started in this run
    start: float | None
    #: None: until the end of the run
    end: float | None
    #: why the window is as it is, when it is not the scenario's plain window
    note: str | None = None

    def as_dict(self) -> dict[str, Any]:
        if self.unit == "iteration":
            w = {"start_iteration": self.start, "end_iteration": self.end}
        else:
            w = {"start_s": self.start, "end_s": self.end}
        return {"fault": self.index, "kind": self.kind, **w, "note": self.note}


_PROCESS_EVENTS = {"crash": ("crash", "agent-rejoined"), "pause": ("pause", "resume")}


def fault_windows(
    faults: Iterable[Mapping[str, Any]], events: Iterable[Mapping[str, Any]]
) -> list[FaultWindow]:
    """The window of each scenario fault (``Scenario.faults`` entries).

    Link faults: their scenario window, in iterations or seconds. Process faults act on
    processes, so their window comes from events.jsonl, in seconds: a crash from its
    ``crash`` event to the crashed agents' ``agent-rejoined`` (to the end if one never
    rejoins), a pause from ``pause`` to ``resume``, a slowdown from its ``slow`` event to the
    one that sets the factor back to 1.
    """
    events = list(events)
    out = []
    for f in faults:
        idx, kind = int(f["index"]), str(f["kind"])
        if "agents" not in f:  # a link fault
            if f.get("start_iteration") is not None:
                start = float(f["start_iteration"])
                dur = f.get("duration_iterations")
                out.append(
                    FaultWindow(
                        index=idx,
                        kind=kind,
                        unit="iteration",
                        start=start,
                        end=None if dur is None else start + float(dur),
                    )
                )
            else:
                start = float(f.get("start_s") or 0.0)
                dur = f.get("duration_s")
                out.append(
                    FaultWindow(
                        index=idx,
                        kind=kind,
                        unit="s",
                        start=start,
                        end=None if dur is None else start + float(dur),
                    )
                )
            continue
        out.append(_process_window(idx, kind, f, events))
    return out


def _process_window(
    idx: int, kind: str, f: Mapping[str, Any], events: list[Mapping[str, Any]]
) -> FaultWindow:
    mine = [e for e in events if e.get("fault") == idx]
    if kind == "slow":
        starts = [e for e in mine if e["event"] == "slow" and float(e.get("factor", 1.0)) != 1.0]
        ends = [e for e in mine if e["event"] == "slow" and float(e.get("factor", 1.0)) == 1.0]
    else:
        on, off = _PROCESS_EVENTS[kind]
        starts = [e for e in mine if e["event"] == on]
        if kind == "crash":
            # the rejoin events carry no fault index: the crashed agents' first rejoin after it
            t0 = min((float(e["t_s"]) for e in starts), default=math.inf)
            crashed = {int(e["agent"]) for e in starts}
            ends = []
            for a in crashed:
                later = [
                    e
                    for e in events
                    if e["event"] == off and int(e.get("agent", -1)) == a and e["t_s"] >= t0
                ]
                if later:
                    ends.append(later[0])
            if len(ends) < len(crashed):
                ends = []  # one of them never came back
        else:
            ends = [e for e in mine if e["event"] == off]
    if not starts:
        return FaultWindow(
            index=idx, kind=kind, unit="s", start=None, end=None, note="never happened"
        )
    start = min(float(e["t_s"]) for e in starts)
    end = max(float(e["t_s"]) for e in ends) if ends else None
    note = None
    if kind == "crash" and end is None:
        note = "a crashed agent did not rejoin"
    return FaultWindow(index=idx, kind=kind, unit="s", start=start, end=end, note=note)


def _row_key(row: Mapping[str, Any], unit: str) -> float:
    return float(row["iteration_median"] if unit == "iteration" else row["t_s"])


def _figures(row: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "t_s": float(row["t_s"]),
        "iteration": float(row["iteration_median"]),
        "gap": row["gap"],
        "worst_agent_gap": row["worst_agent_gap"],
        "agreement": row["consensus_error"],
    }


def recovery(
    rows: Sequence[Mapping[str, Any]], windows: Sequence[FaultWindow], threshold: float
) -> list[dict[str, Any]]:
    """Per fault window, from the metrics rows (t_s, gap, worst_agent_gap,
    consensus_error, iteration_median):

    * ``before``: the figures of the last row before the window (null if it starts first);
    * ``peak``: the row inside the window with the largest worst-agent gap, and
      ``peak_agreement`` the largest consensus error inside it; ``peak_after_end`` the row
      with the largest worst-agent gap from the end of the window until the recovery (or the
      last row): what a crash leaves behind shows after the agent rejoins;
    * ``recovered_after_s``: from the end of the window to the first row from which the
      worst agent's gap stays within ``threshold`` to the last row (0 if it already was at
      the end of the window); also ``recovered_after_iterations`` for windows in
      iterations. Null with ``not_recovered`` saying why when that never happened.

    A row is inside a window when its key (median iteration, or t_s for windows in seconds)
    is in [start, end). The end of a window in iterations is the t_s of the first row at or
    past the end iteration.
    """
    out = []
    for w in windows:
        rec: dict[str, Any] = {
            **w.as_dict(),
            "before": None,
            "peak": None,
            "peak_agreement": None,
            "peak_after_end": None,
            "end_t_s": None,
            "recovered_after_s": None,
            "recovered_after_iterations": None,
            "recovered_at_s": None,
            "not_recovered": None,
        }
        out.append(rec)
        if w.start is None:
            rec["not_recovered"] = "the fault did not happen in this run"
            continue
        end = math.inf if w.end is None else w.end
        keys = [_row_key(r, w.unit) for r in rows]
        before = [r for r, k in zip(rows, keys, strict=True) if k < w.start]
        inside = [r for r, k in zip(rows, keys, strict=True) if w.start <= k < end]
        if before:
            rec["before"] = _figures(before[-1])
        if inside:
            peak = max(inside, key=lambda r: _rank(r["worst_agent_gap"]))
            rec["peak"] = _figures(peak)
            worst = max(inside, key=lambda r: _rank(r["consensus_error"]))
            rec["peak_agreement"] = {
                "t_s": float(worst["t_s"]),
                "agreement": worst["consensus_error"],
            }
        if w.end is None:
            rec["not_recovered"] = "the fault lasts to the end of the run"
            continue
        after = [i for i, k in enumerate(keys) if k >= w.end]
        if not after:
            rec["not_recovered"] = "the run ended inside the window"
            continue
        first_after = after[0]
        t_end = float(w.end) if w.unit == "s" else float(rows[first_after]["t_s"])
        rec["end_t_s"] = t_end
        settle = len(rows)
        while settle > 0 and _within(rows[settle - 1]["worst_agent_gap"], threshold):
            settle -= 1
        # what the fault left behind: the worst row from its end until recovery (or the end)
        tail = rows[first_after : max(settle, first_after + 1)]
        if tail:
            rec["peak_after_end"] = _figures(max(tail, key=lambda r: _rank(r["worst_agent_gap"])))
        if settle == len(rows):
            rec["not_recovered"] = "not within tolerance at the end of the run"
            continue
        if settle < first_after:
            # within tolerance already when the window ended, and staying
            rec["recovered_at_s"] = t_end
            rec["recovered_after_s"] = 0.0
            if w.unit == "iteration":
                rec["recovered_after_iterations"] = 0.0
            continue
        rec["recovered_at_s"] = float(rows[settle]["t_s"])
        rec["recovered_after_s"] = max(0.0, float(rows[settle]["t_s"]) - t_end)
        if w.unit == "iteration":
            rec["recovered_after_iterations"] = max(
                0.0, float(rows[settle]["iteration_median"]) - float(w.end)
            )
    return out


def _rank(v: Any) -> float:
    """Order for peaks: a non-finite value is the largest."""
    if v is None:
        return -math.inf
    v = float(v)
    return v if math.isfinite(v) else math.inf


# -- the summary's verdict figures --------------------------------------------------------
def verdict_figures(
    *,
    states: Mapping[int, np.ndarray],
    n_agents: int,
    gap: GapFunction,
    tolerance: float,
    rows: Sequence[Mapping[str, Any]],
    windows: Sequence[FaultWindow] = (),
    exit_code: int = 0,
    diverged: bool = False,
    spread: float | None = None,
    end_time: float | None = None,
) -> dict[str, Any]:
    """The summary.json entries about how far the swarm got, in one place.

    ``states``: every agent's final state; ``rows``: the metrics rows. Keys: ``x_hat``,
    ``final_gap`` (the average's), ``final_consensus_error`` and its alias ``agreement``,
    ``agreement_relative`` (to ``target_spread``), ``worst_agent_gap``,
    ``median_agent_gap``, ``worst_agent``, ``agents_within_tolerance``,
    ``tolerance_threshold``, ``time_to_tolerance_s`` (settled), ``first_within_tolerance_s``,
    ``verdict``, ``recovery``. ``end_time`` stands in for the settled time when the final
    states are within tolerance but no metrics row shows it.
    """
    ref = gap.reference
    threshold = tolerance_threshold(tolerance, ref.F_star)
    s = standing(states, gap)
    v = verdict(s, threshold, n_agents=n_agents, exit_code=exit_code, diverged=diverged)
    settled, first = tolerance_times(rows, threshold)
    all_within = len(s.agents) == n_agents and _within(s.worst_agent_gap, threshold)
    if not all_within:
        settled = None  # not within at the end: it did not stay
    elif settled is None:
        settled = end_time
        first = first if first is not None else end_time
    relative = None
    if s.agreement is not None and spread:
        relative = s.agreement / spread
    return {
        "x_hat": None if s.x_hat is None else s.x_hat.tolist(),
        "final_gap": s.average_gap,
        "final_consensus_error": s.agreement,
        "worst_agent_gap": s.worst_agent_gap,
        "median_agent_gap": s.median_agent_gap,
        "worst_agent": s.worst_agent,
        "agents_within_tolerance": sum(1 for g in s.agent_gaps if _within(g, threshold)),
        "agreement": s.agreement,
        "target_spread": spread,
        "agreement_relative": relative,
        "tolerance": tolerance,
        "tolerance_threshold": threshold,
        "time_to_tolerance_s": settled,
        "first_within_tolerance_s": first,
        "verdict": v,
        "recovery": recovery(rows, windows, threshold),
    }


def strict_exit_status(summary: Mapping[str, Any]) -> int:
    """``--strict-exit``: 0 for "reached tolerance", 5 for "diverged", 4 for any other verdict
    of a run that went to its end."""
    v = summary.get("verdict")
    if v == VERDICT_REACHED:
        return 0
    if v == VERDICT_DIVERGED:
        return EXIT_DIVERGED
    return EXIT_NOT_REACHED


def quiet_line(summary: Mapping[str, Any]) -> str:
    """What ``--quiet`` prints: verdict, worst-agent gap against the threshold, run dir."""
    worst = summary.get("worst_agent_gap")
    thr = summary.get("tolerance_threshold")
    w = "-" if worst is None else f"{worst:.3g}"
    who = summary.get("worst_agent")
    t = "" if thr is None else f" (tolerance {thr:.3g})"
    agent = "" if who is None else f" at agent {who}"
    return f"{summary.get('verdict')}: worst-agent gap {w}{agent}{t}  {summary.get('run_dir')}"
