"""What this machine can hold, checked before anything starts; defaults scaled to it.

Three limits decide how many agent processes fit here, each read now:

- memory: psutil's available memory divided by what one agent costs (:data:`AGENT_BYTES`),
- processes: ``ulimit -u`` (RLIMIT_NPROC) counts every thread of the user; each agent is a
  process with ZeroMQ's I/O and reaper threads beside its own (:data:`AGENT_THREADS`),
- file descriptors: the coordinator holds one control connection per agent, and each agent
  a few descriptors per neighbour (``ulimit -n``, RLIMIT_NOFILE, applies to each process).

:func:`default_heartbeat_timeout` scales the agents' heartbeat rule to the swarm and the
machine, and :func:`wave_size` bounds how many agents are in start-up at once.
"""

from __future__ import annotations

import os
import resource
from dataclasses import dataclass

import psutil

from topologies._errors import ScenarioError

__all__ = [
    "AGENT_BYTES",
    "AGENT_THREADS",
    "Capacity",
    "CapacityError",
    "capacity",
    "check_capacity",
    "cores",
    "default_heartbeat_timeout",
    "wave_size",
]

#: Private memory of one agent process, forked from the warm fork server (numpy, pyzmq,
#: msgpack already imported and shared copy-on-write). Measured with psutil: the USS of each
#: agent of a running 16-agent async ring on this project's 2-core machine was 7.3-7.9 MiB
#: (RSS 62 MiB, mostly shared). 20 MiB is that with a margin of our own (no source) for
#: larger dimensions, more links and the pages a long run dirties.
AGENT_BYTES = 20 * 2**20
#: Threads of one agent: its own, and ZeroMQ's I/O thread and reaper.
AGENT_THREADS = 3
#: Descriptors an agent holds besides its data links (control socket, ZeroMQ's internal
#: signalling pipes, log file, standard streams): common-practice margin, no source.
AGENT_FDS_BASE = 32
#: Descriptors per data link (a SUB or PUB connection and its signalling): common-practice
#: margin, no source.
FDS_PER_LINK = 4
#: Memory the machine keeps for everything else (the coordinator, the system).
RESERVE_BYTES = 512 * 2**20


class CapacityError(ScenarioError):
    """The scenario asks for more agents than this machine can hold."""


def cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def default_heartbeat_timeout(agents: int, n_cores: int | None = None) -> float:
    """max(3 s, 0.1 s per agent per core): 3 s up to 60 agents on 2 cores, 6.4 s for 128,
    12.8 s for 256. A loaded machine forks, hands out plans and answers pings more slowly
    the more agents share each core; a timeout fixed at 3 s lost 128-agent swarms."""
    return max(3.0, 0.1 * agents / (n_cores or cores()))


def wave_size(n_cores: int | None = None) -> int:
    """Agents forked at once during start-up: 16 per core (the next wave when these have
    said hello), so start-up never has hundreds of interpreters fighting for two cores."""
    return 16 * (n_cores or cores())


@dataclass(frozen=True, slots=True)
class Capacity:
    agents: int
    #: the limit that decides it, in words, and every limit's own figure
    reasons: tuple[str, ...]


def _limit(which: int) -> int | None:
    soft, _hard = resource.getrlimit(which)
    return None if soft == resource.RLIM_INFINITY else int(soft)


def capacity(max_degree: int) -> Capacity:
    """How many agents (each with up to ``max_degree`` links in and out) fit here now."""
    figures: list[tuple[int, str]] = []
    avail = psutil.virtual_memory().available - RESERVE_BYTES
    by_memory = max(0, avail // AGENT_BYTES)
    figures.append(
        (
            by_memory,
            f"memory: {max(avail, 0) / 2**30:.1f} GiB available (after {RESERVE_BYTES >> 20}"
            f" MiB kept) / {AGENT_BYTES >> 20} MiB per agent = {by_memory}",
        )
    )
    nproc = _limit(resource.RLIMIT_NPROC)
    if nproc is not None:
        try:
            used = sum(p.num_threads() for p in psutil.process_iter() if _same_user(p))
        except psutil.Error:
            used = 0
        by_proc = max(0, (nproc - used - 16) // AGENT_THREADS)
        figures.append(
            (
                by_proc,
                f"processes: ulimit -u {nproc}, {used} threads in use, {AGENT_THREADS} per"
                f" agent = {by_proc}",
            )
        )
    nofile = _limit(resource.RLIMIT_NOFILE)
    if nofile is not None:
        per_agent = AGENT_FDS_BASE + FDS_PER_LINK * 2 * max_degree
        if per_agent > nofile:
            figures.append((0, f"file descriptors: ulimit -n {nofile} < {per_agent} per agent"))
        by_fd = max(0, nofile - 64)  # the coordinator: one control connection per agent
        figures.append(
            (by_fd, f"file descriptors: ulimit -n {nofile}, one per agent at the coordinator")
        )
    best = min(figures)
    return Capacity(agents=int(best[0]), reasons=tuple(f for _, f in figures))


def _same_user(p: psutil.Process) -> bool:
    try:
        return p.uids().real == os.getuid()
    except psutil.Error:
        return False


def check_capacity(agents: int, max_degree: int, source: str = "the scenario") -> None:
    """Refuse, before anything starts, a swarm larger than this machine can hold."""
    cap = capacity(max_degree)
    if agents > cap.agents:
        raise CapacityError(
            f"{source}: [swarm].agents = {agents}, but this machine can hold {cap.agents}"
            " agent processes now (" + "; ".join(cap.reasons) + "). Use fewer agents, the"
            " lockstep or batch engine (one process), or --inventory to spread them over"
            " several machines"
        )
