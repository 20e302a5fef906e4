"""A real swarm end to end: processes, sockets, run directory, honest figures."""

from __future__ import annotations

import csv
import json
import os
import signal
import time
from pathlib import Path

import networkx as nx
import numpy as np
import psutil
import pytest

import coordinator
import topologies as topo
from coordinator._rundir import read_telemetry
from tests.run_dir_spec import MESSAGE_KEYS, RUN_FILES, SUMMARY_KEYS

pytestmark = pytest.mark.integration


def finals(run_dir: Path, n: int) -> np.ndarray:
    """Every agent's final state, read back from its raw telemetry file."""
    xs = []
    for i in range(n):
        batches = read_telemetry(run_dir / "telemetry" / f"agent-{i}.msgpack")
        last = [b for b in batches if "final" in b][-1]
        xs.append(last["final"]["state"]["x"])
    return np.asarray(xs, dtype=float)


def assert_no_fault_accounting(summary: dict, links_csv: Path) -> None:
    m = summary["messages"]
    assert m["lost_transport"] == 0, m
    assert m["dropped_injected"] == 0 and m["rejected"] == 0, m
    assert m["sent"] == m["delivered"] + m["in_flight"], m
    with links_csv.open() as f:
        for row in csv.DictReader(f):
            sent, deliv, fl = int(row["sent"]), int(row["delivered"]), int(row["in_flight"])
            assert int(row["lost_transport"]) == 0, row
            assert sent == deliv + fl, row


def test_demo_from_the_cli(processes, tmp_path):
    out = tmp_path / "demo"
    p = processes.start("run", "--out", str(out), "--quiet", "--json")
    stdout, stderr = p.communicate(timeout=120)
    assert p.returncode == 0, stderr
    summary = json.loads(stdout)
    for name in RUN_FILES:
        assert (out / name).exists(), name
    assert json.loads((out / "summary.json").read_text()) == summary
    for key in SUMMARY_KEYS:
        assert key in summary, key
    for key in MESSAGE_KEYS:
        assert key in summary["messages"], key
    assert summary["mode"] == "rounds" and 10 <= summary["agents"] <= 16
    # the README's tolerance: every buoy's own gap below 1e-3 of max(|F_star|, 1)
    threshold = 1e-3 * max(abs(summary["F_star"]), 1.0)
    assert summary["final_gap"] < threshold and summary["worst_agent_gap"] < threshold
    assert summary["exit"] == "budget" and summary["verdict"] == "reached tolerance"
    assert_no_fault_accounting(summary, out / "links.csv")
    run = json.loads((out / "run.json").read_text())
    assert len(run["agents"]) == summary["agents"]
    assert all(a["pid"] for a in run["agents"])
    with (out / "metrics.csv").open() as f:
        rows = list(csv.DictReader(f))
    assert rows and float(rows[-1]["gap"]) < float(rows[0]["gap"])
    # agents.json alone is enough to recompute the optimum (closed form for quadratics)
    agents = json.loads((out / "agents.json").read_text())
    Q = [np.asarray(a["objective"]["curvature"]) for a in agents]
    t = [np.asarray(a["objective"]["target"]) for a in agents]
    x_star = np.linalg.solve(sum(Q), sum(q @ ti for q, ti in zip(Q, t, strict=True)))
    np.testing.assert_allclose(summary["x_star"], x_star, rtol=1e-12, atol=1e-12)


def test_rounds_mode_lands_on_the_dgd_fixed_point(processes, tmp_path):
    n, alpha = 12, 0.1
    out = tmp_path / "ring"
    processes.watch_run_dir(out)
    scenario = {
        "swarm": {
            "name": "ring-fixed-point",
            "agents": n,
            "dimension": 1,
            "seed": 11,
            "mode": "rounds",
            "iterations": 400,
        },
        "topology": {"shape": "ring"},
        "objective": {"kind": "quadratic", "spread": 5.0},
        "algorithm": {"name": "dgd", "step": alpha},
    }
    result = coordinator.run(scenario, out=out)
    assert result.exit_code == 0, result.summary["exit"]
    agents = json.loads((out / "agents.json").read_text())
    b = np.array([a["objective"]["target"][0] for a in agents])
    assert all(a["objective"]["curvature"] == [[1.0]] for a in agents)
    # Metropolis–Hastings weights recomputed here (Xiao, Boyd, Lall 2005): 1/3 on a ring
    G = nx.cycle_graph(n)
    W = np.zeros((n, n))
    for i, j in G.edges():
        W[i, j] = W[j, i] = 1.0 / (1 + max(G.degree[i], G.degree[j]))
    W += np.diag(1.0 - W.sum(axis=1))
    # exact fixed point of DGD for f_i = 1/2 (x - b_i)^2 (methods.md, derived)
    x_star = alpha * np.linalg.solve((1 + alpha) * np.eye(n) - W, b)
    x = finals(out, n)[:, 0]
    assert np.max(np.abs(x - x_star)) < 1e-8
    assert abs(x_star.mean() - b.mean()) < 1e-12
    assert_no_fault_accounting(result.summary, out / "links.csv")
    assert result.summary["messages"]["in_flight"] == 0  # rounds: every round was consumed
    assert result.summary["messages"]["sent"] == 2 * n * 400


def test_graph_facts_match_networkx_and_numpy():
    info = coordinator.check(
        {
            "swarm": {"name": "facts", "agents": 12, "seed": 4, "iterations": 10},
            "topology": {"shape": "ring"},
        }
    )
    g = info["graph"]
    G = nx.cycle_graph(12)
    lap = np.sort(nx.laplacian_spectrum(G))
    assert g["n"] == 12 and g["max_degree"] == 2
    assert abs(g["algebraic_connectivity"] - lap[1]) < 1e-12
    assert abs(g["laplacian_max"] - lap[-1]) < 1e-12
    W = topo.metropolis_weights(topo.build("ring", 12, seed=4))
    ev = np.sort(np.linalg.eigvalsh(W))
    rho = max(abs(ev[0]), abs(ev[-2]))  # Xiao & Boyd, Systems & Control Letters 53 (2004)
    assert abs(g["metropolis"]["rho"] - rho) < 1e-12


def _wait_running(run_dir: Path, n: int, timeout: float = 120.0) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            run = json.loads((run_dir / "run.json").read_text())
        except (FileNotFoundError, json.JSONDecodeError):
            time.sleep(0.05)
            continue
        if run.get("exit") == "running" and all(a["pid"] for a in run["agents"]):
            return run
        time.sleep(0.05)
    raise AssertionError(f"{run_dir}: the swarm never reported running")


def _wait_for_samples(run_dir: Path, n: int, timeout: float = 120.0) -> None:
    """Until every agent's telemetry file holds a sample: the run phase has begun for all.

    (``timeout`` only keeps a broken run from hanging the suite; nothing is timed.)
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        files = [run_dir / "telemetry" / f"agent-{i}.msgpack" for i in range(n)]
        if all(f.exists() and any(b.get("samples") for b in read_telemetry(f)) for f in files):
            return
        time.sleep(0.05)
    raise AssertionError(f"{run_dir}: not every agent reported a telemetry sample")


def _long_scenario(path: Path, n: int) -> Path:
    path.write_text(
        f"""
[swarm]
name = "long-watch"
agents = {n}
dimension = 2
seed = 5
mode = "async"
seconds = 60.0

[topology]
shape = "ring"

[timing]
period_ms = 2.0
"""
    )
    return path


def test_agents_die_with_a_killed_coordinator(processes, tmp_path):
    n = 8
    out = tmp_path / "run"
    p = processes.start(
        "run", str(_long_scenario(tmp_path / "long.toml", n)), "--out", str(out), "--quiet"
    )
    run = _wait_running(out, n)
    processes.swarm_group(out)
    pids = [a["pid"] for a in run["agents"]]
    assert all(psutil.pid_exists(pid) for pid in pids)
    _wait_for_samples(out, n)  # mid-run: every agent is iterating
    os.kill(p.pid, signal.SIGKILL)
    # The agents must go by themselves (parent-death signal, then the heartbeat timeout of
    # 3 s); the long guard only keeps a broken chain from hanging the suite.
    deadline = time.monotonic() + 60.0
    alive = pids
    while time.monotonic() < deadline:
        alive = [pid for pid in pids if _alive(pid)]
        if not alive:
            break
        time.sleep(0.05)
    assert not alive, f"agents {alive} outlived their coordinator"
    # what the coordinator wrote before it died is readable
    assert json.loads((out / "run.json").read_text())["exit"] == "running"


def _alive(pid: int) -> bool:
    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


def test_a_killed_agent_ends_the_run_with_a_clear_reason(processes, tmp_path):
    n = 6
    out = tmp_path / "run"
    p = processes.start(
        "run", str(_long_scenario(tmp_path / "long.toml", n)), "--out", str(out), "--quiet"
    )
    run = _wait_running(out, n)
    processes.swarm_group(out)
    victim = run["agents"][3]["pid"]
    _wait_for_samples(out, n)  # mid-run, and metrics.csv will have samples from before
    os.kill(victim, signal.SIGKILL)
    _, stderr = p.communicate(timeout=30)
    assert p.returncode == 3, stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit"] == "agent 3 died unexpectedly (killed by signal 9)"
    assert summary["verdict"] == "failed"
    final = json.loads((out / "run.json").read_text())
    assert final["exit"] == summary["exit"] and final["stopped_utc"]
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]
    lost = [e for e in events if e["event"] == "agent-lost"]
    assert lost and lost[0]["agent"] == 3 and lost[0]["pid"] == victim
    with (out / "metrics.csv").open() as f:
        assert list(csv.DictReader(f)), "metrics.csv has the samples recorded before the loss"
    for a in final["agents"]:
        assert not _alive(a["pid"]), a


def test_python_api_returns_summary_and_series(processes, tmp_path):
    out = tmp_path / "api"
    processes.watch_run_dir(out)
    result = coordinator.run(
        {
            "swarm": {
                "name": "api",
                "agents": 4,
                "dimension": 2,
                "seed": 1,
                "mode": "rounds",
                "iterations": 200,
            },
            "topology": {"shape": "path"},
        },
        out=out,
    )
    assert result.run_dir == out and result.exit_code == 0
    assert result.summary == json.loads((out / "summary.json").read_text())
    with (out / "metrics.csv").open() as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == len(result.metrics)
    assert [round(float(r["gap"]), 12) for r in rows] == [
        round(m["gap"], 12) for m in result.metrics
    ]
