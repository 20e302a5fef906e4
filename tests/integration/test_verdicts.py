"""Verdicts and comparisons a user reads first: diverged, baseline, a broken objective."""

from __future__ import annotations

import json

import pytest

import coordinator

pytestmark = pytest.mark.integration


def _scenario(name: str, **over) -> dict:
    sc = {
        "swarm": {
            "name": name,
            "agents": 5,
            "dimension": 2,
            "seed": 1,
            "mode": "rounds",
            "iterations": 400,
        },
        "topology": {"shape": "ring"},
        "algorithm": {"name": "dgd", "step": 0.1},
    }
    for k, v in over.items():
        sc[k] = v
    return sc


def test_a_blown_up_run_stops_with_verdict_diverged_naming_the_agent(processes, tmp_path):
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    # DGD on unit quadratics is stable only for step < 1 + lambda_min(W) (methods.md): 3 is not
    result = coordinator.run(_scenario("blow-up", algorithm={"name": "dgd", "step": 3.0}), out=out)
    s = result.summary
    assert s["verdict"] == "diverged"
    assert s["exit"].startswith("diverged: agent ") and "iteration" in s["exit"]
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines()]
    failed = [e for e in events if e["event"] == "agent-failed"]
    assert failed and f"agent {failed[0]['agent']} " in s["exit"]


def test_baseline_puts_both_runs_side_by_side(processes, tmp_path):
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    processes.watch_run_dir(out / "baseline")
    sc = _scenario("with-loss", fault=[{"kind": "loss", "links": "all", "rate": 0.4}])
    result = coordinator.run(sc, out=out, baseline=True)
    s = json.loads((out / "summary.json").read_text())
    assert s == json.loads(json.dumps(result.summary))
    b = json.loads((out / "baseline" / "summary.json").read_text())
    assert b["messages"]["dropped_injected"] == 0 and s["messages"]["dropped_injected"] > 0
    for key in ("final_gap", "final_consensus_error", "time_to_tolerance_s"):
        pair = s["with_and_without_faults"][key]
        assert pair == {"with_faults": s[key], "without_faults": b[key]}, key
    assert s["baseline"]["final_gap"] == b["final_gap"]


@pytest.mark.parametrize(
    ("function", "says"),
    [
        ("tests.plugins.objectives:explode", "raised RuntimeError: sensor model not calibrated"),
        ("tests.plugins.objectives:not_a_number", "non-finite"),
    ],
)
def test_a_broken_objective_is_refused_naming_agent_and_function(
    processes, tmp_path, function, says
):
    scenario = tmp_path / "s.toml"
    scenario.write_text(
        '[swarm]\nagents = 4\nseed = 1\n[topology]\nshape = "ring"\n'
        f'[objective]\nkind = "custom"\nfunction = "{function}"\n'
    )
    p = processes.start("run", str(scenario), "--out", str(tmp_path / "run"), "--quiet")
    _, stderr = p.communicate(timeout=60)
    assert p.returncode == 2, stderr
    assert "agent 0" in stderr and function in stderr and says in stderr, stderr
    assert not (tmp_path / "run").exists()  # refused before anything started


def test_a_working_user_objective_runs(processes, tmp_path):
    out = tmp_path / "run"
    processes.watch_run_dir(out)
    result = coordinator.run(
        _scenario(
            "bowl", objective={"kind": "custom", "function": "tests.plugins.objectives:bowl"}
        ),
        out=out,
    )
    assert result.summary["x_star"] == pytest.approx([1.0, 1.0], abs=1e-8)
    assert result.summary["verdict"] == "reached tolerance"
