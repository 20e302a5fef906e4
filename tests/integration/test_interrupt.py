"""Interruption and durability on real processes: Ctrl-C at seeded moments, twice, three
times; SIGKILL of the coordinator and `swarmrig salvage`; a run directory that cannot be
written; --out on a non-empty directory; stale ipc socket directories.

Every moment is an event (run.json written, the k-th agent-bound line of events.jsonl, a
count of telemetry samples on disk, the stop line), never a sleep; deadlines are hang guards.
"""

from __future__ import annotations

import json
import os
import random
import resource
import shutil
import signal
import subprocess
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import psutil
import pytest

from coordinator._interrupts import EXIT_INTERRUPTED
from coordinator._ipc_dirs import OWNER_FILE, PREFIX
from coordinator._rundir import EXIT_WRITE_FAILED, read_events, read_telemetry
from tests.run_dir_spec import FINAL_STATE_KEYS, RUN_FILES, SUMMARY_KEYS

pytestmark = pytest.mark.integration

SEED = 20261202
#: hang guard for any wait on the coordinator (not a pass/fail threshold)
GUARD_S = 90.0


def write_scenario(path: Path, *, seconds: float = 2.0, pause: bool = False) -> Path:
    """4 agents on a ring; ``pause``: agent 0 is stopped (SIGSTOP) from 0.2 s to the end, so
    it never sends a final report and the coordinator's stop waits its whole grace period."""
    text = f"""
[swarm]
name = "interrupt"
agents = 4
mode = "async"
seconds = {seconds}
seed = 7

[topology]
shape = "ring"

[timing]
period_ms = 4.0

[telemetry]
every_iterations = 2
batch_ms = 20.0
"""
    if pause:
        text += """
[[fault]]
kind = "pause"
agents = [0]
start_s = 0.2
duration_s = 60.0
"""
    path.write_text(text)
    return path


class Stderr:
    """Collects a coordinator's standard error line by line (a reader thread)."""

    def __init__(self, p: subprocess.Popen) -> None:
        self.lines: list[str] = []
        self._cond = threading.Condition()
        self._t = threading.Thread(target=self._read, args=(p,), daemon=True)
        self._t.start()

    def _read(self, p: subprocess.Popen) -> None:
        assert p.stderr is not None
        for line in p.stderr:
            with self._cond:
                self.lines.append(line)
                self._cond.notify_all()

    def wait_for(self, text: str, timeout: float = GUARD_S) -> None:
        with self._cond:
            ok = self._cond.wait_for(lambda: any(text in ln for ln in self.lines), timeout)
        assert ok, f"{text!r} never appeared on stderr: {self.text}"

    @property
    def text(self) -> str:
        self._t.join(timeout=GUARD_S)  # the pipe closes when the process ends
        return "".join(self.lines)


def read_json(path: Path) -> dict[str, Any] | None:
    try:
        return json.loads(path.read_text())
    except (FileNotFoundError, json.JSONDecodeError):
        return None


def samples_on_disk(out: Path) -> int:
    n = 0
    for f in (out / "telemetry").glob("agent-*.msgpack"):
        n += sum(len(b.get("samples", [])) for b in read_telemetry(f))
    return n


def every_agent_sampled(out: Path, n: int = 4) -> bool:
    """Every agent's telemetry file holds a sample (the files appear one by one)."""
    files = [out / "telemetry" / f"agent-{i}.msgpack" for i in range(n)]
    return all(f.exists() and any(b.get("samples") for b in read_telemetry(f)) for f in files)


def wait_until(p: subprocess.Popen, what: str, cond: Any) -> None:
    """Poll ``cond()`` until true; fail (hang guard) if the coordinator ended first."""
    deadline = time.monotonic() + GUARD_S
    while time.monotonic() < deadline:
        if cond():
            return
        assert p.poll() is None, f"the coordinator ended (exit {p.returncode}) before {what}"
        time.sleep(0.005)
    raise AssertionError(f"no {what} within the {GUARD_S:.0f} s hang guard")


def events_of(out: Path) -> list[dict[str, Any]]:
    path = out / "events.jsonl"
    return read_events(path) if path.exists() else []


def paused(out: Path) -> bool:
    return any(e.get("event") == "pause" for e in events_of(out))


def moment_reached(out: Path, moment: tuple[str, Any]) -> bool:
    kind, arg = moment
    if kind == "run.json":
        return read_json(out / "run.json") is not None
    if kind == "bound":
        events = events_of(out)
        return sum(e.get("event") == "agent-bound" for e in events) >= arg
    if kind == "handshake":
        return (read_json(out / "run.json") or {}).get("phase") == "running"
    if kind == "samples":
        return (out / "telemetry").is_dir() and samples_on_disk(out) >= arg
    if kind == "stop":
        events = events_of(out)
        return any(e.get("event") == "stop" for e in events)
    raise AssertionError(kind)


def seeded_moments(seed: int, count: int = 20) -> list[tuple[str, Any]]:
    """``count`` moments across start-up, run and results, drawn from ``seed``."""
    rng = random.Random(seed)
    out: list[tuple[str, Any]] = []
    for i in range(count):
        phase = ("start-up", "run", "results")[i % 3]
        if phase == "start-up":
            kind = rng.choice(("run.json", "bound", "handshake"))
            out.append((kind, rng.randint(1, 4) if kind == "bound" else None))
        elif phase == "run":
            out.append(("samples", rng.randint(1, 120)))
        else:
            out.append(("stop", None))
    rng.shuffle(out)
    return out


def swarm_left(run: dict[str, Any] | None) -> list[psutil.Process]:
    """Live (not zombie) processes of the swarm's process group."""
    pgid = (run or {}).get("process_group")
    if not pgid:
        return []
    left = []
    for proc in psutil.process_iter(["pid", "status"]):
        try:
            if proc.info["status"] != psutil.STATUS_ZOMBIE and os.getpgid(proc.pid) == pgid:
                left.append(proc)
        except (psutil.NoSuchProcess, ProcessLookupError, PermissionError):
            continue
    return left


def assert_no_swarm_left(run: dict[str, Any] | None) -> None:
    deadline = time.monotonic() + GUARD_S
    while swarm_left(run) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not swarm_left(run), f"processes of group {run and run.get('process_group')} live on"


def assert_complete(out: Path) -> tuple[dict[str, Any], dict[str, Any]]:
    """Every file the run-directory spec names, finished: run.json is not 'running'."""
    for name in RUN_FILES:
        assert (out / name).exists(), f"{out}: {name} missing"
    assert not list(out.glob("*.tmp")), list(out.glob("*.tmp"))
    run = json.loads((out / "run.json").read_text())
    assert run["exit"] not in ("running", "starting"), run["exit"]
    assert run["phase"] == "done", run["phase"]
    summary = json.loads((out / "summary.json").read_text())
    for key in SUMMARY_KEYS:
        assert key in summary, key
    finals = json.loads((out / "final_states.json").read_text())
    assert len(finals) == summary["agents"]
    for entry in finals:
        assert set(FINAL_STATE_KEYS) <= set(entry), entry
    assert (out / "metrics.csv").read_text().startswith("t_s,")
    assert (out / "links.csv").read_text().startswith("from,")
    return run, summary


# ----------------------------------------------------------------------------- Ctrl-C


def interrupt_at(processes, scenario: Path, out: Path, moment: tuple[str, Any]) -> str | None:
    """One run, one SIGINT at ``moment``; checks the run directory; returns the phase the
    coordinator recorded for the signal (None: it came after the run's own end)."""
    # --baseline: after the stop line the command goes on (results, then the baseline run),
    # so a signal sent after it still finds the coordinator at work
    extra = ["--baseline"] if moment[0] == "stop" else []
    p = processes.start(
        "run", str(scenario), "--out", str(out), "--quiet", *extra, stdout=subprocess.DEVNULL
    )
    err = Stderr(p)
    processes.watch_run_dir(out)
    wait_until(p, f"moment {moment}", lambda: moment_reached(out, moment))
    p.send_signal(signal.SIGINT)
    rc = p.wait(timeout=GUARD_S)
    text = err.text
    assert rc == EXIT_INTERRUPTED, (moment, rc, text)
    assert "Traceback" not in text, text
    run, summary = assert_complete(out)
    assert_no_swarm_left(run)
    if moment[0] == "stop" and "interrupts" not in run:
        # the faulty run had ended; the signal met the baseline run, which stopped at once
        base = read_json(out / "baseline" / "run.json")
        assert base is not None and base["phase"] == "done" and base["exit_code"] == 130, base
        return None
    assert run["exit_code"] == EXIT_INTERRUPTED and "interrupted (SIGINT)" in run["exit"]
    [rec] = run["interrupts"]
    if rec["phase"] in ("starting", "running"):
        assert summary["verdict"] == "interrupted", summary["verdict"]
    else:  # the run had reached its end: its results are whole and say what it reached
        assert rec["phase"] in ("stopping", "results", "done"), rec
        assert summary["exit"] == "budget" and summary["verdict"] != "interrupted", summary
    return rec["phase"]


#: the phase run.json records for a signal sent at each kind of moment (None: the run had
#: ended and the baseline run took it)
EXPECTED_PHASE = {
    "run.json": {"starting"},
    "bound": {"starting"},
    "handshake": {"running"},
    "samples": {"running"},
    "stop": {"results", "done", None},
}


@pytest.mark.parametrize("part", range(4))
def test_sigint_at_twenty_seeded_moments(processes, tmp_path, part):
    """20 moments in four parts of five (each part a test of its own, so each stays short)."""
    from concurrent.futures import ThreadPoolExecutor

    scenario = write_scenario(tmp_path / "s.toml", seconds=1.0)
    moments = seeded_moments(SEED)[5 * part : 5 * part + 5]
    # three coordinators at a time keep the test short; each waits for its own events
    with ThreadPoolExecutor(max_workers=3) as pool:
        futures = [
            pool.submit(interrupt_at, processes, scenario, tmp_path / f"run-{k}", m)
            for k, m in enumerate(moments)
        ]
        phases = [f.result() for f in futures]
    for moment, phase in zip(moments, phases, strict=True):
        assert phase in EXPECTED_PHASE[moment[0]], (moment, phase)


def test_the_twenty_moments_cover_start_up_run_and_results():
    kinds = [k for k, _ in seeded_moments(SEED)]
    assert len(kinds) == 20
    assert {"run.json", "bound", "handshake"} & set(kinds) and "samples" in kinds
    assert "stop" in kinds


def test_sigint_twice_finishes_and_says_so(processes, tmp_path):
    # agent 0 is stopped, so the coordinator's stop waits for it: time for the second signal
    scenario = write_scenario(tmp_path / "s.toml", seconds=30.0, pause=True)
    out = tmp_path / "run"
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    err = Stderr(p)
    processes.watch_run_dir(out)
    wait_until(p, "the pause", lambda: paused(out))
    p.send_signal(signal.SIGINT)
    err.wait_for("stopping the agents")
    p.send_signal(signal.SIGINT)
    err.wait_for("again: finishing the run directory")
    rc = p.wait(timeout=GUARD_S)
    text = err.text
    assert rc == EXIT_INTERRUPTED and "Traceback" not in text, text
    run, summary = assert_complete(out)
    assert [r["signal"] for r in run["interrupts"]] == ["SIGINT", "SIGINT"]
    assert summary["verdict"] == "interrupted"
    assert_no_swarm_left(run)


def test_sigint_three_times_abandons(processes, tmp_path):
    scenario = write_scenario(tmp_path / "s.toml", seconds=30.0, pause=True)
    out = tmp_path / "run"
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    err = Stderr(p)
    processes.watch_run_dir(out)
    wait_until(p, "the pause", lambda: paused(out))
    p.send_signal(signal.SIGINT)
    err.wait_for("stopping the agents")
    p.send_signal(signal.SIGINT)
    err.wait_for("again: finishing")
    p.send_signal(signal.SIGINT)
    rc = p.wait(timeout=GUARD_S)
    text = err.text
    assert rc == EXIT_INTERRUPTED and "Traceback" not in text, text
    assert "abandoned" in text and f"swarmrig salvage {out}" in text, text
    run = json.loads((out / "run.json").read_text())
    assert run["exit"] == "abandoned" and run["phase"] == "abandoned", run
    assert run["exit_code"] == EXIT_INTERRUPTED and len(run["interrupts"]) == 3
    assert run["abandoned_while"] in ("running", "stopping"), run["abandoned_while"]
    assert not list(out.glob("*.tmp"))
    assert_no_swarm_left(run)
    # what was abandoned can still be finished from the telemetry
    s = processes.start("salvage", str(out))
    _, stderr = s.communicate(timeout=GUARD_S)
    assert s.returncode == 0, stderr
    run, summary = assert_complete(out)
    assert summary["recovered"] is True and run["recovered"]["from_phase"] == "abandoned"


# ----------------------------------------------------------------------------- SIGKILL


def ipc_dirs_of(pid: int, root: Path) -> list[Path]:
    found = []
    for d in root.glob(PREFIX + "*"):
        owner = read_json(d / OWNER_FILE)
        if owner and owner.get("pid") == pid:
            found.append(d)
    return found


@pytest.fixture
def own_tmpdir():
    """A TMPDIR of the test's own (short: ipc socket paths hold at most 107 bytes), so that
    no coordinator of another session sweeps the stale directory before ours does."""
    root = Path(tempfile.mkdtemp(prefix="sr-"))
    try:
        yield root
    finally:
        shutil.rmtree(root, ignore_errors=True)


def test_sigkill_then_salvage_and_stale_ipc_dir_cleanup(processes, tmp_path, own_tmpdir):
    env = {**os.environ, "TMPDIR": str(own_tmpdir)}
    scenario = write_scenario(tmp_path / "s.toml", seconds=30.0)
    out = tmp_path / "run"
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet", env=env)
    processes.watch_run_dir(out)
    # every agent has a sample on disk (salvage takes each one's last), and 40 in all
    wait_until(
        p,
        "a sample of every agent and 40 in all",
        lambda: every_agent_sampled(out) and samples_on_disk(out) >= 40,
    )
    [stale] = ipc_dirs_of(p.pid, own_tmpdir)
    p.send_signal(signal.SIGKILL)
    assert p.wait(timeout=GUARD_S) == -signal.SIGKILL
    before = json.loads((out / "run.json").read_text())
    assert before["exit"] == "running" and not (out / "summary.json").exists()
    assert_no_swarm_left(before)  # the agents leave with their coordinator
    assert stale.exists()  # nobody removed it: the coordinator was killed

    s = processes.start("salvage", str(out))
    stdout, stderr = s.communicate(timeout=GUARD_S)
    assert s.returncode == 0, stderr
    assert f"recovered {out}" in stdout
    run, summary = assert_complete(out)
    assert summary["recovered"] is True and run["recovered"]["from_phase"] == "running"
    assert summary["iterations_total"] > 0
    # the salvaged final states are the last samples on disk, agent by agent
    finals = json.loads((out / "final_states.json").read_text())
    for entry in finals:
        batches = read_telemetry(out / "telemetry" / f"agent-{entry['id']}.msgpack")
        last = [b for b in batches if b.get("samples")][-1]["samples"][-1]
        assert entry["iteration"] == last[0] and entry["x"] == pytest.approx(last[2], abs=0)
    # a second salvage refuses: the directory is finished
    again = processes.start("salvage", str(out))
    _, stderr = again.communicate(timeout=GUARD_S)
    assert again.returncode == 2 and "nothing to salvage" in stderr, stderr

    # the next coordinator to start removes the stale socket directory of the killed one
    nxt = tmp_path / "next"
    q = processes.start(
        "run",
        str(write_scenario(tmp_path / "t.toml", seconds=0.5)),
        "--out",
        str(nxt),
        "--quiet",
        env=env,
    )
    processes.watch_run_dir(nxt)
    _, stderr = q.communicate(timeout=GUARD_S)
    assert q.returncode == 0, stderr
    assert not stale.exists()
    removed = [
        e for e in read_events(nxt / "events.jsonl") if e["event"] == "stale-ipc-dir-removed"
    ]
    assert str(stale) in [e["path"] for e in removed]


# ----------------------------------------------------------------------------- writes


def test_unwritable_out_is_a_clear_error(processes, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory\n")
    out = blocker / "run"
    p = processes.start("run", str(write_scenario(tmp_path / "s.toml")), "--out", str(out))
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == EXIT_WRITE_FAILED, stderr
    assert f"cannot write {out}" in stderr and "Traceback" not in stderr, stderr


def _small_files() -> None:
    # a full disk, as the coordinator sees it: writes past 48 KiB fail (EFBIG; Python
    # ignores SIGXFSZ, so the write returns an error instead of killing the process)
    resource.setrlimit(resource.RLIMIT_FSIZE, (48 * 1024, 48 * 1024))


def test_full_disk_mid_run_ends_with_a_clear_message(processes, tmp_path):
    out = tmp_path / "run"
    scenario = write_scenario(tmp_path / "s.toml", seconds=30.0)
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet", preexec_fn=_small_files)
    processes.watch_run_dir(out)
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == EXIT_WRITE_FAILED, stderr
    assert "Traceback" not in stderr, stderr
    assert f"cannot write {out}" in stderr and "File too large" in stderr, stderr
    run = json.loads((out / "run.json").read_text())
    assert run["phase"] == "done" and run["exit_code"] == EXIT_WRITE_FAILED
    assert "write failed" in run["exit"] and "File too large" in run["write_failed"], run
    assert run["write_failed"] in stderr
    assert not list(out.glob("*.tmp")), list(out.glob("*.tmp"))
    assert_no_swarm_left(run)


def test_out_not_empty_is_refused_and_replace_clears_it(processes, tmp_path):
    scenario = write_scenario(tmp_path / "s.toml", seconds=0.5)
    out = tmp_path / "run"
    p = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    processes.watch_run_dir(out)
    _, stderr = p.communicate(timeout=GUARD_S)
    assert p.returncode == 0, stderr
    first = json.loads((out / "run.json").read_text())
    sizes = {f.name: f.stat().st_size for f in (out / "telemetry").iterdir()}

    again = processes.start("run", str(scenario), "--out", str(out), "--quiet")
    _, stderr = again.communicate(timeout=GUARD_S)
    assert again.returncode == 2, stderr
    assert f"--out {out}: the directory is not empty" in stderr and "--replace" in stderr
    assert json.loads((out / "run.json").read_text()) == first  # untouched
    assert {f.name: f.stat().st_size for f in (out / "telemetry").iterdir()} == sizes

    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "notes.txt").write_text("mine\n")
    mine = processes.start("run", str(scenario), "--out", str(tmp_path / "other"), "--replace")
    _, stderr = mine.communicate(timeout=GUARD_S)
    assert mine.returncode == 2 and "not a run directory" in stderr, stderr
    assert (tmp_path / "other" / "notes.txt").read_text() == "mine\n"

    third = processes.start("run", str(scenario), "--out", str(out), "--quiet", "--replace")
    _, stderr = third.communicate(timeout=GUARD_S)
    assert third.returncode == 0, stderr
    run, _ = assert_complete(out)
    assert run["started_utc"] >= first["started_utc"]
    assert run["coordinator"]["pid"] != first["coordinator"]["pid"]
    # one run's telemetry only: every batch belongs to epoch 0 of this run, no second header
    for f in (out / "telemetry").glob("agent-*.msgpack"):
        batches = read_telemetry(f)
        assert sum("final" in b for b in batches) == 1, f
