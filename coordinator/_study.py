"""Studies: many runs of one base scenario, a study directory, resumable.

``run_study(path)`` loads the study file (coordinator._study_spec), plans its runs (a grid,
an adaptive break-point search, or a priority front), runs the ones not yet on disk in a
pool (coordinator._study_runs), and writes the study directory::

    <out>/study.toml       the resolved study (every default filled, the base scenario in it)
    <out>/study.json       its fingerprint: a changed study file is refused, never mixed
    <out>/rows/<id>.json   one record per finished run, written atomically
    <out>/runs/<id>/       run directories (all, or the first --keep-runs seeds of a point)
    <out>/runs.csv         one row per run: varied values, seed, engine, summary scalars
    <out>/points.csv       one row per point: success rate (Wilson), quartiles
    <out>/breakpoint.json  break-point searches;  front.csv, front.json  fronts
    <out>/figures/, report.html
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import sys
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from coordinator._study_runs import (
    agents_per_run,
    concurrency,
    flatten_scalars,
    start_pool,
    unpack,
)
from coordinator._study_spec import StudySpec, load_study_spec, scenario_doc
from coordinator._study_stats import (
    das_dennis,
    das_dennis_count,
    dominated,
    hypervolume,
    logistic_crossing,
    wilson,
)
from topologies._errors import ScenarioError

__all__ = ["StudyChanged", "StudyFrames", "StudyOptions", "load_study", "run_study"]

#: seeds of one point stacked in one batch-engine run: at least this many (when the point
#: has them), else the point's seeds shared evenly among the workers, at most STACK_MAX
STACK_MIN = 8
STACK_MAX = 64
#: quantities whose median and quartiles points.csv reports (runs.csv column names)
POINT_STATS = ("final_gap", "worst_agent_gap", "final_consensus_error", "time_to_tolerance_s")


class StudyChanged(ScenarioError):
    """The study directory was made by a different study file."""


@dataclass(slots=True)
class StudyOptions:
    out: Path | None = None
    workers: int = os.cpu_count() or 1
    #: keep the run directories of the first this many seeds of each point (None: all)
    keep_runs: int | None = None
    engine: str | None = None
    cluster: str | None = None
    #: called as (done, total, failed, seconds_left or None) after every finished run
    progress: Callable[[int, int, int, float | None], None] | None = None
    figures: bool = True


@dataclass(slots=True)
class _Job:
    id: str
    point: int
    values: dict[str, Any]
    seed: int
    weights: tuple[float, ...] | None = None
    faults: bool = True

    def label(self) -> dict[str, Any]:
        return {"run_id": self.id, "point": self.point, **self.values, "seed": self.seed}


class _Runner:
    """Runs jobs not yet on disk; writes each record as it arrives."""

    def __init__(self, spec: StudySpec, out: Path, opts: StudyOptions) -> None:
        self.spec, self.out, self.opts = spec, out, opts
        self.rows_dir = out / "rows"
        self.runs_dir = out / "runs"
        self.rows_dir.mkdir(parents=True, exist_ok=True)
        self.runs_dir.mkdir(exist_ok=True)
        for stale in self.runs_dir.glob(".tmp-*"):  # runs cut short by an interruption
            shutil.rmtree(stale, ignore_errors=True)
        self.engine = opts.engine or spec.engine
        self.pool: Any = None
        self.records: dict[str, dict[str, Any]] = {}
        self.done_before = 0
        self.computed = 0
        self.failed = 0
        self.total = 0
        self.t0 = time.monotonic()
        #: every job handed to run() so far, in the study's order (for runs.csv)
        self.order: list[_Job] = []
        self._last_table = 0.0

    def record(self, job_id: str) -> dict[str, Any] | None:
        if job_id in self.records:
            return self.records[job_id]
        path = self.rows_dir / f"{job_id}.json"
        if path.exists():
            self.records[job_id] = json.loads(path.read_text())
            return self.records[job_id]
        return None

    def run(self, jobs: list[_Job], seeds_of_point: Callable[[_Job], int] | None = None) -> None:
        """Run every job of ``jobs`` that has no record yet; returns when all have one."""
        todo = [j for j in jobs if self.record(j.id) is None]
        self.order += jobs
        self.total += len(jobs)
        self.done_before += len(jobs) - len(todo)
        self._report()
        if not todo:
            return
        if self.pool is None:
            self.pool = start_pool(self.opts.workers, self.opts.cluster)
        docs = {j.id: self._job_dict(j) for j in todo}
        engine_guess = self.engine if self.engine != "auto" else "lockstep"
        limit = concurrency(
            engine_guess, agents_per_run(next(iter(docs.values()))), self.pool.workers
        )
        pending: dict[Any, list[_Job]] = {}
        queue = self._chunks(todo, docs)
        while queue or pending:
            while queue and len(pending) < limit:
                chunk = queue.pop(0)
                pending[self.pool.submit([docs[j.id] for j in chunk])] = chunk
            for fut in self.pool.wait_any(pending, timeout=0.5):
                self._finish(pending.pop(fut), fut)

    def _chunks(self, todo: list[_Job], docs: Mapping[str, Any]) -> list[list[_Job]]:
        """The jobs in the pieces handed to a worker: the seeds of one point together where
        the batch engine runs the point (stacked in one array loop, see
        _study_runs.run_jobs), else one job a piece."""
        groups: dict[tuple[Any, ...], list[_Job]] = {}
        for j in todo:
            groups.setdefault((j.point, j.weights, j.faults), []).append(j)
        workers = max(1, self.pool.workers)
        out: list[list[_Job]] = []
        for members in groups.values():
            if len(members) == 1 or not self._batch_point(docs[members[0].id]):
                out += [[j] for j in members]
                continue
            size = min(STACK_MAX, max(math.ceil(len(members) / workers), STACK_MIN))
            out += [members[i : i + size] for i in range(0, len(members), size)]
        return out

    def _batch_point(self, doc: Mapping[str, Any]) -> bool:
        """Whether the batch engine runs this point (checked on its first seed)."""
        if self.engine not in ("auto", "batch"):
            return False
        from coordinator._scenario import load_scenario
        from coordinator._study_runs import pick_engine
        from coordinator._swarm import build_swarm

        try:
            sw = build_swarm(
                load_scenario(
                    doc["scenario"], source=self.spec.source, base_dir=doc["scenario_dir"]
                )
            )
            return pick_engine(sw, self.engine) == "batch"
        except ScenarioError:
            return False  # the worker reports it, run by run

    def _job_dict(self, j: _Job) -> dict[str, Any]:
        # a front's values are its weights (w0, w1, ...), handed over as weights, not keys
        doc = scenario_doc(self.spec, {} if j.weights is not None else j.values, j.seed)
        if not j.faults:
            doc.pop("fault", None)
        keep = self.opts.keep_runs is None or self._seed_rank(j) < self.opts.keep_runs
        return {
            "id": j.id,
            "scenario": doc,
            "scenario_dir": str(self.spec.scenario_dir),
            "engine": self.engine,
            "dest": str(self.runs_dir),
            "keep": keep,
            "groups": self.spec.front.get("groups"),
            "weights": None if j.weights is None else list(j.weights),
        }

    def _seed_rank(self, j: _Job) -> int:
        seeds = list(self.spec.seeds)
        return seeds.index(j.seed) if j.seed in seeds else len(seeds) + j.seed

    def _finish(self, chunk: list[_Job], fut: Any) -> None:
        try:
            recs = fut.result()
        except Exception as exc:  # the runs could not be made: recorded, not retried
            recs = [
                {
                    "id": j.id,
                    "engine": None,
                    "exit_code": None,
                    "summary": {"verdict": "failed", "exit": f"{type(exc).__name__}: {exc}"},
                    "error": f"{type(exc).__name__}: {exc}",
                }
                for j in chunk
            ]
        if any(rec.get("exit_code") == 130 for rec in recs):
            raise KeyboardInterrupt  # a run was interrupted: it is not finished
        for j, rec in zip(chunk, recs, strict=True):
            packed = rec.pop("packed", None)
            if packed is not None:
                unpack(packed, self.runs_dir / j.id)
            rec["job"] = j.label() | {"weights": j.weights, "faults": j.faults}
            rec["success"] = self.spec.is_success({**rec["summary"], "exit_code": rec["exit_code"]})
            self.failed += rec.get("error") is not None or rec["summary"].get("verdict") == "failed"
            tmp = self.rows_dir / f".{j.id}.json.tmp"
            tmp.write_text(json.dumps(rec, default=str))
            os.replace(tmp, self.rows_dir / f"{j.id}.json")
            self.records[j.id] = rec
            self.computed += 1
        self._report()
        self._progress_table()

    def _progress_table(self, force: bool = False) -> None:
        """runs.csv of the runs finished so far, in the study's order (at most once a
        second while running; the closing write_tables writes the final one)."""
        now = time.monotonic()
        if not force and now - self._last_table < 1.0:
            return
        self._last_table = now
        write_runs_csv(self.spec, self.out, [(j, self.records.get(j.id)) for j in self.order])

    def _report(self) -> None:
        if self.opts.progress is None:
            return
        done = self.done_before + self.computed
        left = None
        if self.computed:
            per = (time.monotonic() - self.t0) / self.computed
            left = per * max(0, self.total - done)
        self.opts.progress(done, self.total, self.failed, left)

    def close(self, abort: bool = False) -> None:
        if self.pool is not None:
            self.pool.close(abort=abort)
            self.pool = None


def _job_id(point: int, values: Mapping[str, Any], seed: int, weights: Any, faults: bool) -> str:
    key = json.dumps([sorted(values.items()), seed, weights, faults], default=str)
    return f"p{point:03d}-s{seed}-{hashlib.sha1(key.encode()).hexdigest()[:8]}"


# --------------------------------------------------------------------------- the study dir


def _prepare_dir(spec: StudySpec, out: Path) -> None:
    import tomli_w

    meta = out / "study.json"
    if meta.exists():
        old = json.loads(meta.read_text())
        if old.get("fingerprint") != spec.fingerprint():
            new = spec.resolved()
            changed = sorted(
                k
                for k in set(old.get("resolved", {})) | set(new)
                if json.dumps(old.get("resolved", {}).get(k), sort_keys=True, default=str)
                != json.dumps(new.get(k), sort_keys=True, default=str)
            )
            raise StudyChanged(
                f"{spec.source}: the study directory {out} holds the results of a different"
                f" study file (changed: {', '.join('[' + c + ']' for c in changed) or 'details'});"
                " results of two study files are never mixed: give another --out, or delete"
                f" {out} to start over"
            )
        return
    out.mkdir(parents=True, exist_ok=True)
    (out / "study.toml").write_text(
        f"# swarmrig resolved study (from {spec.source}); every default filled.\n"
        + tomli_w.dumps(_toml_safe(spec.resolved()))
    )
    tmp = out / ".study.json.tmp"
    tmp.write_text(
        json.dumps(
            {"fingerprint": spec.fingerprint(), "source": spec.source, "resolved": spec.resolved()},
            indent=1,
            default=str,
        )
    )
    os.replace(tmp, meta)


def _toml_safe(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _toml_safe(v) for k, v in obj.items() if v is not None}
    if isinstance(obj, list | tuple):
        return [_toml_safe(v) for v in obj]
    return obj


def run_study(path: str | Path, options: StudyOptions | None = None) -> Path:
    """Run (or resume) the study in ``path``; returns the study directory.

    Raises ScenarioError for a bad study file, StudyChanged when the directory belongs to
    another study, KeyboardInterrupt (after closing the pool) when interrupted.
    """
    opts = options or StudyOptions()
    spec = load_study_spec(path)
    out = Path(opts.out) if opts.out else Path("studies") / spec.name
    _prepare_dir(spec, out)
    runner = _Runner(spec, out, opts)
    try:
        if spec.kind == "grid":
            jobs = _grid_jobs(spec)
            runner.run(jobs)
            order = jobs
        elif spec.kind == "breakpoint":
            order = _search(spec, runner, out)
        else:
            order = _front_jobs(spec)
            runner.run(order)
    except BaseException:
        runner.close(abort=True)
        raise
    runner.close()
    write_tables(spec, out, [(j, runner.record(j.id)) for j in order])
    if opts.figures:
        from coordinator._figures import study_figures
        from coordinator._report import write_report

        study_figures(out)
        write_report(out)
    return out


# --------------------------------------------------------------------------- kinds


def _grid_jobs(spec: StudySpec) -> list[_Job]:
    import itertools

    keys = list(spec.vary)
    jobs = []
    for point, combo in enumerate(itertools.product(*(spec.vary[k] for k in keys))):
        values = dict(zip(keys, combo, strict=True))
        for seed in spec.seeds:
            jobs.append(_Job(_job_id(point, values, seed, None, True), point, values, seed))
    return jobs


def _search(spec: StudySpec, runner: _Runner, out: Path) -> list[_Job]:
    """Bisection on the estimated success rate, with more seeds where the Wilson interval
    still contains the level; then a logistic fit over every point tried."""
    s = spec.search
    key, level = s["key"], s["level"]
    order: list[_Job] = []
    tried: dict[float, list[_Job]] = {}
    extra = iter(range(max(spec.seeds) + 1, 2**62))
    more_seeds: list[int] = []

    def seeds_for(count: int) -> list[int]:
        while len(spec.seeds) + len(more_seeds) < count:
            more_seeds.append(next(extra))
        return [*spec.seeds, *more_seeds][:count]

    point_of: dict[float, int] = {}

    def jobs_at(values: list[float], count: int) -> list[_Job]:
        jobs = []
        for v in values:
            point = point_of.setdefault(v, len(point_of))
            for seed in seeds_for(count):
                jid = _job_id(0, {key: v}, seed, None, True)
                if any(j.id == jid for j in tried.get(v, [])):
                    continue
                jobs.append(_Job(jid, point, {key: v}, seed))
        return jobs

    def rate(v: float) -> tuple[int, int]:
        recs = [runner.record(j.id) for j in tried[v]]
        return sum(1 for r in recs if r and r["success"]), len(recs)

    def evaluate(values: list[float]) -> None:
        count = len(spec.seeds)
        pending = list(values)
        while pending:
            jobs = jobs_at(pending, count)
            for j in jobs:
                tried.setdefault(j.values[key], []).append(j)
            order.extend(jobs)
            runner.run(jobs)
            count += len(spec.seeds)
            unsure = []
            for v in pending:
                k, n = rate(v)
                lo, hi = wilson(k, n)
                if lo <= level <= hi and n + len(spec.seeds) <= s["max_seeds"]:
                    unsure.append(v)
            pending = unsure

    def above(v: float) -> bool:
        k, n = rate(v)
        return k / n > level

    a, b = s["low"], s["high"]
    evaluate([a, b])
    inside = above(a) != above(b)
    while inside and b - a > s["resolution"] and len(tried) < s["max_points"]:
        m = float(f"{(a + b) / 2:.12g}")
        if m in (a, b):
            break
        evaluate([m])
        if above(m) == above(a):
            a = m
        else:
            b = m
    xs = sorted(tried)
    counts = [rate(v) for v in xs]
    result: dict[str, Any] = {
        "key": key,
        "level": level,
        "criterion": list(spec.success),
        "low": s["low"],
        "high": s["high"],
        "inside": inside,
        "points": [
            {
                "value": v,
                "runs": n,
                "successes": k,
                "success_rate": k / n,
                "wilson_low": wilson(k, n)[0],
                "wilson_high": wilson(k, n)[1],
            }
            for v, (k, n) in zip(xs, counts, strict=True)
        ],
    }
    if inside:
        fit = logistic_crossing(xs, [k for k, _ in counts], [n for _, n in counts], level)
        lo, hi = fit["low"], fit["high"]
        # the crossing lies between the last two bracketing points whatever the fit says
        result.update(
            estimate=fit["estimate"],
            interval=[lo, hi],
            confidence=0.95,
            method=fit["method"],
            slope=fit["slope"],
            bracket=[a, b],
            statement=(
                f"success rate crosses {level:g} at {key} = {fit['estimate']:.6g}"
                f" (95% interval {_fmt(lo)} to {_fmt(hi)}; {fit['method']})"
            ),
        )
        if fit["method"] == "bracket":
            result["note"] = (
                "the outcomes separate perfectly (every point on one side succeeds, every"
                " point on the other fails), so a logistic fit has no finite slope: the"
                " interval is the bracket between the two neighbouring points tried"
            )
    else:
        side = "above" if above(a) else "at or below"
        result.update(
            estimate=None,
            interval=None,
            method=None,
            statement=(
                f"the success rate does not cross {level:g} between {key} = {s['low']:g} and"
                f" {s['high']:g}: it is {side} {level:g} at both bounds"
            ),
        )
    (out / ".breakpoint.json.tmp").write_text(json.dumps(result, indent=1))
    os.replace(out / ".breakpoint.json.tmp", out / "breakpoint.json")
    return order


def _fmt(v: float | None) -> str:
    return "unbounded" if v is None else f"{v:.6g}"


def _front_jobs(spec: StudySpec) -> list[_Job]:
    groups = spec.front["groups"]
    lattice = das_dennis(spec.front["divisions"], len(groups))
    assert len(lattice) == das_dennis_count(spec.front["divisions"], len(groups))
    has_faults = bool(spec.base.get("fault"))
    flags = [True] + ([False] if spec.front["without_faults"] and has_faults else [])
    jobs = []
    point = 0
    for faults in flags:
        for w in lattice:
            values = {f"w{g}": w[g] for g in range(len(groups))}
            for seed in spec.seeds:
                jid = _job_id(point, values, seed, list(w), faults)
                jobs.append(_Job(jid, point, values, seed, weights=tuple(w), faults=faults))
            point += 1
    return jobs


# --------------------------------------------------------------------------- tables


def write_runs_csv(spec: StudySpec, out: Path, jobs: list[tuple[_Job, Any]]) -> Any:
    """runs.csv from the records (jobs without one are left out); returns the frame."""
    import pandas as pd

    rows = []
    for j, rec in jobs:
        if rec is None:
            continue
        row: dict[str, Any] = {"run_id": j.id, "point": j.point, **j.values, "seed": j.seed}
        if spec.kind == "front":
            row["faults"] = j.faults
        row["engine"] = rec.get("engine")
        row["success"] = rec.get("success")
        row["run_exit_code"] = rec.get("exit_code")
        row["kept_run_dir"] = rec.get("run_dir")
        row.update(
            {
                k: v
                for k, v in flatten_scalars(rec["summary"]).items()
                if k not in row and k != "run_dir"
            }
        )
        rows.append(row)
    runs = pd.DataFrame(rows)
    _write_csv(runs, out / "runs.csv")
    return runs


def write_tables(spec: StudySpec, out: Path, jobs: list[tuple[_Job, Any]]) -> None:
    """runs.csv, points.csv and (fronts) front.csv and front.json from the records."""
    import pandas as pd

    runs = write_runs_csv(spec, out, jobs)
    if runs.empty:
        return
    varied = [k for k in (spec.vary or {})] or ([spec.search["key"]] if spec.search else [])
    if spec.kind == "front":
        varied = [f"w{g}" for g in range(len(spec.front["groups"]))] + ["faults"]
    points = []
    for point, grp in runs.groupby("point", sort=True):
        k, n = int(grp["success"].sum()), len(grp)
        lo, hi = wilson(k, n)
        p: dict[str, Any] = {"point": point, **{v: grp[v].iloc[0] for v in varied}}
        p.update(runs=n, successes=k, success_rate=k / n, success_low=lo, success_high=hi)
        for col in POINT_STATS:
            vals = pd.to_numeric(grp.get(col, pd.Series(dtype=float)), errors="coerce").dropna()
            for name, q in (("q1", 0.25), ("median", 0.5), ("q3", 0.75)):
                p[f"{col}_{name}"] = float(vals.quantile(q)) if len(vals) else None
        points.append(p)
    points_df = pd.DataFrame(points)
    if spec.kind == "breakpoint":
        points_df = points_df.sort_values(spec.search["key"]).reset_index(drop=True)
    _write_csv(points_df, out / "points.csv")
    if spec.kind == "front":
        _front_tables(spec, out, jobs)


def _front_tables(spec: StudySpec, out: Path, jobs: list[tuple[_Job, Any]]) -> None:
    import pandas as pd

    m = len(spec.front["groups"])
    rows = []
    for j, rec in jobs:
        fr = (rec or {}).get("front")
        if not fr:
            continue
        row: dict[str, Any] = {"run_id": j.id, "point": j.point, "seed": j.seed, "faults": j.faults}
        row.update({f"w{g}": j.weights[g] for g in range(m)})
        row["applied_as"] = fr["applied_as"]
        for g in range(m):
            row[f"reference_f{g}"] = fr["reference"][g]
            row[f"reached_f{g}"] = None if fr["average"] is None else fr["average"][g]
            row[f"worst_agent_f{g}"] = None if fr["worst"] is None else fr["worst"][g]
        row["distance"] = fr["distance"]
        row["x_star"] = json.dumps(fr["x_star"])
        rows.append(row)
    front = pd.DataFrame(rows)
    summary: dict[str, Any] = {
        "groups": spec.front["groups"],
        "divisions": spec.front["divisions"],
        "lattice_points": das_dennis_count(spec.front["divisions"], m),
        "lattice_formula": "C(H + M - 1, M - 1) (Das and Dennis 1998)",
        "fronts": [],
    }
    dom = []
    for (seed, faults), grp in front.groupby(["seed", "faults"], sort=True):
        ref_pts = grp[[f"reference_f{g}" for g in range(m)]].to_numpy(float)
        reached = grp[[f"reached_f{g}" for g in range(m)]].to_numpy(float)
        ok = np.all(np.isfinite(reached), axis=1)
        for idx, r in zip(grp.index, reached, strict=True):
            dom.append((idx, bool(np.all(np.isfinite(r)) and dominated(r, ref_pts, eps=1e-9))))
        refpoint = spec.front["reference_point"]
        how = "given in [front].reference_point"
        if refpoint is None:
            # one point for every front of the seed (with and without faults), so their
            # hypervolumes compare
            every = front[front["seed"] == seed]
            pts = every[[f"reference_f{g}" for g in range(m)]].to_numpy(float)
            got = every[[f"reached_f{g}" for g in range(m)]].to_numpy(float)
            both = np.vstack([pts, got[np.all(np.isfinite(got), axis=1)]])
            hi, lo = both.max(axis=0), both.min(axis=0)
            refpoint = (hi + 0.1 * np.maximum(hi - lo, 1e-12)).tolist()
            how = (
                "the worst value of each group over the reference and reached fronts of the"
                " seed (with and without faults) plus 10% of its range (common practice)"
            )
        hv_ref = hypervolume(ref_pts, refpoint)
        hv_reached = hypervolume(reached[ok], refpoint)
        summary["fronts"].append(
            {
                "seed": int(seed),
                "faults": bool(faults),
                "reference_point": list(map(float, refpoint)),
                "reference_point_rule": how,
                "hypervolume_reference": hv_ref,
                "hypervolume_reached": hv_reached,
                "hypervolume_ratio": None if hv_ref == 0 else hv_reached / hv_ref,
                "reached_dominated": int(sum(1 for i, d in dom if d and i in grp.index)),
                "points": len(grp),
            }
        )
    front["dominated"] = pd.Series(dict(dom))
    _write_csv(front, out / "front.csv")
    (out / ".front.json.tmp").write_text(json.dumps(summary, indent=1))
    os.replace(out / ".front.json.tmp", out / "front.json")


def _write_csv(df: Any, path: Path) -> None:
    tmp = path.with_name("." + path.name + ".tmp")
    df.to_csv(tmp, index=False)
    os.replace(tmp, path)


# --------------------------------------------------------------------------- loading


@dataclass(frozen=True, slots=True)
class StudyFrames:
    """A study directory as pandas data frames (``load_study``)."""

    #: runs.csv: one row per run
    runs: Any
    #: points.csv: one row per point
    points: Any
    #: front.csv (fronts) or None
    front: Any
    #: breakpoint.json's points as a frame (searches) or None
    breakpoint: Any
    #: study.json's resolved study, breakpoint.json and front.json as plain data
    meta: dict[str, Any]


def load_study(path: str | Path) -> StudyFrames:
    """Load a study directory written by ``swarmrig study`` into pandas data frames."""
    import pandas as pd

    d = Path(path)
    if not (d / "study.json").exists():
        raise FileNotFoundError(f"{d}: not a study directory (no study.json)")

    def csv(name: str) -> Any:
        p = d / name
        return pd.read_csv(p) if p.exists() and p.stat().st_size else None

    meta: dict[str, Any] = {"study": json.loads((d / "study.json").read_text())["resolved"]}
    bp = None
    for name in ("breakpoint.json", "front.json"):
        if (d / name).exists():
            meta[name.split(".")[0]] = json.loads((d / name).read_text())
    if "breakpoint" in meta:
        bp = pd.DataFrame(meta["breakpoint"]["points"])
    return StudyFrames(
        runs=csv("runs.csv"),
        points=csv("points.csv"),
        front=csv("front.csv"),
        breakpoint=bp,
        meta=meta,
    )


# --------------------------------------------------------------------------- progress


def progress_printer(
    title: str, stream: Any = None
) -> tuple[Callable[..., None], Callable[[], None]]:
    """A progress callback and a closer: a rich bar on a terminal, else one plain line per
    finished run (runs done / total, failures, time left)."""
    stream = stream or sys.stderr
    if getattr(stream, "isatty", lambda: False)():
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        bar = Progress(
            TextColumn(f"[bold]{title}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("runs · {task.fields[failed]} failed"),
            TimeRemainingColumn(),
            console=Console(file=stream),
        )
        task = bar.add_task(title, total=None, failed=0)
        bar.start()

        def update(done: int, total: int, failed: int, left: float | None) -> None:
            bar.update(task, completed=done, total=total, failed=failed)

        return update, bar.stop
    last = {"done": -1}

    def line(done: int, total: int, failed: int, left: float | None) -> None:
        if done == last["done"]:
            return
        last["done"] = done
        eta = "" if left is None else f", about {math.ceil(left)} s left"
        print(f"{title}: {done}/{total} runs done, {failed} failed{eta}", file=stream, flush=True)

    return line, lambda: None
