"""Test hosts: lab machines made of Linux network namespaces, and an OpenSSH server in them.

``Lab`` builds one namespace per machine plus a "switch" namespace holding a bridge; each
machine has one interface ``eth0`` (a veth pair whose other end is a bridge port) with an
address in 10.213.0.0/24. The test's own namespace is never touched: nothing here adds an
interface, an address or a route outside the lab, so all traffic stays inside it. Names
carry a random suffix, so parallel test sessions never meet.

Teardown (``Lab.close``) kills every process in every namespace (``ip netns pids``) and
deletes the namespaces, whether the test passed or not. If namespaces cannot be made, the
test fails with the reason (``ip``'s own error): nothing is skipped.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import signal
import subprocess
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import pytest

__all__ = ["SUBNET", "Lab", "Machine", "SshServer"]

#: a private range (RFC 1918) no lab here uses; each lab is its own set of namespaces
SUBNET = "10.213.0"


def ip(*args: str) -> str:
    """Run ``ip ARGS``; a failure fails the test with ip's own message."""
    try:
        r = subprocess.run(["ip", *args], capture_output=True, text=True, timeout=30)
    except FileNotFoundError:
        pytest.fail("the ip command (iproute2) is not installed; .ci/run installs it")
    if r.returncode != 0:
        pytest.fail(f"ip {' '.join(args)} failed (status {r.returncode}): {r.stderr.strip()}")
    return r.stdout


@dataclass
class Machine:
    """One lab machine: a namespace with one interface eth0 on the lab's bridge."""

    name: str
    ns: str
    address: str
    started: list[subprocess.Popen] = field(default_factory=list)

    def command(self, *cmd: str) -> list[str]:
        """``cmd`` run inside this machine."""
        return ["ip", "netns", "exec", self.ns, *cmd]

    def start(self, *cmd: str, **kw) -> subprocess.Popen:
        """Start ``cmd`` inside this machine, in a session of its own."""
        kw.setdefault("stdout", subprocess.PIPE)
        kw.setdefault("stderr", subprocess.PIPE)
        p = subprocess.Popen(self.command(*cmd), start_new_session=True, text=True, **kw)
        self.started.append(p)
        return p

    def run(self, *cmd: str, timeout: float = 60.0) -> subprocess.CompletedProcess:
        return subprocess.run(self.command(*cmd), capture_output=True, text=True, timeout=timeout)

    def pids(self) -> set[int]:
        """Every process in this machine's namespace (ip netns pids)."""
        return {int(p) for p in ip("netns", "pids", self.ns).split()}

    def link(self, state: str) -> None:
        """Take this machine's only interface ``down`` or bring it ``up``."""
        ip("-n", self.ns, "link", "set", "eth0", state)


class Lab:
    """Machines ``names`` in namespaces on one bridge; ``lab[name]`` is a Machine."""

    def __init__(self, names: Sequence[str]) -> None:
        self.suffix = secrets.token_hex(3)
        self.switch = f"sr{self.suffix}-sw"
        self.machines: dict[str, Machine] = {}
        self.namespaces: list[str] = []
        try:
            self._add_ns(self.switch)
            ip("-n", self.switch, "link", "set", "lo", "up")
            ip("-n", self.switch, "link", "add", "br0", "type", "bridge")
            ip("-n", self.switch, "link", "set", "br0", "up")
            for k, name in enumerate(names):
                ns = f"sr{self.suffix}-{name}"
                self._add_ns(ns)
                port = f"p{k}"
                ip("link", "add", "eth0", "netns", ns, "type", "veth", "peer", "name", port,
                   "netns", self.switch)  # fmt: skip
                ip("-n", self.switch, "link", "set", port, "master", "br0")
                ip("-n", self.switch, "link", "set", port, "up")
                address = f"{SUBNET}.{k + 1}"
                ip("-n", ns, "addr", "add", f"{address}/24", "dev", "eth0")
                ip("-n", ns, "link", "set", "eth0", "up")
                ip("-n", ns, "link", "set", "lo", "up")
                self.machines[name] = Machine(name, ns, address)
        except BaseException:
            self.close()
            raise

    def _add_ns(self, ns: str) -> None:
        ip("netns", "add", ns)
        self.namespaces.append(ns)

    def __getitem__(self, name: str) -> Machine:
        return self.machines[name]

    def close(self) -> list[str]:
        """Kill every process in the lab, delete the namespaces; what had to be killed."""
        killed: list[str] = []
        for m in self.machines.values():
            for p in m.started:
                with contextlib.suppress(Exception):
                    os.killpg(p.pid, signal.SIGKILL)
        for ns in self.namespaces:
            for _ in range(50):
                r = subprocess.run(["ip", "netns", "pids", ns], capture_output=True, text=True)
                pids = [int(p) for p in r.stdout.split()]
                if not pids:
                    break
                for pid in pids:
                    with contextlib.suppress(Exception):
                        killed.append(Path(f"/proc/{pid}/cmdline").read_text().replace("\0", " "))
                    with contextlib.suppress(ProcessLookupError):
                        os.kill(pid, signal.SIGKILL)
                time.sleep(0.05)
        for m in self.machines.values():
            for p in m.started:
                with contextlib.suppress(Exception):
                    p.communicate(timeout=5)
        for ns in reversed(self.namespaces):
            subprocess.run(["ip", "netns", "del", ns], capture_output=True)
        self.namespaces = []
        return killed


class SshServer:
    """An OpenSSH server on one machine with throwaway keys in ``tmp``.

    Its own config file, host key and authorized keys; it listens on the machine's address
    only and runs in the foreground (-D) logging to stderr (-e). ``client_options`` are the
    ssh options that log in to it with the throwaway client key and its pinned host key.
    """

    def __init__(self, machine: Machine, tmp: Path, accept_env: str = "") -> None:
        self.machine = machine
        tmp.mkdir(parents=True, exist_ok=True)
        self.tmp = tmp
        for key in ("host_key", "client_key"):
            subprocess.run(
                ["ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-f", str(tmp / key)],
                check=True,
                capture_output=True,
            )
        (tmp / "authorized_keys").write_text((tmp / "client_key.pub").read_text())
        host_pub = (tmp / "host_key.pub").read_text().split()
        (tmp / "known_hosts").write_text(f"{machine.address} {host_pub[0]} {host_pub[1]}\n")
        config = tmp / "sshd_config"
        config.write_text(
            "\n".join(
                [
                    f"ListenAddress {machine.address}:22",
                    f"HostKey {tmp / 'host_key'}",
                    f"AuthorizedKeysFile {tmp / 'authorized_keys'}",
                    "PidFile none",
                    "StrictModes no",  # the keys live in a test's temporary directory
                    "PubkeyAuthentication yes",
                    "PasswordAuthentication no",
                    "KbdInteractiveAuthentication no",
                    "PermitRootLogin prohibit-password",
                    "UsePAM no",
                    "X11Forwarding no",
                    "AllowTcpForwarding no",
                    *([f"AcceptEnv {accept_env}"] if accept_env else []),
                    "LogLevel INFO",
                    "",
                ]
            )
        )
        # Debian's sshd insists on its privilege separation directory.
        os.makedirs("/run/sshd", mode=0o755, exist_ok=True)
        sshd = "/usr/sbin/sshd"
        if not os.path.exists(sshd):
            pytest.fail("OpenSSH server not installed (Debian package openssh-server)")
        self.proc = machine.start(sshd, "-D", "-e", "-f", str(config))
        deadline = time.monotonic() + 30.0
        while not self._listening():
            if self.proc.poll() is not None:
                pytest.fail(f"sshd did not start: {self.proc.stderr.read()}")  # type: ignore[union-attr]
            if time.monotonic() > deadline:
                pytest.fail(f"sshd on {machine.address}:22 is not listening after 30 s")
            time.sleep(0.05)

    def _listening(self) -> bool:
        r = self.machine.run("ss", "-Hltn", f"src {self.machine.address}:22")
        return r.returncode == 0 and bool(r.stdout.strip())

    def client_options(self, *extra: str) -> list[str]:
        return [
            "-F",
            "none",
            "-i",
            str(self.tmp / "client_key"),
            "-o",
            "IdentitiesOnly=yes",
            "-o",
            f"UserKnownHostsFile={self.tmp / 'known_hosts'}",
            "-o",
            "StrictHostKeyChecking=yes",
            *extra,
        ]

    @property
    def destination(self) -> str:
        return f"root@{self.machine.address}"
