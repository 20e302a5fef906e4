"""One run of a study, and the pools that run many: local processes or a Dask cluster.

:func:`run_job` is what a worker executes: it loads one run's scenario, applies a front
weighting, picks the engine (:func:`pick_engine`, the one place that chooses), runs it
(:func:`run_swarm`, the one place that calls an engine) and returns the run's record: every
scalar of its summary, the final state of each agent, a thinned metric series for the
figures and the fault windows. The caller writes the record; a run is finished exactly when
its record is on disk.
"""

from __future__ import annotations

import contextlib
import io
import math
import os
import shutil
import tarfile
import tempfile
import time
import uuid
from collections.abc import Callable, Iterable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "LocalPool",
    "flatten_scalars",
    "pick_engine",
    "run_job",
    "run_jobs",
    "run_swarm",
    "start_pool",
]

#: metric rows kept per run for the figures (thinned evenly, the last row always kept)
SERIES_ROWS = 300
#: summary keys that measure this machine's speed rather than the run
TIMING_KEYS = ("wall_s", "startup_s", "run_s", "iterations_per_s", "run_dir")


# --------------------------------------------------------------------------- engines


def batch_engine_available() -> bool:
    """Whether the batch engine is installed in this version (it is optional)."""
    try:
        import coordinator._batch  # type: ignore[import-not-found]  # noqa: F401
    except ImportError:
        return False
    return True


def pick_engine(swarm: Any, requested: str) -> str:
    """The engine a study run uses: the batch engine where the scenario allows it, else
    lockstep, else real processes; an explicit request is checked and kept.

    Raises ScenarioError (naming the key) when the requested engine cannot run the swarm.
    """
    from coordinator._lockstep import check_lockstep
    from topologies._errors import ScenarioError

    if requested in ("batch", "auto") and batch_engine_available():
        from coordinator._batch import check_batch  # type: ignore[import-not-found]

        try:
            check_batch(swarm)
            return "batch"
        except ScenarioError:
            if requested == "batch":
                raise
    elif requested == "batch":
        raise ScenarioError("--engine batch: this version has no batch engine")
    if requested in ("lockstep", "auto"):
        try:
            check_lockstep(swarm)
            return "lockstep"
        except ScenarioError:
            if requested == "lockstep":
                raise
    return "processes"


def run_swarm(swarm: Any, engine: str, out: Path) -> Any:
    """Run ``swarm`` to the end with ``engine`` into run directory ``out``."""
    from coordinator._run import RunOptions, execute

    return execute(swarm, RunOptions(out=out, engine=engine))


# --------------------------------------------------------------------------- weighting


def weighted_swarm(swarm: Any, agent_weights: np.ndarray) -> tuple[Any, str]:
    """The swarm asked to minimize sum_i p_i f_i for per-agent weights p (summing to one).

    Algorithms that carry priorities get p as every agent's initial priority vector (the
    scenario's ``[priorities].initial``); the others get each quadratic objective scaled by
    n p_i, so that the uniform average they minimize, (1/n) sum_i n p_i f_i, is the same F.
    Returns the swarm and how the weighting was applied ("priorities" or "objective scale").
    """
    from coordinator._reference import reference_optimum
    from coordinator._swarm import build_swarm
    from node._algorithm import algorithm_class
    from node._objectives import objective_from_spec
    from topologies._errors import ScenarioError

    s = swarm.scenario
    n = swarm.n
    p = np.asarray(agent_weights, dtype=float)
    if algorithm_class(swarm.algorithm["name"]).uses_priorities:
        from coordinator._scenario import load_scenario

        doc = s.to_dict()
        doc.setdefault("priorities", {})["initial"] = [p.tolist()] * n
        for o in doc.get("agent", []):
            o.pop("initial_priorities", None)
        return build_swarm(load_scenario(doc, source=s.source, base_dir=s.base_dir)), "priorities"
    specs = []
    for i, spec in enumerate(swarm.objective_specs):
        if spec["kind"] != "quadratic":
            raise ScenarioError(
                f"{s.source}: [objective].kind: a front with {swarm.algorithm['name']!r}"
                " (no priorities) weights objectives by scaling quadratics; got"
                f" {spec['kind']!r}. Use a priority algorithm (priority-weighted) instead"
            )
        scaled = dict(spec)
        scaled["curvature"] = (n * p[i] * np.asarray(spec["curvature"], dtype=float)).tolist()
        specs.append(scaled)
    objectives = tuple(objective_from_spec(sp) for sp in specs)
    ref = reference_optimum(objectives, swarm.intended)
    return replace(
        swarm, objectives=objectives, objective_specs=tuple(specs), reference=ref
    ), "objective scale"


# --------------------------------------------------------------------------- one run


def run_job(job: Mapping[str, Any]) -> dict[str, Any]:
    """Run one study run and return its record (see the module docstring).

    ``job``: ``id``, ``scenario`` (raw dict), ``scenario_dir``, ``engine`` (requested),
    ``dest`` (folder for kept run directories on this machine, or None to pack the kept
    directory into the record), ``keep``, and for fronts ``groups`` and ``weights``.
    """
    return run_jobs([job])[0]


def run_jobs(jobs: list[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Run several runs of a study and return their records, in order.

    The runs that the batch engine takes and that can share a block (the seeds of one point:
    same period, budget and algorithm configuration) run as one batch, several seeds stacked
    in one array loop (coordinator._batch.execute_many); every seed's run directory and
    summary are those of the seed run alone. The others run one by one.
    """
    preps = [_prepare(job) for job in jobs]
    results: list[Any] = [None] * len(preps)
    try:
        stacks: dict[str, list[int]] = {}
        for k, p in enumerate(preps):
            if p["engine"] == "batch":
                sw = p["swarm"]
                key = repr(
                    (sw.algorithm, sw.scenario.timing, sw.scenario.iterations, sw.scenario.seconds)
                )
                stacks.setdefault(key, []).append(k)
            else:
                results[k] = run_swarm(p["swarm"], p["engine"], p["tmp"])
        for members in stacks.values():
            if len(members) == 1:
                k = members[0]
                results[k] = run_swarm(preps[k]["swarm"], "batch", preps[k]["tmp"])
                continue
            from coordinator._batch import BatchCoordinator, execute_many
            from coordinator._run import RunOptions

            coords = [
                BatchCoordinator(preps[k]["swarm"], RunOptions(out=preps[k]["tmp"], engine="batch"))
                for k in members
            ]
            for k, result in zip(members, execute_many(coords), strict=True):
                results[k] = result
        return [_record(p, r) for p, r in zip(preps, results, strict=True)]
    finally:
        for p in preps:
            shutil.rmtree(p["tmp"], ignore_errors=True)
            if not p["job"].get("dest"):
                shutil.rmtree(p["scratch"], ignore_errors=True)


def _prepare(job: Mapping[str, Any]) -> dict[str, Any]:
    from coordinator._scenario import load_scenario
    from coordinator._swarm import build_swarm

    t0 = time.monotonic()
    scenario = load_scenario(
        job["scenario"], source=f"study run {job['id']}", base_dir=job["scenario_dir"]
    )
    swarm = build_swarm(scenario)
    base_objectives = swarm.objectives
    how = None
    if job.get("weights") is not None:
        p = _agent_weights(job["groups"], job["weights"], swarm.n)
        swarm, how = weighted_swarm(swarm, p)
    engine = pick_engine(swarm, job["engine"])
    dest = job.get("dest")
    scratch = Path(dest) if dest else Path(tempfile.mkdtemp(prefix="swarmrig-study-"))
    scratch.mkdir(parents=True, exist_ok=True)
    tmp = scratch / f".tmp-{job['id']}-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    return {
        "job": job,
        "t0": t0,
        "scenario": scenario,
        "swarm": swarm,
        "base_objectives": base_objectives,
        "how": how,
        "engine": engine,
        "scratch": scratch,
        "tmp": tmp,
    }


def _record(p: Mapping[str, Any], result: Any) -> dict[str, Any]:
    job, swarm, tmp, scratch = p["job"], p["swarm"], p["tmp"], p["scratch"]
    summary = result.summary
    finals = final_states(tmp, swarm.n)
    rec: dict[str, Any] = {
        "id": job["id"],
        "engine": p["engine"],
        "exit_code": result.exit_code,
        "summary": summary,
        "finals": None if finals is None else finals.tolist(),
        "series": thin_series(result.metrics),
        "windows": fault_windows(p["scenario"], result.metrics, tmp),
        "computed": {"pid": os.getpid(), "nonce": uuid.uuid4().hex, "t_s": 0.0},
    }
    ref = swarm.reference
    if job.get("weights") is not None:
        rec["front"] = _front_record(
            job["groups"], p["base_objectives"], summary, finals, ref.x_star, p["how"]
        )
    (tmp / "study-run.json").write_text(
        _json({k: v for k, v in rec.items() if k not in ("summary", "series")})
    )
    rec["run_dir"] = None
    if job.get("keep"):
        if job.get("dest"):
            final = scratch / job["id"]
            if final.exists():  # a run interrupted before its record was written
                shutil.rmtree(final)
            tmp.rename(final)
            rec["run_dir"] = f"runs/{job['id']}"
        else:
            rec["packed"] = _pack(tmp)
            rec["run_dir"] = f"runs/{job['id']}"
    rec["computed"]["t_s"] = time.monotonic() - p["t0"]
    return rec


def _json(obj: Any) -> str:
    import json

    from coordinator._rundir import _clean

    return json.dumps(_clean(obj), indent=1)


def _agent_weights(groups: list[list[int]], weights: list[float], n: int) -> np.ndarray:
    """Group weights shared equally among each group's members."""
    p = np.zeros(n)
    for g, w in zip(groups, weights, strict=True):
        for i in g:
            p[i] = w / len(g)
    return p


def group_values(groups: list[list[int]], objectives: Any, x: np.ndarray) -> list[float]:
    """Each group's objective at x: the mean of its members' objectives."""
    return [float(np.mean([objectives[i].value(x) for i in g])) for g in groups]


def _front_record(
    groups: list[list[int]],
    objectives: Any,
    summary: Mapping[str, Any],
    finals: np.ndarray | None,
    x_star: np.ndarray,
    how: str | None,
) -> dict[str, Any]:
    x_hat = summary.get("x_hat")
    out: dict[str, Any] = {"applied_as": how, "x_star": np.asarray(x_star).tolist()}
    out["reference"] = group_values(groups, objectives, np.asarray(x_star))
    if x_hat is None:
        out.update(average=None, worst=None, distance=None)
        return out
    xh = np.asarray(x_hat, dtype=float)
    out["average"] = group_values(groups, objectives, xh)
    if finals is not None:
        per_agent = np.array([group_values(groups, objectives, x) for x in finals])
        out["worst"] = per_agent.max(axis=0).tolist()
    else:
        out["worst"] = None
    out["distance"] = float(np.linalg.norm(xh - np.asarray(x_star)))
    return out


def final_states(run_dir: Path, n: int) -> np.ndarray | None:
    """Each agent's final state from the run directory's final_states.json (None when an
    agent has none)."""
    import json

    path = run_dir / "final_states.json"
    if not path.exists():
        return None
    rows = json.loads(path.read_text())
    xs = [r.get("x") for r in sorted(rows, key=lambda r: r["id"])]
    if len(xs) != n or any(x is None for x in xs):
        return None
    return np.asarray(xs, dtype=float)


def thin_series(metrics: list[Mapping[str, Any]], rows: int = SERIES_ROWS) -> dict[str, list]:
    """Columns t_s, gap, consensus_error (and worst_agent_gap when present), thinned."""
    if not metrics:
        return {"t_s": [], "gap": [], "consensus_error": []}
    idx = sorted(set(np.linspace(0, len(metrics) - 1, min(rows, len(metrics))).astype(int)))
    cols = ["t_s", "gap", "consensus_error", "iteration_median"]
    cols += [c for c in ("worst_agent_gap",) if c in metrics[0]]
    return {c: [_num(metrics[i].get(c)) for i in idx] for c in cols}


def _num(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def fault_windows(
    scenario: Any, metrics: list[Mapping[str, Any]], run_dir: Path
) -> list[dict[str, Any]]:
    """Each fault's window on the run's clock, seconds (from the run's own window function,
    coordinator._results.fault_windows); iteration windows are placed where the median
    iteration of metrics.csv reaches them. ``end_s`` None: until the end."""
    import json

    from coordinator._results import fault_windows as windows_of

    events = []
    path = run_dir / "events.jsonl"
    if path.exists():
        for line in path.read_text().splitlines():
            with contextlib.suppress(ValueError):
                events.append(json.loads(line))
    ts = np.array([float(m["t_s"]) for m in metrics]) if metrics else np.zeros(0)
    its = np.array([float(m["iteration_median"]) for m in metrics]) if metrics else np.zeros(0)

    def at(iteration: float | None) -> float | None:
        if iteration is None or len(ts) == 0:
            return None
        k = int(np.searchsorted(its, iteration))
        return float(ts[min(k, len(ts) - 1)])

    names = {f["index"]: f.get("name") for f in scenario.faults}
    out = []
    for w in windows_of(scenario.faults, events):
        start, end = (at(w.start), at(w.end)) if w.unit == "iteration" else (w.start, w.end)
        label = names.get(w.index) or f"#{w.index} {w.kind}"
        out.append({"label": label, "kind": w.kind, "start_s": start, "end_s": end})
    return out


def _pack(path: Path) -> bytes:
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w:gz") as tar:
        for child in sorted(path.iterdir()):
            tar.add(child, arcname=child.name)
    return buf.getvalue()


def unpack(blob: bytes, dest: Path) -> None:
    """Unpack a packed run directory into ``dest`` (replaced atomically)."""
    tmp = dest.with_name(f".tmp-unpack-{dest.name}-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    with tarfile.open(fileobj=io.BytesIO(blob), mode="r:gz") as tar:
        tar.extractall(tmp, filter="data")
    if dest.exists():
        shutil.rmtree(dest)
    tmp.rename(dest)


def flatten_scalars(summary: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Every scalar of a summary: nested tables become dotted names; lists are left out."""
    out: dict[str, Any] = {}
    for k, v in summary.items():
        name = f"{prefix}{k}"
        if isinstance(v, Mapping):
            out.update(flatten_scalars(v, name + "."))
        elif v is None or isinstance(v, str | bool | int | float):
            out[name] = v
    return out


# --------------------------------------------------------------------------- pools


def _ignore_sigint() -> None:
    import signal

    # The study's own process decides what Ctrl-C means; a worker finishes or is ended.
    signal.signal(signal.SIGINT, signal.SIG_IGN)


class LocalPool:
    """Worker processes on this machine (spawned fresh, so no state crosses a fork)."""

    def __init__(self, workers: int) -> None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.workers = workers
        self._ex = ProcessPoolExecutor(
            max_workers=workers,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=_ignore_sigint,
        )

    def submit(self, jobs: list[Mapping[str, Any]]) -> Any:
        return self._ex.submit(run_jobs, [dict(j) for j in jobs])

    def wait_any(self, futures: Iterable[Any], timeout: float) -> set[Any]:
        from concurrent.futures import FIRST_COMPLETED, wait

        done, _ = wait(list(futures), timeout=timeout, return_when=FIRST_COMPLETED)
        return done

    def close(self, abort: bool = False) -> None:
        if abort:
            procs = list(getattr(self._ex, "_processes", {}).values())
            self._ex.shutdown(wait=False, cancel_futures=True)
            for p in procs:  # only this pool's own workers, by their process objects
                with contextlib.suppress(Exception):
                    p.terminate()
            for p in procs:
                with contextlib.suppress(Exception):
                    p.join(10)
        else:
            self._ex.shutdown(wait=True)


class ClusterPool:
    """Runs sent to a Dask distributed scheduler; kept run directories come back packed."""

    def __init__(self, address: str) -> None:
        from distributed import Client

        self.client = Client(address, timeout="20s")
        self.workers = max(1, sum(self.client.nthreads().values()))

    def submit(self, jobs: list[Mapping[str, Any]]) -> Any:
        jobs = [{**j, "dest": None} for j in jobs]
        return self.client.submit(
            run_jobs, jobs, pure=False, key=f"swarmrig-run-{jobs[0]['id']}-{uuid.uuid4().hex[:6]}"
        )

    def wait_any(self, futures: Iterable[Any], timeout: float) -> set[Any]:
        from distributed import wait

        futures = list(futures)
        try:
            res = wait(futures, timeout=timeout, return_when="FIRST_COMPLETED")
        except TimeoutError:
            return set()
        return set(res.done)

    def close(self, abort: bool = False) -> None:
        self.client.close()


def start_pool(workers: int, cluster: str | None) -> LocalPool | ClusterPool:
    return ClusterPool(cluster) if cluster else LocalPool(workers)


def agents_per_run(job: Mapping[str, Any]) -> int:
    return int(job["scenario"].get("swarm", {}).get("agents", 1))


def concurrency(engine: str, agents: int, workers: int) -> int:
    """Runs at a time: real-process runs share the cores among their agents."""
    if engine != "processes":
        return workers
    cores = os.cpu_count() or 1
    return max(1, min(workers, cores // max(1, agents)))


Progress = Callable[[int, int, int], None]
