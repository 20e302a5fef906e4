"""``swarmrig salvage RUN_DIR``: finish a run directory whose coordinator died.

The coordinator writes every telemetry batch to ``telemetry/agent-N.msgpack`` as it comes,
so a coordinator killed with SIGKILL (or a run abandoned by a third Ctrl-C) leaves the
agents' trajectories on disk, but no metrics.csv, links.csv, final_states.json or
summary.json. This rebuilds the swarm from the directory's own scenario.toml, reads the
telemetry back into the coordinator's records and writes those files with the same code a
finished run uses. The results are marked: run.json gets ``"recovered"`` (when, by what,
from which phase) and summary.json ``"recovered": true``; the verdict is "failed" (the run
did not end as planned), and times are counted from the telemetry (wall_s and startup_s
from the handshake time in run.json when it is there).
"""

from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path
from typing import Any

import psutil

from coordinator._metrics import AgentRecord
from coordinator._rundir import read_telemetry
from topologies._errors import SwarmrigError

__all__ = ["SalvageRefused", "salvage"]

#: exit code the salvaged results carry (the run did not end as planned)
_LOST = 3


class SalvageRefused(SwarmrigError):
    """Not a run directory, a finished one, or one whose coordinator still runs."""


def _run_json(d: Path) -> dict[str, Any]:
    path = d / "run.json"
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise SalvageRefused(f"{d}: no run.json, so this is not a run directory") from None
    except (OSError, ValueError) as exc:
        raise SalvageRefused(f"{path}: cannot be read as JSON ({exc})") from None


def _coordinator_alive(run: dict[str, Any]) -> int | None:
    """The pid of the run's coordinator if it still runs on this host."""
    c = run.get("coordinator") or {}
    pid = c.get("pid")
    if not isinstance(pid, int) or c.get("host") != socket.gethostname() or pid == os.getpid():
        return None
    try:
        cmd = " ".join(psutil.Process(pid).cmdline())
    except (psutil.NoSuchProcess, psutil.AccessDenied, psutil.ZombieProcess):
        return None
    return pid if ("swarmrig" in cmd or "coordinator" in cmd) else None


def _records(path: Path, agent: int) -> list[AgentRecord]:
    """One agent's incarnations from its telemetry file, as the coordinator kept them."""
    recs: dict[int, AgentRecord] = {}
    for batch in read_telemetry(path):
        if not isinstance(batch, dict) or "epoch" not in batch:
            continue
        epoch = int(batch["epoch"])
        rec = recs.setdefault(epoch, AgentRecord(agent=agent, epoch=epoch))
        if "final" in batch:
            final = batch["final"]
            rec.final = final
            rec.links = final.get("links", rec.links)
            rec.counters = final.get("counters", rec.counters)
            continue
        rec.offset = off = float(batch.get("offset", 0.0))
        t0 = float(batch.get("t_go", 0.0))
        for s in batch.get("samples", []):
            rec.samples.append((int(s[0]), float(s[1]) - off - t0, s[2], s[3], s[4], s[5]))
        rec.links = batch.get("links", rec.links)
        rec.counters = batch.get("counters", rec.counters)
    out = [recs[e] for e in sorted(recs)]
    for r in out:
        r.alive = r.final is not None  # an incarnation without a final report did not end
    return out


def salvage(run_dir: Path) -> dict[str, Any]:
    """Write metrics.csv, links.csv, final_states.json and summary.json of ``run_dir`` from
    its telemetry; returns the summary. Refuses a finished run and a live coordinator."""
    from coordinator._api import load
    from coordinator._run import Coordinator, RunOptions

    d = Path(run_dir)
    run = _run_json(d)
    if run.get("phase") == "done" or (
        "phase" not in run and run.get("exit") not in ("running", "starting")
    ):
        raise SalvageRefused(
            f"{d}: run.json says the run finished (exit {run.get('exit')!r}); nothing to salvage"
        )
    pid = _coordinator_alive(run)
    if pid is not None:
        raise SalvageRefused(f"{d}: its coordinator (pid {pid}) is still running")
    if not (d / "scenario.toml").is_file():
        raise SalvageRefused(f"{d}: no scenario.toml, so the swarm cannot be rebuilt")
    swarm = load(d / "scenario.toml")
    coord = Coordinator(swarm, RunOptions(out=d, label=run.get("label"), launch_local=False))
    for a in coord.agents:
        tel = d / "telemetry" / f"agent-{a.id}.msgpack"
        if tel.is_file():
            a.records = _records(tel, a.id)
            a.epoch = a.records[-1].epoch if a.records else -1
    end = coord.final_time() or 0.0
    handshake = run.get("handshake_s")
    # the coordinator's clock is gone: count from its go time, 0 here
    coord.clock = lambda: end  # type: ignore[method-assign]
    has_samples = any(r.samples for a in coord.agents for r in a.records)
    coord.t_go = 0.0 if has_samples or handshake is not None else None
    coord.t_launch = -float(handshake) if handshake is not None else 0.0
    coord.t_end = end
    phase = run.get("phase") or run.get("exit")
    coord.exit_reason = f"coordinator lost while {phase}; recovered from telemetry"
    coord.exit_code = _LOST
    coord.event(
        "salvaged", phase=phase, agents_with_telemetry=sum(bool(a.records) for a in coord.agents)
    )
    result = coord.results()
    summary = {**result.summary, "recovered": True}
    coord.dir.write_json("summary.json", summary)
    now = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    run.update(
        exit=coord.exit_reason if run.get("exit") != "abandoned" else "abandoned; recovered",
        exit_code=run.get("exit_code", _LOST),
        verdict=summary.get("verdict"),
        stopped_utc=run.get("stopped_utc") or None,
        recovered={"by": "swarmrig salvage", "utc": now, "from_phase": phase},
        phase="done",
    )
    coord.dir.write_json("run.json", run)
    coord.dir.close()
    return summary
