"""How much faster the lockstep engine runs a scenario than real agent processes.

Runs one rounds-mode scenario twice, as a multi-process run (one OS process per agent) and
with the in-process lockstep engine, and prints the agent iterations per second of both run
phases, the whole wall time of both, the speed-up, and the largest difference between the
two engines' final states (which should be 0: they run the same core on the same plans).

    python tests/bench/bench_lockstep.py                  # 32-agent ring, 2000 rounds
    python tests/bench/bench_lockstep.py --agents 64 --iterations 1000 --loss 0.2 --json

A benchmark script, not a test: nothing here is collected by pytest.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

import coordinator
from coordinator._lockstep import execute_lockstep
from coordinator._run import RunOptions, RunResult
from coordinator._rundir import read_telemetry


def bench_scenario(
    agents: int, iterations: int, shape: str, algorithm: str, loss: float
) -> dict[str, Any]:
    """The scenario both engines run (telemetry as the defaults would sample it)."""
    sc: dict[str, Any] = {
        "swarm": {
            "name": f"bench-lockstep-{shape}-{agents}",
            "agents": agents,
            "dimension": 2,
            "seed": 1,
            "iterations": iterations,
        },
        "topology": {"shape": shape},
        "objective": {"kind": "quadratic"},
        "algorithm": {"name": algorithm, "step": 0.05},
    }
    if loss > 0.0:
        sc["fault"] = [{"kind": "loss", "links": "all", "rate": loss}]
    return sc


def _finals(run_dir: Path, n: int) -> np.ndarray:
    xs = []
    for i in range(n):
        batches = read_telemetry(run_dir / "telemetry" / f"agent-{i}.msgpack")
        xs.append([b["final"] for b in batches if "final" in b][-1]["state"]["x"])
    return np.asarray(xs, dtype=float)


def _figures(res: RunResult) -> dict[str, Any]:
    s = res.summary
    return {
        "exit": s["exit"],
        "iterations_total": s["iterations_total"],
        "run_s": s["run_s"],
        "wall_s": s["wall_s"],
        "startup_s": s["startup_s"],
        "iterations_per_s": s["iterations_per_s"],
    }


def compare(
    agents: int = 32,
    iterations: int = 2000,
    *,
    shape: str = "ring",
    algorithm: str = "dgd",
    loss: float = 0.0,
) -> dict[str, Any]:
    """Run the scenario with both engines; the figures of both and the speed-ups.

    ``speedup_iterations_per_s`` compares run phases only (agent iterations per second);
    ``speedup_wall`` compares the whole calls, start-up and results included.
    """
    sc = bench_scenario(agents, iterations, shape, algorithm, loss)
    root = Path(tempfile.mkdtemp(prefix="swarmrig-bench-lockstep-"))
    try:
        real = coordinator.run(sc, out=root / "processes")
        lock = execute_lockstep(coordinator.load(sc), RunOptions(out=root / "lockstep"))
        for name, res in (("processes", real), ("lockstep", lock)):
            if res.exit_code != 0:
                raise RuntimeError(f"the {name} run failed: {res.summary['exit']}")
        diff = float(
            np.max(np.abs(_finals(root / "lockstep", agents) - _finals(root / "processes", agents)))
        )
    finally:
        shutil.rmtree(root, ignore_errors=True)
    p, q = _figures(real), _figures(lock)
    return {
        "scenario": {
            "agents": agents,
            "iterations": iterations,
            "shape": shape,
            "algorithm": algorithm,
            "loss": loss,
        },
        "processes": p,
        "lockstep": q,
        "speedup_iterations_per_s": q["iterations_per_s"] / p["iterations_per_s"],
        "speedup_wall": p["wall_s"] / q["wall_s"],
        "max_final_difference": diff,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--agents", type=int, default=32)
    ap.add_argument("--iterations", type=int, default=2000)
    ap.add_argument("--shape", default="ring")
    ap.add_argument("--algorithm", default="dgd")
    ap.add_argument("--loss", type=float, default=0.0, help="loss rate on every link")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args(argv)
    res = compare(
        args.agents, args.iterations, shape=args.shape, algorithm=args.algorithm, loss=args.loss
    )
    if args.json:
        print(json.dumps(res, indent=2))
        return 0
    sc = res["scenario"]
    print(
        f"{sc['agents']}-agent {sc['shape']}, {sc['algorithm']}, {sc['iterations']} rounds,"
        f" loss {sc['loss']:g}"
    )
    for name in ("processes", "lockstep"):
        f = res[name]
        print(
            f"  {name:9s}  {f['iterations_per_s']:12,.0f} agent-iterations/s"
            f"   run {f['run_s']:7.2f} s   wall {f['wall_s']:7.2f} s"
        )
    print(
        f"  speed-up   {res['speedup_iterations_per_s']:.1f}x (run phase)"
        f"   {res['speedup_wall']:.1f}x (wall)"
        f"   largest final-state difference {res['max_final_difference']:.3g}"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
