"""The inventory: which agents run on which lab machine, and how to reach it over ssh.

An inventory is a TOML file of our own (deploy/inventory.example.toml)::

    coordinator = "tcp://10.0.0.5:5570"     # the endpoint every agent joins
    listen = "tcp://0.0.0.0:5570"           # optional: what the coordinator binds

    [defaults]                              # optional: keys every [[host]] inherits
    python = "/opt/swarmrig/.venv/bin/python"

    [[host]]
    name = "rover-a"                        # a label for messages and run.json
    ssh = "lab@rover-a.local"               # the ssh destination
    agents = [0, 1, 2]
    python = "/usr/bin/python3"             # or venv = "/home/lab/swarmrig/.venv"
    ssh_options = ["-p", "2222"]            # optional, passed to ssh before its defaults
    keys = "/home/lab/rover-a-keys"         # with --keys: this host's packed key directory

``keys`` is the directory on that machine holding what ``swarmrig keys pack`` wrote for its
agents (allow.toml and their secret keys); a run with ``--keys`` needs it on every host, a
run without refuses it (see :meth:`Inventory.check_keys`).

Everything is checked before anything starts; each error names the file and the key.
"""

from __future__ import annotations

import ipaddress
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from topologies._errors import ScenarioError

__all__ = ["Host", "Inventory", "InventoryError", "load_inventory"]

_TOP_KEYS = ("coordinator", "listen", "defaults", "host")
_HOST_KEYS = ("name", "ssh", "agents", "python", "venv", "ssh_options", "keys")
_DEFAULT_KEYS = ("python", "venv", "ssh_options", "keys")
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,62}")
_TCP = re.compile(r"tcp://(?P<host>\[[0-9A-Fa-f:.]+\]|[^\s:/\[\]]+):(?P<port>[0-9]{1,5})")


class InventoryError(ScenarioError):
    """The inventory file is wrong; the message names the file and the key."""


@dataclass(frozen=True, slots=True)
class Host:
    """One lab machine of the inventory."""

    #: label used in messages, prefixes of streamed output and run.json
    name: str
    #: ssh destination ([user@]host), given to the system ssh client as it is
    ssh: str
    #: agent ids started on this machine
    agents: tuple[int, ...]
    #: interpreter on that machine (an absolute path, or "python3" from its PATH)
    python: str
    #: extra ssh arguments, placed before ours (ssh keeps the first value of an option)
    ssh_options: tuple[str, ...] = ()
    #: key directory on that machine (swarmrig keys pack), absolute or ~/...; None: no keys
    keys: str | None = None


@dataclass(frozen=True, slots=True)
class Inventory:
    """A validated inventory."""

    path: Path
    #: the control endpoint the agents join
    coordinator: str
    #: what the coordinator binds
    listen: str
    hosts: tuple[Host, ...]

    def host_of(self, agent: int) -> Host:
        for h in self.hosts:
            if agent in h.agents:
                return h
        raise KeyError(agent)

    def check_swarm(self, n: int, scenario_name: str, network: Mapping[str, Any]) -> None:
        """Every agent of the scenario has exactly one host, and the agents can be reached.

        Raises InventoryError (naming the inventory file) or ScenarioError (naming the
        scenario key) before anything starts.
        """
        src = self.path.name
        for h in self.hosts:
            extra = [i for i in h.agents if i >= n]
            if extra:
                raise InventoryError(
                    f"{src}: [[host]] name={h.name!r}: agents: {extra} are not agents of "
                    f"scenario {scenario_name!r} (its ids are 0..{n - 1})"
                )
        placed = {i for h in self.hosts for i in h.agents}
        missing = [i for i in range(n) if i not in placed]
        if missing:
            raise InventoryError(
                f"{src}: agents {missing} of scenario {scenario_name!r} have no [[host]]; "
                "every agent id must be in exactly one host's agents"
            )
        bind = str(network.get("host", "127.0.0.1"))
        if _is_loopback(bind):
            raise ScenarioError(
                f"scenario {scenario_name!r}: [network].host = {bind!r}: agents on other "
                f'machines cannot be reached on a loopback address; set host = "0.0.0.0" '
                f"(every interface) to run with the inventory {src}"
            )

    def check_keys(self, allow: Any | None) -> None:
        """Every host has a key directory when the run has keys, none when it has not.

        ``allow``: the coordinator's node._security.AllowList, or None for a run without
        keys. Raises InventoryError naming the file and the host.
        """
        src = self.path.name
        for h in self.hosts:
            if allow is None and h.keys is not None:
                raise InventoryError(
                    f"{src}: [[host]] name={h.name!r}: keys = {h.keys!r}, but this run has no "
                    "--keys; give --keys DIR (the directory of `swarmrig keys make`) or remove "
                    "keys from the inventory"
                )
            if allow is not None and h.keys is None:
                ids = ",".join(str(i) for i in h.agents)
                raise InventoryError(
                    f"{src}: [[host]] name={h.name!r}: keys: missing; a run with --keys needs "
                    f"each host's key directory: `swarmrig keys pack DIR OUT --agents {ids}`, "
                    "copy OUT to that machine and give its path as keys"
                )
            if allow is not None:
                missing = [i for i in h.agents if i not in allow.agents]
                if missing:
                    raise InventoryError(
                        f"{src}: [[host]] name={h.name!r}: agents {missing} have no key in "
                        f"{allow.path}"
                    )


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _endpoint(value: Any, where: str, *, bind: bool) -> str:
    if not isinstance(value, str) or not _TCP.fullmatch(value):
        example = "tcp://0.0.0.0:5570" if bind else "tcp://10.0.0.5:5570"
        raise InventoryError(f"{where}: expected a string tcp://HOST:PORT (e.g. {example!r})")
    port = int(_TCP.fullmatch(value).group("port"))  # type: ignore[union-attr]
    if not 0 < port < 65536:
        raise InventoryError(f"{where}: port {port} is not in 1..65535")
    return value


def _unknown(table: Mapping[str, Any], allowed: tuple[str, ...], where: str) -> None:
    for k in table:
        if k not in allowed:
            raise InventoryError(
                f"{where}: unknown key {k!r} (expected one of {', '.join(allowed)})"
            )


def _abs_path(value: Any, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InventoryError(f"{where}: expected a path (a non-empty string)")
    if not PurePosixPath(value).is_absolute() and "/" in value:
        raise InventoryError(f"{where}: {value!r}: give an absolute path on that machine")
    return value


def _python(table: Mapping[str, Any], where: str) -> str | None:
    if "python" in table and "venv" in table:
        raise InventoryError(f"{where}: give python or venv, not both")
    if "python" in table:
        return _abs_path(table["python"], f"{where}: python")
    if "venv" in table:
        venv = _abs_path(table["venv"], f"{where}: venv")
        if not venv.startswith("/"):
            raise InventoryError(f"{where}: venv: {venv!r}: give an absolute path")
        return str(PurePosixPath(venv) / "bin" / "python")
    return None


def _keys_dir(value: Any, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InventoryError(f"{where}: expected a directory on that machine (a string)")
    if not (value.startswith("/") or value.startswith("~/")):
        raise InventoryError(
            f"{where}: {value!r}: give an absolute path on that machine (or one under ~/)"
        )
    return value


def _ssh_options(value: Any, where: str) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise InventoryError(f'{where}: expected a list of strings, e.g. ["-p", "2222"]')
    return tuple(value)


def _host(raw: Any, index: int, defaults: Mapping[str, Any], src: str) -> Host:
    where = f"{src}: [[host]] #{index + 1}"
    if not isinstance(raw, dict):
        raise InventoryError(f"{where}: expected a table")
    name = raw.get("name")
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise InventoryError(
            f"{where}: name: expected a short label of letters, digits, '.', '_' or '-'"
        )
    where = f"{src}: [[host]] name={name!r}"
    _unknown(raw, _HOST_KEYS, where)
    ssh = raw.get("ssh")
    if not isinstance(ssh, str) or not ssh or ssh.startswith("-") or re.search(r"\s", ssh):
        raise InventoryError(
            f'{where}: ssh: expected an ssh destination such as "lab@rover-a.local" '
            "(no spaces, not starting with '-')"
        )
    agents = raw.get("agents")
    if (
        not isinstance(agents, list)
        or not agents
        or not all(isinstance(i, int) and not isinstance(i, bool) and i >= 0 for i in agents)
    ):
        raise InventoryError(f"{where}: agents: expected a non-empty list of agent ids (>= 0)")
    if len(set(agents)) != len(agents):
        raise InventoryError(f"{where}: agents: {agents} lists an id twice")
    python = _python(raw, where) or _python(defaults, f"{src}: [defaults]") or "python3"
    opts = raw.get("ssh_options", defaults.get("ssh_options", []))
    opts_where = where if "ssh_options" in raw else f"{src}: [defaults]"
    keys = raw.get("keys", defaults.get("keys"))
    keys_where = where if "keys" in raw else f"{src}: [defaults]"
    return Host(
        name=name,
        ssh=ssh,
        agents=tuple(agents),
        python=python,
        ssh_options=_ssh_options(opts, f"{opts_where}: ssh_options"),
        keys=None if keys is None else _keys_dir(keys, f"{keys_where}: keys"),
    )


def load_inventory(path: str | Path) -> Inventory:
    """Read and validate an inventory file; raises InventoryError naming file and key."""
    path = Path(path)
    src = path.name
    try:
        with open(path, "rb") as f:
            raw = tomllib.load(f)
    except FileNotFoundError as exc:
        raise InventoryError(f"{path}: no such inventory file") from exc
    except tomllib.TOMLDecodeError as exc:
        raise InventoryError(f"{src}: not valid TOML: {exc}") from exc
    _unknown(raw, _TOP_KEYS, src)
    if "coordinator" not in raw:
        raise InventoryError(
            f"{src}: coordinator: missing; give the endpoint the agents join, "
            'e.g. coordinator = "tcp://10.0.0.5:5570"'
        )
    coordinator = _endpoint(raw["coordinator"], f"{src}: coordinator", bind=False)
    port = _TCP.fullmatch(coordinator).group("port")  # type: ignore[union-attr]
    listen = _endpoint(raw.get("listen", f"tcp://0.0.0.0:{port}"), f"{src}: listen", bind=True)
    defaults = raw.get("defaults", {})
    if not isinstance(defaults, dict):
        raise InventoryError(f"{src}: defaults: expected a table [defaults]")
    _unknown(defaults, _DEFAULT_KEYS, f"{src}: [defaults]")
    hosts_raw = raw.get("host")
    if not isinstance(hosts_raw, list) or not hosts_raw:
        raise InventoryError(f"{src}: host: expected at least one [[host]] table")
    hosts = [_host(h, k, defaults, src) for k, h in enumerate(hosts_raw)]
    seen_name: set[str] = set()
    owner: dict[int, str] = {}
    for h in hosts:
        if h.name in seen_name:
            raise InventoryError(f"{src}: [[host]] name={h.name!r}: name: used twice")
        seen_name.add(h.name)
        for i in h.agents:
            if i in owner:
                raise InventoryError(
                    f"{src}: [[host]] name={h.name!r}: agents: agent {i} is already on "
                    f"host {owner[i]!r}"
                )
            owner[i] = h.name
    return Inventory(path=path, coordinator=coordinator, listen=listen, hosts=tuple(hosts))
