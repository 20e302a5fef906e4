"""Fixtures shared by every test: process ownership and the no-orphans guarantee.

Every test that starts agents does so through :func:`processes` (a subprocess coordinator
via ``processes.start(...)``) or through the Python API (``processes.watch_run_dir(dir)``).
Teardown kills each process group it learned of, whether the test passed or not; a
session-wide check then fails the run if any swarmrig process is still alive.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import psutil
import pytest

MARKERS = ("node._forkserver", "swarmrig node", "coordinator.cli")
#: every process this test session starts inherits this tag in its environment, so the
#: session checks (and kills) its own processes only, never those of a parallel session
SESSION_TAG = "SWARMRIG_TEST_SESSION"
os.environ.setdefault(SESSION_TAG, f"{os.getpid()}-{time.time_ns()}")


def swarmrig_processes() -> list[psutil.Process]:
    """Live processes of this session: fork servers, their agents, CLI coordinators."""
    me = os.getpid()
    tag = os.environ[SESSION_TAG]
    found = []
    for p in psutil.process_iter(["pid", "cmdline", "status"]):
        try:
            if p.info["pid"] == me or p.info["status"] == psutil.STATUS_ZOMBIE:
                continue
            cmd = " ".join(p.info["cmdline"] or [])
            if any(m in cmd for m in MARKERS) and p.environ().get(SESSION_TAG) == tag:
                found.append(p)
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            continue
    return found


def _kill_group(pgid: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(pgid, signal.SIGKILL)


class Processes:
    """Owns every process group a test creates."""

    def __init__(self) -> None:
        self.groups: set[int] = set()
        self.run_dirs: list[Path] = []
        self.popen: list[subprocess.Popen] = []

    def start(self, *args: str, **kw) -> subprocess.Popen:
        """Start ``swarmrig ARGS`` as a coordinator in a session (and group) of its own."""
        p = subprocess.Popen(
            [sys.executable, "-m", "coordinator.cli", *args],
            start_new_session=True,
            stdout=kw.pop("stdout", subprocess.PIPE),
            stderr=kw.pop("stderr", subprocess.PIPE),
            text=True,
            **kw,
        )
        self.groups.add(p.pid)
        self.popen.append(p)
        return p

    def watch_run_dir(self, path: Path) -> None:
        """The swarm's own group is in run.json as soon as the fork server is up."""
        self.run_dirs.append(Path(path))

    def swarm_group(self, path: Path, timeout: float = 20.0) -> int:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with contextlib.suppress(FileNotFoundError, json.JSONDecodeError):
                pgid = json.loads((Path(path) / "run.json").read_text()).get("process_group")
                if pgid:
                    self.groups.add(int(pgid))
                    return int(pgid)
            time.sleep(0.02)
        raise AssertionError(f"{path}/run.json never named the swarm's process group")

    def teardown(self) -> None:
        for d in self.run_dirs:
            with contextlib.suppress(Exception):
                pgid = json.loads((d / "run.json").read_text()).get("process_group")
                if pgid:
                    self.groups.add(int(pgid))
        for g in self.groups:
            _kill_group(g)
        for p in self.popen:
            with contextlib.suppress(Exception):
                p.kill()
                p.communicate(timeout=5)


@pytest.fixture
def processes() -> Iterator[Processes]:
    owner = Processes()
    try:
        yield owner
    finally:
        owner.teardown()


@pytest.fixture(scope="session", autouse=True)
def no_orphans_at_the_end() -> Iterator[None]:
    before = {p.pid for p in swarmrig_processes()}
    yield
    deadline = time.monotonic() + 5.0
    left: list[psutil.Process] = []
    while time.monotonic() < deadline:
        left = [p for p in swarmrig_processes() if p.pid not in before]
        if not left:
            return
        time.sleep(0.1)
    desc = []
    for p in left:
        with contextlib.suppress(psutil.Error):
            desc.append(f"{p.pid}: {' '.join(p.cmdline())}")
        with contextlib.suppress(psutil.Error):
            p.kill()
    pytest.fail("processes left behind by the tests:\n" + "\n".join(desc), pytrace=False)
