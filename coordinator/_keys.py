"""``swarmrig keys``: make the key material of a swarm, and pick out what one host needs.

``make`` writes one CURVE key pair for the coordinator and one per agent (``agent-<id>``)
or per host (``--host NAME=IDS``), and the allow-list ``allow.toml`` that says which key
each agent id must present. Secret key files are created with mode 0600 in a directory of
mode 0700; see :mod:`node._security` for the layout and how the files are checked.
"""

from __future__ import annotations

import os
import re
import shutil
import time
from collections.abc import Iterable, Mapping
from pathlib import Path

import zmq.auth

from node._security import (
    ALLOW_FILE,
    COORDINATOR_KEY,
    KeyMaterialError,
    read_allow_list,
    read_secret,
)

__all__ = ["make_keys", "pack_keys", "parse_host_spec"]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


def parse_host_spec(spec: str) -> tuple[str, list[int]]:
    """``"rover-a=0,1,2"`` or ``"lab-pc=3-8"`` -> ("rover-a", [0, 1, 2])."""
    name, sep, ids = spec.partition("=")
    if not sep or not _NAME.match(name) or name == COORDINATOR_KEY:
        raise KeyMaterialError(
            f"--host {spec!r}: expected NAME=IDS, e.g. rover-a=0,1,2 or lab-pc=3-8 "
            f"(NAME: letters, digits, '.', '_', '-'; not {COORDINATOR_KEY!r})"
        )
    out: list[int] = []
    for part in ids.split(","):
        lo, dash, hi = part.strip().partition("-")
        if not lo.isdigit() or (dash and not hi.isdigit()):
            raise KeyMaterialError(f"--host {spec!r}: {part!r} is not an id or a range a-b")
        out.extend(range(int(lo), int(hi) + 1) if dash else [int(lo)])
    return name, out


def _owners(agents: int | None, hosts: Iterable[str]) -> dict[str, list[int]]:
    owners: dict[str, list[int]] = {}
    for spec in hosts:
        name, ids = parse_host_spec(spec)
        if name in owners:
            raise KeyMaterialError(f"--host {name}: given twice")
        owners[name] = ids
    taken: dict[int, str] = {}
    for name, ids in owners.items():
        for i in ids:
            if i in taken:
                raise KeyMaterialError(f"agent {i} is in --host {taken[i]} and --host {name}")
            taken[i] = name
    if agents is not None:
        if agents < 1:
            raise KeyMaterialError("--agents must be at least 1")
        for i in range(agents):
            if i not in taken:
                owners[f"agent-{i}"] = [i]
    if not owners:
        raise KeyMaterialError("say which agents need keys: --agents N and/or --host NAME=IDS")
    return owners


def _toml_allow(coordinator: bytes, keys: Mapping[str, bytes], agents: Mapping[int, str]) -> str:
    lines = [
        f"# swarmrig allow-list, made {time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime())}.",
        "# Public keys only: copy this file to every machine of the swarm.",
        "# An agent id missing from [agents] cannot join; a key missing from [keys] is refused.",
        f'coordinator = "{coordinator.decode()}"',
        "",
        "[keys]  # key name -> public key (Z85)",
    ]
    lines += [f'"{name}" = "{pub.decode()}"' for name, pub in keys.items()]
    lines += ["", "[agents]  # agent id -> the key it must present"]
    lines += [f'"{i}" = "{name}"' for i, name in sorted(agents.items())]
    return "\n".join(lines) + "\n"


def make_keys(
    directory: Path | str, *, agents: int | None = None, hosts: Iterable[str] = ()
) -> Path:
    """Write a fresh swarm's key material into ``directory`` (new or empty); return it."""
    directory = Path(directory)
    owners = _owners(agents, hosts)
    if directory.exists() and any(directory.iterdir()):
        raise KeyMaterialError(
            f"{directory}: not empty; keys are never overwritten (choose a new directory)"
        )
    directory.mkdir(parents=True, exist_ok=True)
    os.chmod(directory, 0o700)
    old = os.umask(0o077)  # secret files are born private; no window where others can read
    try:
        public = {}
        for name in [COORDINATOR_KEY, *owners]:
            pub_file, _ = zmq.auth.create_certificates(directory, name)
            public[name] = read_secret(directory / f"{name}.key_secret")[0]
            os.chmod(pub_file, 0o644)
        coordinator = public.pop(COORDINATOR_KEY)
        by_agent = {i: name for name, ids in owners.items() for i in ids}
        path = directory / ALLOW_FILE
        path.write_text(_toml_allow(coordinator, public, by_agent))
        os.chmod(path, 0o644)
    finally:
        os.umask(old)
    read_allow_list(directory)  # what we wrote must read back
    return directory


def pack_keys(directory: Path | str, out: Path | str, agents: Iterable[int]) -> list[Path]:
    """Copy what a host running ``agents`` needs into ``out``: allow.toml, the coordinator's
    public key and the secret key(s) of those agents, nothing else. Returns the files."""
    directory, out = Path(directory), Path(out)
    allow = read_allow_list(directory)
    names = []
    for i in agents:
        if i not in allow.agents:
            raise KeyMaterialError(f"{allow.path}: [agents] lists no key for agent {i}")
        if allow.agents[i] not in names:
            names.append(allow.agents[i])
    if not names:
        raise KeyMaterialError("name the agents this host runs (--agents 3,4)")
    out.mkdir(parents=True, exist_ok=True)
    os.chmod(out, 0o700)
    written = [out / ALLOW_FILE]
    shutil.copyfile(allow.path, out / ALLOW_FILE)
    os.chmod(out / ALLOW_FILE, 0o644)
    for name in names:
        src = directory / f"{name}.key_secret"
        read_secret(src)  # refuse to spread a loose or broken key
        dst = out / f"{name}.key_secret"
        fd = os.open(dst, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "wb") as f:
            f.write(src.read_bytes())
        os.chmod(dst, 0o600)
        written.append(dst)
    return written
