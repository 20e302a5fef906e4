"""The lockstep engine in one process: closed forms, determinism, refusals, run directory."""

from __future__ import annotations

import csv
import io
import json
import signal
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from rich.console import Console
from scipy import stats

import coordinator
from coordinator._lockstep import (
    ROUNDS_PER_FLUSH,
    LockstepCoordinator,
    _Member,
    execute_lockstep,
)
from coordinator._run import RunFailed, RunOptions, RunResult
from coordinator._rundir import read_telemetry
from coordinator._view import LiveView
from node._dgd import DGD
from node._errors import ObjectiveError
from tests.run_dir_spec import MESSAGE_KEYS, RUN_FILES, SUMMARY_KEYS
from topologies._errors import ScenarioError

#: summary figures that measure this process's speed, not the run
REAL_TIME_KEYS = ("wall_s", "startup_s", "run_s", "iterations_per_s", "run_dir")


def scenario(
    n: int = 8,
    *,
    seed: int = 5,
    iterations: int = 300,
    algorithm: str = "dgd",
    step: float = 0.05,
    faults: list[dict[str, Any]] | None = None,
    dimension: int = 2,
    every: int = 10,
) -> dict[str, Any]:
    return {
        "swarm": {
            "name": "lockstep",
            "agents": n,
            "dimension": dimension,
            "seed": seed,
            "iterations": iterations,
        },
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 10.0},
        "algorithm": {"name": algorithm, "step": step},
        "timing": {"period_ms": 1.0},
        "telemetry": {"every_iterations": every},
        "fault": faults or [],
    }


def run(sc: dict[str, Any], out: Path, **options: Any) -> RunResult:
    return execute_lockstep(coordinator.load(sc), RunOptions(out=out, **options))


def final_batches(run_dir: Path, n: int) -> list[dict[str, Any]]:
    out = []
    for i in range(n):
        batches = read_telemetry(run_dir / "telemetry" / f"agent-{i}.msgpack")
        finals = [b["final"] for b in batches if "final" in b]
        assert len(finals) == 1, f"agent {i}: {len(finals)} final reports in its telemetry"
        out.append(finals[0])
    return out


def final_states(run_dir: Path, n: int) -> np.ndarray:
    return np.array([f["state"]["x"] for f in final_batches(run_dir, n)])


def samples(run_dir: Path, n: int) -> list[list[Any]]:
    out = []
    for i in range(n):
        for b in read_telemetry(run_dir / "telemetry" / f"agent-{i}.msgpack"):
            out.extend(b.get("samples", []))
    return out


def links_by_edge(result: RunResult) -> dict[tuple[int, int], dict[str, Any]]:
    return {(int(r["from"]), int(r["to"])): r for r in result.links}


def ring_metropolis(n: int) -> np.ndarray:
    """Metropolis–Hastings weights on the n-ring, from scratch (Xiao, Boyd, Lall 2005)."""
    a = np.zeros((n, n))
    for i in range(n):
        a[i, (i + 1) % n] = a[(i + 1) % n, i] = 1.0
    deg = a.sum(axis=1)
    w = np.where(a > 0, 1.0 / (1.0 + np.maximum.outer(deg, deg)), 0.0)
    np.fill_diagonal(w, 1.0 - w.sum(axis=1))
    return w


def targets(run_dir: Path) -> np.ndarray:
    agents = json.loads((run_dir / "agents.json").read_text())
    for a in agents:  # unit quadratics: the closed form below needs Q = I
        assert np.array_equal(
            np.asarray(a["objective"]["curvature"]), np.eye(len(a["initial_state"]))
        )
    return np.array([a["objective"]["target"] for a in agents])


def test_fault_free_dgd_lands_on_the_closed_form_fixed_point(tmp_path: Path) -> None:
    # methods.md [derived]: f_i = 1/2 |x - b_i|^2 gives x* = a((1 + a)I - W)^-1 b.
    n, alpha = 12, 0.1
    res = run(scenario(n, iterations=400, step=alpha), tmp_path / "run")
    assert res.exit_code == 0, res.summary["exit"]
    b = targets(tmp_path / "run")
    w = ring_metropolis(n)
    x_star = alpha * np.linalg.solve((1.0 + alpha) * np.eye(n) - w, b)
    x = final_states(tmp_path / "run", n)
    # the error contracts by (1 - alpha) per round: 0.9**400 ~ 5e-19 of the spread
    np.testing.assert_allclose(x, x_star, rtol=0, atol=1e-8)
    np.testing.assert_allclose(x.mean(axis=0), b.mean(axis=0), rtol=0, atol=1e-8)
    assert np.ptp(x_star, axis=0).min() > 0.1  # a real neighbourhood, not consensus
    assert res.summary["messages"]["sent"] == 2 * n * 400
    assert res.summary["messages"]["delivered"] == 2 * n * 400


FAULTS = [
    {"kind": "loss", "links": "all", "rate": 0.2},
    {"kind": "burst-loss", "links": {"edge": [2, 3]}, "p_enter": 0.1, "p_leave": 0.4},
    {"kind": "delay", "links": {"from": 4, "to": 5}, "ms": 2.5},
    {"kind": "duplicate", "links": {"to": 6}, "rate": 0.3},
]


def test_same_seed_repeats_exactly(tmp_path: Path) -> None:
    sc = scenario(seed=9, faults=FAULTS, algorithm="gradient-tracking")
    one = run(sc, tmp_path / "one")
    two = run(sc, tmp_path / "two")
    assert one.exit_code == two.exit_code == 0
    assert np.array_equal(final_states(one.run_dir, 8), final_states(two.run_dir, 8))
    assert samples(one.run_dir, 8) == samples(two.run_dir, 8)
    for name in ("links.csv", "metrics.csv", "agents.json", "scenario.toml"):
        assert (one.run_dir / name).read_text() == (two.run_dir / name).read_text(), name
    strip = {k: v for k, v in one.summary.items() if k not in REAL_TIME_KEYS}
    assert strip == {k: v for k, v in two.summary.items() if k not in REAL_TIME_KEYS}
    assert one.summary["messages"]["dropped_injected"] > 0


def test_another_seed_drops_other_messages(tmp_path: Path) -> None:
    n, iterations, rate = 8, 2000, 0.2
    faults = [{"kind": "loss", "links": "all", "rate": rate}]
    a = run(scenario(n, seed=1, iterations=iterations, faults=faults, every=100), tmp_path / "a")
    b = run(scenario(n, seed=2, iterations=iterations, faults=faults, every=100), tmp_path / "b")
    drops_a = [r["dropped_injected"] for r in a.links]
    drops_b = [r["dropped_injected"] for r in b.links]
    assert drops_a != drops_b
    assert not np.array_equal(final_states(a.run_dir, n), final_states(b.run_dir, n))
    # Each link's count is Binomial(iterations, rate): two-sided 1e-6 band (scipy.stats).
    lo, hi = stats.binom.interval(1 - 1e-6, iterations, rate)
    for r in (*a.links, *b.links):
        assert r["sent"] == iterations
        assert lo <= r["dropped_injected"] <= hi, r


@pytest.mark.parametrize(
    ("change", "key"),
    [
        ({"swarm": {"mode": "async", "seconds": 0.2}}, r"\[swarm\]\.mode"),
        ({"fault": [{"kind": "crash", "agents": [1], "start_s": 0.1}]}, r"\[\[fault\]\] #0: kind"),
        (
            {"fault": [{"kind": "pause", "agents": [1], "start_s": 0.1, "duration_s": 0.1}]},
            r"\[\[fault\]\] #0: kind",
        ),
        (
            {
                "fault": [
                    {"kind": "loss", "links": "all", "rate": 0.1},
                    {"kind": "slow", "agents": [2], "factor": 2.0},
                ]
            },
            r"\[\[fault\]\] #1: kind",
        ),
    ],
)
def test_refuses_what_it_cannot_model(tmp_path: Path, change: dict, key: str) -> None:
    sc = scenario()
    if "swarm" in change:
        sc["swarm"] = {**sc["swarm"], **change["swarm"]}
        del sc["swarm"]["iterations"]
    else:
        sc["fault"] = change["fault"]
    with pytest.raises(ScenarioError, match=key):
        run(sc, tmp_path / "run")
    assert not (tmp_path / "run").exists()  # refused before anything was written


def test_run_directory_is_complete(tmp_path: Path) -> None:
    res = run(scenario(faults=FAULTS), tmp_path / "run")
    d = res.run_dir
    for name in RUN_FILES:
        assert (d / name).exists(), name
    assert sorted(p.name for p in (d / "telemetry").glob("*.msgpack")) == sorted(
        f"agent-{i}.msgpack" for i in range(8)
    )
    summary = json.loads((d / "summary.json").read_text())
    for key in SUMMARY_KEYS:
        assert key in summary, key
    for key in MESSAGE_KEYS:
        assert key in summary["messages"], key
    assert summary["mode"] == "rounds" and summary["agents"] == 8
    assert summary["iterations_total"] == 8 * 300
    run_json = json.loads((d / "run.json").read_text())
    assert run_json["engine"] == "lockstep"
    assert run_json["process_group"] is None
    assert [a["pid"] for a in run_json["agents"]] == [None] * 8
    assert run_json["exit"] == "budget" and run_json["exit_code"] == 0
    with (d / "metrics.csv").open() as f:
        rows = list(csv.DictReader(f))
    assert [int(r["iteration_max"]) for r in rows] == list(range(0, 301, 10))
    # virtual time: the sample after step k is taken in round k, at k * period; the last row
    # is the final report's sample, taken where round 300 would start
    t_s = [float(r["t_s"]) for r in rows]
    assert t_s[1:-1] == [(i - 1) * 1e-3 for i in range(10, 300, 10)]
    assert t_s[-1] == 300 * 1e-3
    events = [json.loads(line) for line in (d / "events.jsonl").read_text().splitlines()]
    # faults armed from the start for the whole run: one fault-start each, seen at round 0
    assert [e["event"] for e in events] == ["go"] + ["fault-start"] * len(FAULTS) + ["stop"]
    starts = [e for e in events if e["event"] == "fault-start"]
    assert sorted(e["fault"] for e in starts) == list(range(len(FAULTS)))
    assert all(e["at_s"] == 0.0 and e["t_sample_s"] == 0.0 for e in starts)


def test_message_accounting_is_exact(tmp_path: Path) -> None:
    faults = [
        {"kind": "loss", "links": {"from": 0}, "rate": 0.3},
        {"kind": "delay", "links": {"from": 4, "to": 5}, "ms": 3.5},
        {"kind": "duplicate", "links": "all", "rate": 0.2},
        {"kind": "corrupt", "links": {"from": 2}, "rate": 0.25},
        {
            "kind": "outage",
            "links": {"from": 6, "to": 7},
            "start_iteration": 50,
            "duration_iterations": 30,
        },
    ]
    res = run(scenario(iterations=250, faults=faults), tmp_path / "run")
    total = dict.fromkeys(MESSAGE_KEYS, 0)
    for r in res.links:
        assert r["lost_transport"] == 0
        assert r["sent"] == 250
        assert r["sent"] == (
            r["delivered"]
            + r["dropped_injected"]
            + r["lost_transport"]
            + r["rejected"]
            + r["in_flight"]
        ), r
        for k in MESSAGE_KEYS:
            total[k] += r[k]
    m = res.summary["messages"]
    assert {k: m[k] for k in MESSAGE_KEYS} == total
    assert m["sent"] == m["delivered"] + m["dropped_injected"] + m["rejected"] + m["in_flight"]
    links = links_by_edge(res)
    # 3.5 ms on 1 ms rounds lags 3 rounds: the last 3 messages are still held at the stop
    assert links[4, 5]["in_flight"] == 3
    assert links[6, 7]["dropped_injected"] == 30
    assert links[2, 1]["rejected"] > 0 and links[2, 3]["rejected"] > 0
    assert m["duplicated"] > 0


def test_delay_lags_whole_rounds_like_a_numpy_recursion(tmp_path: Path) -> None:
    # DGD with reuse: neighbour j's newest visible value at step k is x_j(k - lag), and
    # before anything arrived the agent mixes its own x (node/_dgd.py's rule).
    n, iterations, alpha, lag = 6, 80, 0.1, 3
    faults = [{"kind": "delay", "links": "all", "ms": 3.5}]
    res = run(scenario(n, iterations=iterations, step=alpha, faults=faults), tmp_path / "run")
    b = targets(res.run_dir)
    w = ring_metropolis(n)
    hist = [np.zeros_like(b)]
    for k in range(iterations):
        x = hist[-1]
        new = np.empty_like(x)
        for i in range(n):
            mixed = w[i, i] * x[i]
            for j in sorted(np.flatnonzero(w[i]).tolist()):
                if j != i:
                    mixed = mixed + w[i, j] * (hist[k - lag][j] if k >= lag else x[i])
            new[i] = mixed - alpha * (x[i] - b[i])
        hist.append(new)
    np.testing.assert_allclose(final_states(res.run_dir, n), hist[-1], rtol=0, atol=1e-12)
    for r in res.links:  # virtual delays: lag * period
        assert r["delay_median_ms"] == pytest.approx(3.0) and r["delay_max_ms"] == pytest.approx(
            3.0
        )
        assert r["in_flight"] == lag


def test_time_windows_count_on_the_virtual_clock(tmp_path: Path) -> None:
    # Rounds at k * 1 ms; the window [0.1005, 0.2005) s covers rounds 101..200.
    faults = [
        {
            "kind": "loss",
            "links": {"from": 0, "to": 1},
            "rate": 1.0,
            "start_s": 0.1005,
            "duration_s": 0.1,
        }
    ]
    res = run(scenario(iterations=300, faults=faults), tmp_path / "run")
    links = links_by_edge(res)
    assert links[0, 1]["dropped_injected"] == 100
    assert sum(r["dropped_injected"] for r in res.links) == 100
    events = [json.loads(x) for x in (res.run_dir / "events.jsonl").read_text().splitlines()]
    sent = [(e["action"], e["t_s"]) for e in events if e["event"] == "fault-sent"]
    applied = [(e["action"], e["t_node_s"]) for e in events if e["event"] == "fault-applied"]
    assert [a for a, _ in sent] == ["add", "remove"]
    assert [t for _, t in sent] == pytest.approx([0.101, 0.201])
    assert [a for a, _ in applied] == ["add", "remove"]
    assert [t for _, t in applied] == pytest.approx([0.101, 0.201])


def test_seconds_budget_runs_the_rounds_before_it(tmp_path: Path) -> None:
    sc = scenario(iterations=0)
    del sc["swarm"]["iterations"]
    sc["swarm"]["seconds"] = 0.05
    sc["telemetry"] = {"every_iterations": 0, "every_ms": 10.0}
    res = run(sc, tmp_path / "run")
    assert res.exit_code == 0
    assert [f["iteration"] for f in final_batches(res.run_dir, 8)] == [50] * 8
    assert res.summary["messages"]["sent"] == 2 * 8 * 50


def test_divergence_stops_the_run_with_its_verdict(tmp_path: Path) -> None:
    # DGD is stable only for alpha < 1 + lambda_min(W) (methods.md); 3.0 is far past it.
    res = run(scenario(step=3.0, iterations=2000), tmp_path / "run")
    assert res.summary["verdict"] == "diverged"
    assert res.summary["exit"].startswith("diverged: agent")
    assert res.exit_code == 0
    events = [json.loads(x) for x in (res.run_dir / "events.jsonl").read_text().splitlines()]
    assert any(e["event"] == "agent-failed" for e in events)


def test_interrupt_stops_at_a_round_boundary_and_the_view_renders(tmp_path: Path) -> None:
    shown: list[str] = []
    view = LiveView(Console(file=io.StringIO(), width=120))

    def interrupt(coord: LockstepCoordinator) -> None:
        console = Console(file=io.StringIO(), width=120)
        console.print(view.render(coord))
        shown.append(console.file.getvalue())  # type: ignore[attr-defined]
        signal.raise_signal(signal.SIGINT)  # the coordinator's own handler takes it

    res = run(scenario(iterations=5000), tmp_path / "run", view=interrupt)
    assert res.exit_code == 130
    assert res.summary["verdict"] == "interrupted"
    assert res.summary["exit"] == "interrupted (SIGINT)"
    finals = final_batches(res.run_dir, 8)
    assert [f["iteration"] for f in finals] == [ROUNDS_PER_FLUSH] * 8
    assert {f["reason"] for f in finals} == {"interrupted (SIGINT)"}
    assert len(shown) == 1 and "lockstep" in shown[0] and "running" in shown[0]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # restored


def test_an_agent_that_raises_fails_the_run(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    step = DGD.step

    def faulty(self: DGD, state: Any, inbox: Any, k: int) -> Any:
        if self.spec.id == 2 and k == 7:
            raise ObjectiveError("agent 2: objective 'quadratic' returned a non-finite gradient")
        return step(self, state, inbox, k)

    monkeypatch.setattr(DGD, "step", faulty)
    res = run(scenario(iterations=100), tmp_path / "run")
    assert res.exit_code == 3
    assert res.summary["exit"].startswith("agent failure: agent 2: ObjectiveError:")
    assert res.summary["verdict"] == "failed"
    reports = {}
    for i in range(8):
        path = res.run_dir / "telemetry" / f"agent-{i}.msgpack"
        batches = read_telemetry(path) if path.exists() else []
        reports[i] = [b["final"] for b in batches if "final" in b]
    assert reports.pop(2) == []  # a failed agent sends no final report
    assert {f[0]["iteration"] for f in reports.values()} == {8}


def test_a_failed_set_up_stops_before_the_run(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    setup = _Member.setup

    def faulty(self: _Member, plan: Any) -> None:
        if self.agent == 3:
            raise RuntimeError("no such module")
        setup(self, plan)

    monkeypatch.setattr(_Member, "setup", faulty)
    res = run(scenario(), tmp_path / "run")
    assert res.exit_code == 3
    assert res.summary["exit"] == (
        "an agent failed during start-up: agent 3: RuntimeError: no such module"
    )
    assert res.summary["iterations_total"] == 0


def test_refuses_remote_agents(tmp_path: Path) -> None:
    with pytest.raises(RunFailed, match="launch_local"):
        run(scenario(), tmp_path / "run", launch_local=False)
    assert not (tmp_path / "run").exists()
