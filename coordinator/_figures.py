"""Figures of studies and runs (matplotlib, PNG and SVG), drawn only from the files.

Every number on a figure comes from the study directory (runs.csv, points.csv,
breakpoint.json, front.csv, front.json, rows/) or the run directory (metrics.csv, links.csv,
summary.json, events.jsonl): nothing is recomputed here that a file does not already say.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["run_figures", "study_figures"]

_BAND = 0.25


def _plt() -> Any:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig: Any, folder: Path, name: str) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for ext in ("png", "svg"):
        p = folder / f"{name}.{ext}"
        tmp = folder / f".{name}.tmp.{ext}"
        fig.savefig(tmp, dpi=110, bbox_inches="tight", format=ext)
        tmp.replace(p)
        out.append(p)
    _plt().close(fig)
    return out


def _positive(values: Any) -> np.ndarray:
    """Values for a log axis: non-positive ones (a gap of exactly 0) drawn at 1e-16."""
    v = np.asarray(values, dtype=float)
    return np.where(v > 0, v, 1e-16)


# --------------------------------------------------------------------------- studies


def study_figures(study_dir: str | Path) -> list[Path]:
    """Every figure of a study directory into <dir>/figures/; returns the PNG paths."""
    from coordinator._study import load_study

    d = Path(study_dir)
    frames = load_study(d)
    kind = frames.meta["study"]["study"]["kind"]
    folder = d / "figures"
    made: list[Path] = []
    if frames.runs is None or frames.runs.empty:
        return made
    records = _records(d)
    if kind in ("grid", "breakpoint"):
        key = _x_key(frames.meta["study"])
        made += _value_vs_gap(frames.points, key, folder)
        made += _success(frames.points, key, frames.meta.get("breakpoint"), folder)
        made += _median_runs(frames, records, key, folder)
    else:
        made += _front(frames, folder)
        made += _median_runs(frames, records, None, folder)
    run = _sample_run(d, frames)
    if run is not None:
        made += _link_matrix(run, folder, title=f"delivered share per link ({run.name})")
    return [p for p in made if p.suffix == ".png"]


def _records(d: Path) -> dict[str, dict[str, Any]]:
    out = {}
    for p in sorted((d / "rows").glob("*.json")):
        rec = json.loads(p.read_text())
        out[rec["id"]] = rec
    return out


def _x_key(resolved: Mapping[str, Any]) -> str:
    if "vary" in resolved:
        return next(iter(resolved["vary"]))
    return resolved["search"]["key"]


def _others(points: Any, key: str) -> list[str]:
    fixed = {"point", key}
    stats = ("runs", "successes", "success_")
    return [
        c
        for c in points.columns
        if c not in fixed and not c.startswith(stats) and not c.endswith(("_q1", "_median", "_q3"))
    ]


def _series_groups(points: Any, key: str) -> list[tuple[str, Any]]:
    """One line per combination of the other varied keys (a grid with several keys)."""
    others = _others(points, key)
    if not others:
        return [("", points.sort_values(key))]
    return [
        (
            ", ".join(
                f"{k} = {v}"
                for k, v in zip(others, vals if isinstance(vals, tuple) else (vals,), strict=True)
            ),
            g.sort_values(key),
        )
        for vals, g in points.groupby(others, sort=True)
    ]


def _value_vs_gap(points: Any, key: str, folder: Path) -> list[Path]:
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.8))
    panels = (
        ("final_gap", "gap of the average F(x̂) − F*", axes[0]),
        ("worst_agent_gap", "worst agent's gap F(x_i) − F*", axes[0]),
        ("final_consensus_error", "consensus error max |x_i − x̂|", axes[1]),
    )
    for label, grp in _series_groups(points, key):
        x = grp[key].to_numpy(float)
        for col, name, ax in panels:
            if f"{col}_median" not in grp or grp[f"{col}_median"].isna().all():
                continue
            line = ax.plot(
                x, _positive(grp[f"{col}_median"]), marker="o", label=f"{name} {label}".strip()
            )
            ax.fill_between(
                x,
                _positive(grp[f"{col}_q1"]),
                _positive(grp[f"{col}_q3"]),
                color=line[0].get_color(),
                alpha=_BAND,
                linewidth=0,
            )
    for ax, ylabel in (
        (axes[0], "gap (median, quartile band over seeds)"),
        (axes[1], "consensus error"),
    ):
        ax.set_xlabel(key)
        ax.set_ylabel(ylabel)
        ax.set_yscale("log")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7)
    fig.suptitle("final gap and consensus error against the varied value")
    return _save(fig, folder, "value-vs-gap")


def _success(points: Any, key: str, bp: Mapping[str, Any] | None, folder: Path) -> list[Path]:
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6.5, 3.8))
    for label, grp in _series_groups(points, key):
        x = grp[key].to_numpy(float)
        r = grp["success_rate"].to_numpy(float)
        lo = grp["success_low"].to_numpy(float)
        hi = grp["success_high"].to_numpy(float)
        err = np.clip(np.vstack([r - lo, hi - r]), 0.0, None)  # rounding of a 0 or 1 rate
        ax.errorbar(
            x, r, yerr=err, marker="o", capsize=3, label=label or "success rate (95% Wilson)"
        )
    if bp is not None:
        ax.axhline(bp["level"], color="grey", linestyle=":", linewidth=1)
        if bp.get("estimate") is not None:
            lo, hi = bp["interval"]
            lo = bp["low"] if lo is None else lo
            hi = bp["high"] if hi is None else hi
            ax.axvspan(lo, hi, color="tab:red", alpha=0.15, label="95% interval of the break point")
            ax.axvline(bp["estimate"], color="tab:red", label=f"break point {bp['estimate']:.4g}")
        else:
            ax.set_title("no crossing inside the bounds", fontsize=9)
    ax.set_ylim(-0.05, 1.05)
    ax.set_xlabel(key)
    ax.set_ylabel("success rate over seeds")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7)
    fig.suptitle("success rate against the varied value")
    return _save(fig, folder, "success-rate")


def _median_run_ids(runs: Any) -> list[tuple[Any, str]]:
    """The run with the median final gap of each point (the lower median for even counts)."""
    out = []
    for point, grp in runs.groupby("point", sort=True):
        g = grp.assign(_g=grp["final_gap"].astype(float).fillna(np.inf)).sort_values("_g")
        out.append((point, g["run_id"].iloc[(len(g) - 1) // 2]))
    return out


def _median_runs(
    frames: Any, records: Mapping[str, Any], key: str | None, folder: Path
) -> list[Path]:
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.8), sharex=True)
    runs = frames.runs
    chosen = _median_run_ids(runs)
    cmap = plt.get_cmap("viridis")
    windows_drawn = False
    for i, (point, rid) in enumerate(chosen):
        rec = records.get(rid)
        if not rec or not rec.get("series") or not rec["series"]["t_s"]:
            continue
        s = rec["series"]
        row = runs[runs["run_id"] == rid].iloc[0]
        label = f"{key} = {row[key]}" if key else f"point {point}"
        color = cmap(i / max(1, len(chosen) - 1))
        gap = s.get("worst_agent_gap") or s["gap"]
        axes[0].plot(
            s["t_s"], _positive([np.nan if v is None else v for v in gap]), color=color, label=label
        )
        axes[1].plot(
            s["t_s"],
            _positive([np.nan if v is None else v for v in s["consensus_error"]]),
            color=color,
            label=label,
        )
        if not windows_drawn:
            for w in rec.get("windows", []):
                if w["start_s"] is None:
                    continue
                end = w["end_s"] if w["end_s"] is not None else s["t_s"][-1]
                for ax in axes:
                    ax.axvspan(w["start_s"], end, color="tab:orange", alpha=0.12)
                axes[0].text(
                    w["start_s"],
                    1.0,
                    w["label"],
                    transform=axes[0].get_xaxis_transform(),
                    fontsize=7,
                    va="bottom",
                )
            windows_drawn = True
    axes[0].set_ylabel(
        "worst agent's gap"
        if any(r.get("series", {}).get("worst_agent_gap") for r in records.values())
        else "gap"
    )
    axes[1].set_ylabel("consensus error")
    for ax in axes:
        ax.set_yscale("log")
        ax.set_xlabel("t (s, the run's clock)")
        ax.grid(True, alpha=0.3)
    if len(chosen) <= 12:
        axes[1].legend(fontsize=7)
    fig.suptitle("median run of each point (fault windows shaded)")
    return _save(fig, folder, "median-runs")


def _front(frames: Any, folder: Path) -> list[Path]:
    plt = _plt()
    front = frames.front
    if front is None or front.empty:
        return []
    m = sum(1 for c in front.columns if c.startswith("reference_f"))
    seed = front["seed"].iloc[0]
    f = front[front["seed"] == seed]
    fig = plt.figure(figsize=(6, 5))
    if m == 2:
        ax = fig.add_subplot()
    elif m == 3:
        ax = fig.add_subplot(projection="3d")
    else:
        plt.close(fig)
        return []
    ref = f[f["faults"]][[f"reference_f{g}" for g in range(m)]].to_numpy(float)
    order = np.argsort(ref[:, 0])
    if m == 2:
        ax.plot(ref[order, 0], ref[order, 1], "k-", linewidth=1, alpha=0.6)
    ax.scatter(
        *ref.T, color="black", marker="s", s=28, label="reference front (centralized optima)"
    )
    for faults, marker, color, name in (
        (True, "o", "tab:red", "reached, with faults"),
        (False, "^", "tab:blue", "reached, without faults"),
    ):
        sub = f[f["faults"] == faults]
        if sub.empty:
            continue
        pts = sub[[f"reached_f{g}" for g in range(m)]].to_numpy(float)
        if not faults or f["faults"].all():
            name = name if f["faults"].nunique() > 1 else "reached (average state)"
        ax.scatter(*pts.T, color=color, marker=marker, s=26, alpha=0.8, label=name)
    labels = [f"group {g} objective" for g in range(m)]
    ax.set_xlabel(labels[0])
    ax.set_ylabel(labels[1])
    if m == 3:
        ax.set_zlabel(labels[2])
    ax.legend(fontsize=7)
    fig.suptitle(f"priority front, {m} groups (seed {seed})")
    return _save(fig, folder, "front")


def _sample_run(d: Path, frames: Any) -> Path | None:
    """A kept run directory to show the link matrix for: the median run of the last point."""
    runs = frames.runs
    for _point, rid in reversed(_median_run_ids(runs)):
        p = d / "runs" / rid
        if (p / "links.csv").exists():
            return p
    for p in sorted((d / "runs").glob("p*")):
        if (p / "links.csv").exists():
            return p
    return None


# --------------------------------------------------------------------------- one run


def _link_matrix(run_dir: Path, folder: Path, title: str) -> list[Path]:
    """Delivered share per directed link (rows: sender, columns: receiver), from links.csv."""
    plt = _plt()
    with (run_dir / "links.csv").open() as f:
        rows = list(csv.DictReader(f))
    if not rows:
        return []
    n = 1 + max(max(int(r["from"]), int(r["to"])) for r in rows)
    share = np.full((n, n), np.nan)
    for r in rows:
        sent = float(r["sent"] or 0)
        if sent > 0:
            share[int(r["from"]), int(r["to"])] = float(r["delivered"] or 0) / sent
    fig, ax = plt.subplots(figsize=(4.8 + 0.05 * n, 4.2 + 0.05 * n))
    im = ax.imshow(share, vmin=0.0, vmax=1.0, cmap="RdYlGn")
    fig.colorbar(im, ax=ax, label="delivered / sent")
    ax.set_xlabel("receiving agent")
    ax.set_ylabel("sending agent")
    if n <= 24:
        ax.set_xticks(range(n))
        ax.set_yticks(range(n))
        for (i, j), v in np.ndenumerate(share):
            if not math.isnan(v) and n <= 12:
                ax.text(j, i, f"{v:.2f}", ha="center", va="center", fontsize=6)
    ax.set_title(title, fontsize=9)
    return _save(fig, folder, "link-delivered-share")


def run_figures(run_dir: str | Path) -> list[Path]:
    """Figures of one run directory into <run>/figures/: gap and consensus error against
    time with fault windows shaded, and the per-link delivered-share matrix."""
    plt = _plt()
    d = Path(run_dir)
    folder = d / "figures"
    made: list[Path] = []
    with (d / "metrics.csv").open() as f:
        metrics = list(csv.DictReader(f))
    if metrics:
        from coordinator._scenario import load_scenario
        from coordinator._study_runs import fault_windows

        scenario = load_scenario(d / "scenario.toml")
        windows = fault_windows(scenario, metrics, d)
        t = np.array([float(m["t_s"]) for m in metrics])
        fig, axes = plt.subplots(1, 2, figsize=(10, 3.8), sharex=True)
        cols = [("gap", "gap of the average"), ("worst_agent_gap", "worst agent's gap")]
        for col, name in cols:
            if col in metrics[0]:
                axes[0].plot(t, _positive([_f(m[col]) for m in metrics]), label=name)
        axes[1].plot(
            t, _positive([_f(m["consensus_error"]) for m in metrics]), label="consensus error"
        )
        for w in windows:
            if w["start_s"] is None:
                continue
            end = w["end_s"] if w["end_s"] is not None else float(t[-1])
            for ax in axes:
                ax.axvspan(w["start_s"], end, color="tab:orange", alpha=0.12)
            axes[0].text(
                w["start_s"],
                1.0,
                w["label"],
                transform=axes[0].get_xaxis_transform(),
                fontsize=7,
                va="bottom",
            )
        for ax in axes:
            ax.set_yscale("log")
            ax.set_xlabel("t (s)")
            ax.grid(True, alpha=0.3)
            ax.legend(fontsize=7)
        fig.suptitle("gap and consensus error against time (fault windows shaded)")
        made += _save(fig, folder, "gap-vs-time")
    if (d / "links.csv").exists():
        made += _link_matrix(d, folder, "delivered share per link")
    return [p for p in made if p.suffix == ".png"]


def _f(v: str) -> float:
    try:
        return float(v)
    except ValueError:
        return float("nan")
