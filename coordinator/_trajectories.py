"""Per-agent trajectories from a run directory's telemetry, as one labelled pandas table."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from coordinator._rundir import read_telemetry

__all__ = ["TRAJECTORY_COLUMNS", "read_trajectories"]

#: the columns every trajectory table starts with; x_0 ... x_{d-1} (the state), then
#: p_0 ... p_{n-1} (the priority vector, for algorithms that keep one) follow
TRAJECTORY_COLUMNS = ("agent", "epoch", "iteration", "t_s", "local_value")


def read_trajectories(run_dir: str | Path) -> pd.DataFrame:
    """Every telemetry sample of a run, one row per sample of one agent.

    Columns: ``agent``, ``epoch`` (the incarnation: 0, then 1 after a restart, ...),
    ``iteration``, ``t_s`` (seconds since the run's go, on the coordinator's clock, the time
    base of metrics.csv and events.jsonl), ``local_value`` (the agent's own objective at its
    state), ``x_0`` ... ``x_{d-1}`` and, when the algorithm keeps priorities,
    ``p_0`` ... ``p_{n-1}``. Rows are sorted by agent, then time. A run whose coordinator
    was killed still reads: a torn last batch is skipped.

    Works on run directories written by every engine (processes, lockstep, batch) and on
    files written before telemetry keys were strings.

    >>> df = read_trajectories("runs/dock-rendezvous-20250101T000000Z")  # doctest: +SKIP
    >>> df[df.agent == 3].plot(x="t_s", y=["x_0", "x_1"])  # doctest: +SKIP
    """
    run_dir = Path(run_dir)
    tel = run_dir / "telemetry"
    if not tel.is_dir():
        raise FileNotFoundError(f"{run_dir}: no telemetry/ folder; is this a run directory?")
    rows: list[dict[str, Any]] = []
    for path in sorted(tel.glob("agent-*.msgpack")):
        agent = int(path.stem.split("-", 1)[1])
        for batch in read_telemetry(path):
            if not batch.get("samples"):
                continue
            t0 = float(batch.get("t_go") or 0.0) + float(batch.get("offset") or 0.0)
            epoch = int(batch.get("epoch", 0))
            for iteration, t_node, x, priorities, value, _row in batch["samples"]:
                row: dict[str, Any] = {
                    "agent": agent,
                    "epoch": epoch,
                    "iteration": int(iteration),
                    "t_s": float(t_node) - t0,
                    "local_value": float(value),
                }
                row.update({f"x_{k}": float(v) for k, v in enumerate(x)})
                if priorities is not None:
                    row.update({f"p_{k}": float(v) for k, v in enumerate(priorities)})
                rows.append(row)
    if not rows:
        return pd.DataFrame(columns=list(TRAJECTORY_COLUMNS))
    df = pd.DataFrame(rows)
    state = sorted((c for c in df.columns if c.startswith("x_")), key=lambda c: int(c[2:]))
    prio = sorted((c for c in df.columns if c.startswith("p_")), key=lambda c: int(c[2:]))
    df = df[[*TRAJECTORY_COLUMNS, *state, *prio]]
    return df.sort_values(["agent", "t_s", "iteration"], kind="stable").reset_index(drop=True)
