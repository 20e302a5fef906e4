"""`swarmrig study` as a real subprocess: a 20-seed loss sweep that is interrupted with
SIGINT and resumed, and the same study sent to a real Dask distributed scheduler with two
workers on loopback. Both compare runs.csv with an uninterrupted local run (same seeds, so
the same numbers); only this machine's timing columns differ."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from coordinator._study_runs import TIMING_KEYS

# many runs on a shared 2-core machine: a hang guard well above the project's 180 s default
pytestmark = [pytest.mark.integration, pytest.mark.timeout(1200)]

SEEDS = 20
LEVELS = [0.0, 0.2, 0.4]

STUDY = f"""
[study]
name = "hedgerow-loss"
kind = "grid"
seeds = {SEEDS}
engine = "batch"

[scenario.swarm]
name = "hedgerow-loss"
agents = 6
dimension = 2
iterations = 200
seed = 100
[scenario.topology]
shape = "ring"
[scenario.objective]
kind = "quadratic"
curvature = "random"
[scenario.algorithm]
name = "gradient-tracking"
step = 0.04
[[scenario.fault]]
kind = "loss"
name = "gusts"
links = "all"
rate = 0.1

[vary]
"fault.gusts.rate" = {LEVELS}
"""


def _runs(path: Path) -> pd.DataFrame:
    df = pd.read_csv(path)
    return df.drop(columns=[c for c in TIMING_KEYS if c in df.columns])


def _rows(path: Path) -> int:
    with contextlib.suppress(FileNotFoundError, pd.errors.EmptyDataError):
        return len(pd.read_csv(path))
    return 0


def _nonces(out: Path) -> dict[str, str]:
    return {
        p.name: json.loads(p.read_text())["computed"]["nonce"]
        for p in sorted((out / "rows").glob("*.json"))
    }


def _wait(proc: subprocess.Popen, timeout: float = 600) -> int:
    try:
        return proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        pytest.fail(f"swarmrig study did not finish within {timeout} s (hang guard)")


def _study(processes, study: Path, out: Path, log: Path, *extra: str) -> subprocess.Popen:
    args = ("study", str(study), "--out", str(out), "--workers", "1", *extra)
    with log.open("w") as fh:  # the child keeps its own copy of the descriptor
        return processes.start(*args, stdout=fh, stderr=subprocess.STDOUT)


@pytest.fixture
def study_file(tmp_path: Path) -> Path:
    p = tmp_path / "hedgerow.toml"
    p.write_text(STUDY)
    return p


@pytest.fixture
def clean_run(tmp_path: Path, study_file: Path, processes) -> Path:
    out = tmp_path / "clean"
    proc = _study(processes, study_file, out, tmp_path / "clean.log")
    assert _wait(proc) == 0, (tmp_path / "clean.log").read_text()
    return out


def test_interrupted_sweep_resumes_without_losing_or_repeating_a_run(
    tmp_path: Path, study_file: Path, clean_run: Path, processes
) -> None:
    out = tmp_path / "cut"
    log = tmp_path / "cut.log"
    proc = _study(processes, study_file, out, log)
    # wait for an event, not a time: some runs recorded in runs.csv
    deadline = time.monotonic() + 600
    while _rows(out / "runs.csv") < 10:
        assert proc.poll() is None, log.read_text()
        assert time.monotonic() < deadline, "no run recorded within 600 s (hang guard)"
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    assert _wait(proc) == 130, log.read_text()
    text = log.read_text()
    assert "interrupted" in text and "Run the same command again" in text
    assert f"/{SEEDS * len(LEVELS)} runs done" in text  # the progress lines
    before = _nonces(out)
    total = SEEDS * len(LEVELS)
    assert 10 <= len(before) < total, "the interruption came after the last run"

    log2 = tmp_path / "resume.log"
    proc = _study(processes, study_file, out, log2)
    assert _wait(proc) == 0, log2.read_text()
    after = _nonces(out)
    # nothing lost, nothing recomputed: every record from before is the same file content
    assert len(after) == total
    assert {k: after[k] for k in before} == before
    assert f"{len(before)}/{total} runs done" in log2.read_text()
    pd.testing.assert_frame_equal(_runs(out / "runs.csv"), _runs(clean_run / "runs.csv"))
    pd.testing.assert_frame_equal(
        pd.read_csv(out / "points.csv"), pd.read_csv(clean_run / "points.csv")
    )


@pytest.fixture
def dask_cluster(tmp_path: Path):
    """A real Dask distributed scheduler and two workers on loopback, each process in a
    session of its own; teardown kills their process groups."""
    bindir = Path(sys.executable).parent
    sched_file = tmp_path / "scheduler.json"
    env = {**os.environ, "DASK_DISTRIBUTED__WORKER__DAEMON": "False"}
    procs = []

    def start(*args: str) -> None:
        with (tmp_path / f"dask-{len(procs)}.log").open("w") as log:
            procs.append(
                subprocess.Popen(
                    [str(bindir / "dask"), *args],
                    start_new_session=True,
                    env=env,
                    stdout=log,
                    stderr=subprocess.STDOUT,
                    cwd=tmp_path,
                )
            )

    try:
        start(
            "scheduler",
            "--host",
            "127.0.0.1",
            "--port",
            "0",
            "--no-dashboard",
            "--scheduler-file",
            str(sched_file),
        )
        deadline = time.monotonic() + 120
        while not sched_file.exists() or not sched_file.read_text().strip():
            assert procs[0].poll() is None, (tmp_path / "dask-0.log").read_text()
            assert time.monotonic() < deadline, "the scheduler wrote no address in 120 s"
            time.sleep(0.1)
        time.sleep(0.2)  # the file is written whole by the scheduler; read it once more
        address = json.loads(sched_file.read_text())["address"]
        assert address.startswith("tcp://127.0.0.1:")
        for _ in range(2):
            start(
                "worker",
                address,
                "--nworkers",
                "1",
                "--nthreads",
                "1",
                "--no-dashboard",
                "--host",
                "127.0.0.1",
            )
        from distributed import Client

        with Client(address, timeout="60s") as client:
            client.wait_for_workers(2, timeout=180)
            assert len(client.scheduler_info()["workers"]) == 2
        yield address
    finally:
        for p in procs:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(p.pid, signal.SIGKILL)
        for p in procs:
            with contextlib.suppress(Exception):
                p.wait(timeout=10)


def test_cluster_study_equals_the_local_one(
    tmp_path: Path, study_file: Path, clean_run: Path, dask_cluster: str, processes
) -> None:
    out = tmp_path / "cluster"
    log = tmp_path / "cluster.log"
    proc = _study(processes, study_file, out, log, "--cluster", dask_cluster)
    assert _wait(proc) == 0, log.read_text()
    pd.testing.assert_frame_equal(_runs(out / "runs.csv"), _runs(clean_run / "runs.csv"))
    # the runs were made on the workers, not in the study's own process
    pids = {json.loads(p.read_text())["computed"]["pid"] for p in (out / "rows").glob("*.json")}
    assert proc.pid not in pids and len(pids) >= 1
    # kept run directories came back packed and unpacked into runs/
    kept = pd.read_csv(out / "runs.csv")["kept_run_dir"].dropna()
    assert len(kept) == SEEDS * len(LEVELS)
    assert all((out / k / "summary.json").exists() for k in kept)
