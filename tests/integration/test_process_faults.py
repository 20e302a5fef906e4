"""Process faults performed by the coordinator on real agents: crash (SIGKILL) and restart
under a new epoch, pause (SIGSTOP/SIGCONT) and slow (period multiplied).

A watcher thread follows events.jsonl while the run goes and looks at the processes named
there with psutil, so that "the crashed agent is gone" is checked on the live system, not
taken from the coordinator's word.
"""

from __future__ import annotations

import csv
import json
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import psutil
import pytest

import coordinator
from tests.integration.test_fault_models import (
    MOVED,
    base,
    events,
    final_report,
    in_counters,
    link_rows,
    run_swarm,
    samples,
    snapshots,
)

pytestmark = pytest.mark.integration


def _gone(pid: int) -> bool:
    """No such process, or a zombie waiting for its parent: either way it runs nothing."""
    try:
        return psutil.Process(pid).status() == psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return True


class EventWatcher(threading.Thread):
    """Follows events.jsonl of a running swarm; on each crash event it waits (up to 2 s)
    for the killed pid to be gone, on each agent-rejoined event it checks the new pid runs."""

    def __init__(self, run_dir: Path) -> None:
        super().__init__(daemon=True)
        self.path = run_dir / "events.jsonl"
        self.done = threading.Event()
        self.crashed: dict[int, float | None] = {}  # pid -> seconds until gone (None: never)
        self.rejoined: dict[int, bool] = {}  # new pid -> running when seen
        self.errors: list[str] = []

    def run(self) -> None:
        seen = 0
        while not self.done.is_set():
            try:
                lines = self.path.read_text().splitlines()
            except FileNotFoundError:
                lines = []
            for line in lines[seen:]:
                try:
                    ev = json.loads(line)
                except json.JSONDecodeError:
                    break  # a line being written: read it again next time
                seen += 1
                try:
                    self.on_event(ev)
                except Exception as exc:  # reported by the test, not lost in the thread
                    self.errors.append(repr(exc))
            time.sleep(0.002)

    def on_event(self, ev: dict[str, Any]) -> None:
        if ev["event"] == "crash":
            t0 = time.monotonic()
            while time.monotonic() - t0 < 2.0:
                if _gone(ev["pid"]):
                    self.crashed[ev["pid"]] = time.monotonic() - t0
                    return
                time.sleep(0.001)
            self.crashed[ev["pid"]] = None
        elif ev["event"] == "agent-rejoined":
            pid = ev["pid"]
            self.rejoined[pid] = psutil.pid_exists(pid) and not _gone(pid)


def test_crash_and_restart_under_a_new_epoch(processes, tmp_path):
    k, t_crash, down = 2, 0.5, 0.5
    period_ms = 2.0
    sc = base("crash", agents=4, mode="async", seconds=2.0)
    sc["timing"] = {"period_ms": period_ms, "jitter": 0.1}
    sc["telemetry"] = {"batch_ms": 10.0}
    sc["fault"] = [
        {
            "kind": "crash",
            "agents": [k],
            "start_s": t_crash,
            "restart_after_s": down,
            "restart_state": "last",
        }
    ]
    out = tmp_path / "run"
    watcher = EventWatcher(out)
    watcher.start()
    try:
        result = run_swarm(processes, out, sc)
    finally:
        watcher.done.set()
        watcher.join(5.0)
    assert not watcher.errors, watcher.errors
    run_dir = result.run_dir
    ev = events(run_dir)
    names = [e["event"] for e in ev]
    crash = next(e for e in ev if e["event"] == "crash")
    restart = next(e for e in ev if e["event"] == "restart")
    rejoined = next(e for e in ev if e["event"] == "agent-rejoined")
    # in order in the file and on the clock
    order = [names.index(n) for n in ("crash", "restart", "agent-rejoined", "stop")]
    assert order == sorted(order), names
    times = [crash["t_s"], restart["t_s"], rejoined["t_s"], ev[-1]["t_s"]]
    assert times == sorted(times), times
    assert ev[-1]["event"] == "stop" and names.count("crash") == 1
    assert "agent-lost" not in names and "agent-failed" not in names, names
    assert crash["agent"] == k and crash["epoch"] == 0 and crash["signal"] == "SIGKILL"
    # not before its time (how late depends on the machine's load: order, not latency)
    assert t_crash <= crash["t_s"], crash
    assert restart["t_s"] >= crash["t_s"] + down, (crash, restart)

    # the killed process really was gone, and the new one ran
    old_pid, new_pid = crash["pid"], rejoined["pid"]
    assert watcher.crashed.get(old_pid) is not None, f"pid {old_pid} still ran 2 s after SIGKILL"
    assert watcher.rejoined == {new_pid: True}, watcher.rejoined
    assert new_pid != old_pid
    run_json = json.loads((run_dir / "run.json").read_text())
    entry = next(a for a in run_json["agents"] if a["id"] == k)
    assert entry["epoch"] == 1 and entry["pid"] == new_pid, entry
    assert rejoined["agent"] == k and rejoined["epoch"] == 1 and rejoined["state"] == "last"

    # the new incarnation starts from the last state the coordinator had of the old one
    mine = samples(run_dir, k)
    old = [s for s in mine if s[0] == 0]
    new = [s for s in mine if s[0] == 1]
    assert old and new
    assert new[0][1] == rejoined["start_iteration"] == old[-1][1]
    assert new[0][3] == old[-1][3]
    assert final_report(run_dir, k, epoch=1)["iteration"] > new[0][1]

    # its neighbours kept iterating while it was down
    for j in (1, 3):
        theirs = [(it, t) for ep, it, t, _ in samples(run_dir, j)]
        # it sampled before the crash and after the rejoin: it ran through the downtime
        assert any(t <= crash["t_s"] for _it, t in theirs), j
        assert any(t >= rejoined["t_s"] for _it, t in theirs), j
        during = [(it, t) for it, t in theirs if crash["t_s"] <= t <= rejoined["t_s"]]
        assert during, j
        span = during[-1][1] - during[0][1]
        grown = during[-1][0] - during[0][0]
        # it took steps while its neighbour was down (one blocked on the dead agent takes
        # none); how many depends on the machine's load, so only "some" is asked
        assert grown >= MOVED, (j, grown, span)

        # Nothing from the old epoch was accepted once it was dead: its counters at the
        # neighbour stop moving after the crash (anything late would count as rejected).
        after = [
            c for t, _it, c in snapshots(run_dir, j, k, sender_epoch=0) if t >= crash["t_s"] + 0.05
        ]
        assert after, j
        assert len({c["delivered"] for c in after}) == 1, (j, after[0], after[-1])
        assert len({c["received"] - c["rejected"] for c in after}) == 1, (j, after[0], after[-1])
        report = final_report(run_dir, j)
        old_c = in_counters(report, k, sender_epoch=0)
        new_c = in_counters(report, k, sender_epoch=1)
        assert old_c["delivered"] == after[0]["delivered"]
        assert old_c["received"] == (
            old_c["delivered"] + old_c["dropped_injected"] + old_c["rejected"] + old_c["held"]
        ), old_c
        # the new epoch counts apart, from its own sequence number 0, refused nothing
        assert new_c["first_seq"] == 0 and new_c["rejected"] == 0, new_c
        assert new_c["delivered"] >= MOVED, new_c
    # every link, to and from the agent of two incarnations, accounts for what was sent
    for link, row in link_rows(run_dir).items():
        assert row["sent"] == (
            row["delivered"]
            + row["dropped_injected"]
            + row["lost_transport"]
            + row["rejected"]
            + row["in_flight"]
        ), (link, row)

    # and the run kept its time budget of 2 s: the restart does not start a new one for
    # the new incarnation, which would have stepped until rejoin + 2 s (at least 3 s here);
    # it stopped with the others, before the stop event (order, not latency)
    last = max(t for _ep, _it, t, _x in new)
    assert last <= ev[-1]["t_s"], (last, ev[-1])


def test_pause_stalls_an_agent_and_slow_divides_its_rate(processes, tmp_path):
    paused, slowed, factor = 1, 3, 4.0
    t_pause, pause_len = 0.4, 0.4
    t_slow, slow_len = 0.9, 0.6
    # 4 ms: a period a loaded two-core machine still keeps for four agents
    period_ms = 4.0
    sc = base("straggler", agents=4, mode="async", seconds=2.0)
    sc["timing"] = {"period_ms": period_ms, "jitter": 0.1}
    sc["telemetry"] = {"every_iterations": 1, "batch_ms": 20.0}
    sc["fault"] = [
        {"kind": "pause", "agents": [paused], "start_s": t_pause, "duration_s": pause_len},
        {
            "kind": "slow",
            "agents": [slowed],
            "start_s": t_slow,
            "duration_s": slow_len,
            "factor": factor,
        },
    ]
    result = run_swarm(processes, tmp_path / "run", sc)
    ev = events(result.run_dir)
    pause = next(e for e in ev if e["event"] == "pause")
    resume = next(e for e in ev if e["event"] == "resume")
    slows = [e for e in ev if e["event"] == "slow"]
    assert pause["signal"] == "SIGSTOP" and resume["signal"] == "SIGCONT"
    assert pause["agent"] == resume["agent"] == paused
    # not before its time: the resume is sent once the window has passed, however late
    # the pause itself landed on a loaded machine
    assert pause["t_s"] >= t_pause and resume["t_s"] >= t_pause + pause_len, (pause, resume)
    assert [(e["agent"], e["factor"]) for e in slows] == [(slowed, factor), (slowed, 1.0)]

    # The paused agent took no step while stopped. Its samples are stamped when it steps;
    # the pause event is stamped after SIGSTOP was sent and SIGCONT is sent no earlier than
    # the window's end, so no sample can fall between the two (a 2 ms allowance for the
    # clock's resolution). This holds however loaded the machine is.
    mine = [(it, t) for ep, it, t, _ in samples(result.run_dir, paused) if ep == 0]
    eps = 0.002
    stepped = [s for s in mine if pause["t_s"] + eps < s[1] < t_pause + pause_len - eps]
    assert not stepped, f"steps while stopped: {stepped[:3]}"
    before = [s for s in mine if s[1] <= pause["t_s"] + eps]
    after = [s for s in mine if s[1] >= t_pause + pause_len - eps]
    assert before and after
    # and it lost no iteration: the first one after equals the last one before plus one
    assert after[0][0] - before[-1][0] == 1, (before[-1], after[0])
    # while the others went on
    other = [(it, t) for ep, it, t, _ in samples(result.run_dir, 0) if ep == 0]
    grown = [it for it, t in other if pause["t_s"] <= t <= t_pause + pause_len]
    assert grown and grown[-1] - grown[0] >= MOVED, grown[-1:] + grown[:1]

    # metrics.csv sees the straggler: late in the pause (the others have passed it by then)
    # the slowest iteration is the stopped agent's, standing still
    with (result.run_dir / "metrics.csv").open() as f:
        grid = [(float(r["t_s"]), int(r["iteration_min"])) for r in csv.DictReader(f)]
    half = 0.5 * (pause["t_s"] + t_pause + pause_len)
    stalled = {m for t, m in grid if half < t < t_pause + pause_len - eps}
    assert stalled == {before[-1][0]}, (stalled, before[-1])

    # slow: while the factor holds, the agent steps no faster than the slowed period. The
    # node keeps an absolute schedule and catches up at most 10 periods after a late step
    # (node/_runtime.py), so in any stretch of length T it takes at most T / period + 11
    # steps: an upper bound that load cannot break (a loaded machine only makes steps
    # later). The factor applies when the directive reaches the agent, some time after the
    # "slow" event was stamped: the stretch starts at its first step interval at or above
    # the slowed period.
    def stamps(agent: int, t0: float, t1: float) -> np.ndarray:
        return np.array(
            [t for ep, _it, t, _ in samples(result.run_dir, agent) if ep == 0 and t0 <= t < t1]
        )

    def intervals(agent: int, t0: float, t1: float) -> np.ndarray:
        return np.diff(stamps(agent, t0, t1))

    on, off = slows[0]["t_s"], slows[1]["t_s"]
    slowed_period = period_ms * factor * (1.0 - 0.1) / 1e3  # jitter 0.1 shortens by <= 10 %
    ts = stamps(slowed, on, off)
    during = np.diff(ts)
    first = int(np.argmax(during >= slowed_period - eps))
    assert during[first] >= slowed_period - eps, "the factor was never applied"
    t_app = ts[first]
    steps = len(ts) - first
    assert steps >= 5, (first, len(ts))
    assert steps <= (off - t_app) / slowed_period + 11, (steps, off - t_app, slowed_period)
    # and the factor does not outlive its window: after it, the agent steps faster than
    # the slowed period again (median; a factor still in force would keep every step at
    # or above it)
    back = intervals(slowed, off + 0.05, 2.0)
    assert len(back) >= 5 and np.median(back) < slowed_period, (np.median(back), slowed_period)
    # a neighbour of the slowed agent keeps its own pace in async mode: it is not held to
    # the slowed period
    neighbour = intervals(0, on, off)
    assert np.median(neighbour) < slowed_period, (np.median(neighbour), slowed_period)


def test_link_fault_windows_hold_across_a_restart(processes, tmp_path):
    """A restarted agent keeps the run's clock for its in-link faults: one armed from the
    start (outage 1 -> 2 over [0, 1.8) s) and one sent as a directive (outage 3 -> 2 over
    [0.2, 1.8) s) both still hold when it comes back at about 0.75 s, and both end at 1.8 s."""
    k, t_end, period_ms, seconds = 2, 1.8, 2.0, 2.5
    sc = base("restart-windows", agents=4, mode="async", seconds=seconds)
    sc["timing"] = {"period_ms": period_ms, "jitter": 0.1}
    sc["telemetry"] = {"batch_ms": 10.0}
    sc["fault"] = [
        {"kind": "outage", "links": {"from": 1, "to": k}, "start_s": 0.0, "duration_s": t_end},
        {"kind": "outage", "links": {"from": 3, "to": k}, "start_s": 0.2, "duration_s": 1.6},
        {
            "kind": "crash",
            "agents": [k],
            "start_s": 0.4,
            "restart_after_s": 0.3,
            "restart_state": "last",
        },
    ]
    result = run_swarm(processes, tmp_path / "run", sc)
    run_dir = result.run_dir
    rejoined = next(e for e in events(run_dir) if e["event"] == "agent-rejoined")
    assert rejoined["t_s"] < t_end - 0.3, rejoined  # the test needs time inside the window
    margin = 2 * period_ms / 1e3
    # every problem is collected, so that one run shows all of them
    problems = []
    for src in (1, 3):
        snaps = snapshots(run_dir, k, src, sender_epoch=0, epoch=1)
        inside = [c["delivered"] for t, _it, c in snaps if t < t_end - margin]
        after = [c["delivered"] for t, _it, c in snaps if t >= t_end + margin]
        assert inside and after, (src, len(snaps))
        if max(inside) != 0:
            problems.append(f"{src} -> {k}: {max(inside)} delivered inside the outage")
        final = in_counters(final_report(run_dir, k, epoch=1), src)
        if final["dropped_injected"] == 0:
            problems.append(f"{src} -> {k}: nothing dropped after the restart")
        if after[-1] - max(inside) < MOVED:
            problems.append(
                f"{src} -> {k}: delivery did not resume after the outage ended "
                f"({max(inside)} delivered before {t_end} s, {after[-1]} at the end)"
            )
    assert not problems, "\n".join(problems)


@pytest.mark.parametrize("kind", ["crash", "pause", "slow"])
def test_process_faults_given_by_iterations_act_at_those_iterations(processes, tmp_path, kind):
    """The scenario accepts start_iteration (and duration_iterations) for process faults;
    the coordinator must then act when the agent has reached that iteration. It learns an
    agent's iteration from telemetry (every 10 ms here, 5 iterations), so up to 100
    iterations late is accepted."""
    k, lo, length, late = 2, 300, 200, 100
    fault: dict[str, Any] = {"kind": kind, "agents": [k], "start_iteration": lo}
    if kind == "pause":
        fault["duration_iterations"] = length
    if kind == "slow":
        fault.update(factor=3.0, duration_iterations=length)
    sc = base(f"by-iteration-{kind}", agents=4, mode="async", iterations=800)
    sc["timing"] = {"period_ms": 2.0, "jitter": 0.1}
    sc["telemetry"] = {"every_iterations": 1, "batch_ms": 10.0}
    sc["fault"] = [fault]
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    result = coordinator.run(sc, out=out)
    assert result.exit_code == 0, result.summary["exit"]
    ev = events(result.run_dir)
    mine = [(it, t) for ep, it, t, _ in samples(result.run_dir, k) if ep == 0]

    def iteration_at(t_s: float) -> int:
        return max([it for it, t in mine if t <= t_s], default=0)

    acts = [e for e in ev if e["event"] == kind]
    assert acts, [e["event"] for e in ev]
    at = iteration_at(acts[0]["t_s"])
    assert lo - 1 <= at < lo + late, f"{kind} at iteration {at}, asked for {lo}"
    if kind == "slow":
        assert [e["factor"] for e in acts] == [3.0, 1.0], acts
        end = iteration_at(acts[1]["t_s"])
        assert lo + length - 1 <= end < lo + length + late, f"slow lifted at iteration {end}"
    if kind == "pause":
        resume = [e for e in ev if e["event"] == "resume"]
        assert resume and resume[0]["t_s"] > acts[0]["t_s"], ev
