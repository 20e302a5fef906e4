"""Authenticated, encrypted channels: key material, CURVE socket set-up, and the gatekeeper.

Every channel of a keyed swarm uses ZeroMQ's CURVE mechanism (RFC 26, CurveZMQ): the
coordinator's ROUTER and every agent's data PUB are CURVE servers, agents' DEALER and SUB
sockets are CURVE clients that check the server's public key. Who may connect to a server
is decided by a ZAP handler (RFC 27) against an allow-list of public keys; every server
socket carries a ZAP domain and ``ZAP_ENFORCE_DOMAIN``, so a missing handler refuses
everything instead of letting everyone in.

Key material (made by ``swarmrig keys make``, see :mod:`coordinator._keys`) is a directory::

    allow.toml              public keys only: the coordinator's, every key name's, and
                            which key each agent id must present (copy it everywhere)
    coordinator.key_secret  stays on the coordinator's machine
    <name>.key_secret       one per agent (agent-<id>) or per host; goes to that machine
    <name>.key              the public half, for reference

Secret key files use pyzmq's certificate format and must not be readable by group or
others (they are refused otherwise, as OpenSSH refuses loose private keys). Secret keys
never travel: agents learn their neighbours' *public* keys from the plan, which comes over
the authenticated, encrypted control channel.

The :class:`Gatekeeper` is one thread per process that answers ZAP requests and watches the
CURVE sockets' handshake events, so that every refused peer is counted and recorded with
its address, whatever failed: an unknown key (ZAP says no), a wrong key or a replayed
handshake (the cryptography fails before ZAP is asked), or a plaintext peer (mechanism
mismatch).
"""

from __future__ import annotations

import contextlib
import os
import socket
import stat
import threading
import tomllib
from collections import deque
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zmq
import zmq.auth
import zmq.utils.z85
from zmq.utils.monitor import parse_monitor_message

from topologies._errors import ScenarioError

__all__ = [
    "ALLOW_FILE",
    "CONTROL_DOMAIN",
    "COORDINATOR_KEY",
    "DATA_DOMAIN",
    "AgentKeys",
    "AllowList",
    "CoordinatorKeys",
    "Gatekeeper",
    "KeyMaterialError",
    "check_secret_mode",
    "curve_client",
    "curve_server",
    "data_plane_keys",
    "fingerprint",
    "is_loopback",
    "load_agent_keys",
    "load_coordinator_keys",
    "read_allow_list",
    "read_secret",
]

ALLOW_FILE = "allow.toml"
COORDINATOR_KEY = "coordinator"
CONTROL_DOMAIN = "swarmrig-control"
DATA_DOMAIN = "swarmrig-data"
#: refusals kept in memory before they are handed on (older ones are only counted)
RECORD_LIMIT = 256
#: refusals an agent sends the coordinator in one report
RECORDS_PER_REPORT = 32
_ZAP_ENDPOINT = "inproc://zeromq.zap.01"  # fixed by RFC 27
_Z85_KEY_LEN = 40


class KeyMaterialError(ScenarioError):
    """Key files or the allow-list are missing, malformed or too open (names the file)."""


# -- key files ---------------------------------------------------------------------------
def fingerprint(public: bytes) -> str:
    """A short, printable name for a Z85 public key (its first 8 characters)."""
    return public[:8].decode("ascii", "replace")


def _z85_key(value: Any, where: str) -> bytes:
    if not isinstance(value, str) or len(value) != _Z85_KEY_LEN:
        raise KeyMaterialError(f"{where}: expected a {_Z85_KEY_LEN}-character Z85 public key")
    try:
        zmq.utils.z85.decode(value.encode("ascii"))
    except Exception:
        raise KeyMaterialError(f"{where}: not a Z85 key") from None
    return value.encode("ascii")


def check_secret_mode(path: Path) -> None:
    """Refuse a secret key file that group or others may read or write."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise KeyMaterialError(f"{path}: no such secret key file") from None
    loose = stat.S_IMODE(st.st_mode) & 0o077
    if loose:
        raise KeyMaterialError(
            f"{path}: secret key is accessible by group or others "
            f"(mode {stat.S_IMODE(st.st_mode):04o}); run: chmod 600 {path}"
        )
    if st.st_uid != os.getuid():
        raise KeyMaterialError(f"{path}: secret key belongs to another user (uid {st.st_uid})")


def read_secret(path: Path) -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys of a secret key file, after the permission check."""
    path = Path(path)
    check_secret_mode(path)
    try:
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise KeyMaterialError(f"{path}: not a key file ({exc})") from None
    if not secret:
        raise KeyMaterialError(f"{path}: holds no secret key")
    public = _z85_key(public.decode("ascii", "replace"), f"{path}: public-key")
    secret = _z85_key(secret.decode("ascii", "replace"), f"{path}: secret-key")
    if zmq.curve_public(secret) != public:
        raise KeyMaterialError(f"{path}: the public key does not belong to the secret key")
    return public, secret


@dataclass(frozen=True, slots=True)
class AllowList:
    """The contents of allow.toml: public keys and which key each agent must present."""

    path: Path
    #: the coordinator's public key (agents check it: curve_serverkey)
    coordinator: bytes
    #: key name -> public key
    keys: Mapping[str, bytes]
    #: agent id -> key name
    agents: Mapping[int, str]

    def key_of(self, agent: int) -> bytes:
        return self.keys[self.agents[agent]]

    def check_agents(self, n: int) -> None:
        missing = [i for i in range(n) if i not in self.agents]
        if missing:
            raise KeyMaterialError(
                f"{self.path}: [agents] lists no key for agent(s) {missing}; "
                f"make keys for {n} agents (swarmrig keys make DIR --agents {n})"
            )


def read_allow_list(directory: Path) -> AllowList:
    path = Path(directory) / ALLOW_FILE
    try:
        with open(path, "rb") as f:
            doc = tomllib.load(f)
    except FileNotFoundError:
        raise KeyMaterialError(
            f"{path}: no allow-list here (make one with: swarmrig keys make {directory} ...)"
        ) from None
    except tomllib.TOMLDecodeError as exc:
        raise KeyMaterialError(f"{path}: not valid TOML: {exc}") from None
    unknown = set(doc) - {"coordinator", "keys", "agents"}
    if unknown:
        raise KeyMaterialError(f"{path}: unknown key(s) {sorted(unknown)}")
    coordinator = _z85_key(doc.get("coordinator"), f"{path}: coordinator")
    raw_keys = doc.get("keys")
    raw_agents = doc.get("agents")
    if not isinstance(raw_keys, dict) or not raw_keys:
        raise KeyMaterialError(f"{path}: [keys] must be a table of name = public key")
    if not isinstance(raw_agents, dict) or not raw_agents:
        raise KeyMaterialError(f"{path}: [agents] must be a table of agent id = key name")
    keys = {}
    for name, value in raw_keys.items():
        if name == COORDINATOR_KEY:
            raise KeyMaterialError(f"{path}: [keys] {name}: that name is the coordinator's")
        keys[name] = _z85_key(value, f"{path}: [keys] {name}")
    agents = {}
    for k, name in raw_agents.items():
        if not k.isdigit():
            raise KeyMaterialError(f"{path}: [agents] {k!r}: an agent id is a number >= 0")
        if name not in keys:
            raise KeyMaterialError(f"{path}: [agents] {k}: key {name!r} is not in [keys]")
        agents[int(k)] = name
    return AllowList(path=path, coordinator=coordinator, keys=keys, agents=agents)


@dataclass(frozen=True, slots=True)
class AgentKeys:
    """What one agent process holds: its own key pair and the coordinator's public key."""

    agent: int
    name: str
    public: bytes
    secret: bytes
    coordinator: bytes
    directory: Path


def load_agent_keys(directory: Path | str, agent: int) -> AgentKeys:
    """An agent's keys from its key directory (``~/`` is that machine's user's home)."""
    directory = Path(directory).expanduser()
    allow = read_allow_list(directory)
    name = allow.agents.get(agent)
    if name is None:
        raise KeyMaterialError(f"{allow.path}: [agents] lists no key for agent {agent}")
    path = directory / f"{name}.key_secret"
    public, secret = read_secret(path)
    if public != allow.keys[name]:
        raise KeyMaterialError(f"{path}: its public key is not the one allow.toml lists for {name}")
    return AgentKeys(agent, name, public, secret, allow.coordinator, directory)


@dataclass(frozen=True, slots=True)
class CoordinatorKeys:
    public: bytes
    secret: bytes
    allow: AllowList
    directory: Path

    def agent_key(self, agent: int) -> bytes:
        return self.allow.key_of(agent)


def load_coordinator_keys(directory: Path | str, n_agents: int) -> CoordinatorKeys:
    directory = Path(directory).resolve()
    allow = read_allow_list(directory)
    allow.check_agents(n_agents)
    path = directory / f"{COORDINATOR_KEY}.key_secret"
    public, secret = read_secret(path)
    if public != allow.coordinator:
        raise KeyMaterialError(
            f"{path}: its public key is not the coordinator key in {allow.path}; "
            "were the files made by two different `swarmrig keys make` calls?"
        )
    return CoordinatorKeys(public, secret, allow, directory)


# -- socket set-up -----------------------------------------------------------------------
def curve_server(sock: zmq.Socket, public: bytes, secret: bytes, domain: str) -> None:
    """Make ``sock`` a CURVE server whose peers are decided by the ZAP handler of ``domain``.

    Must be called before bind. ``ZAP_ENFORCE_DOMAIN``: without a handler, refuse.
    """
    sock.curve_secretkey = secret
    sock.curve_publickey = public
    sock.curve_server = True
    sock.zap_domain = domain.encode()
    sock.setsockopt(zmq.ZAP_ENFORCE_DOMAIN, 1)


def curve_client(sock: zmq.Socket, public: bytes, secret: bytes, server: bytes) -> None:
    """Make ``sock`` a CURVE client that only talks to the holder of ``server``'s secret.

    The server key is read at each connect, so set it again before connecting to another
    server (see :meth:`Gatekeeper` users in node._runtime).
    """
    sock.curve_secretkey = secret
    sock.curve_publickey = public
    sock.curve_serverkey = server


def plan_keys(allow_list: AllowList, agent: int, subscribers: Any, publishers: Any) -> dict:
    """The ``curve`` entry of an agent's plan: public keys only (the channel is encrypted)."""
    return {
        "subscribers": [[allow_list.key_of(j).decode(), allow_list.agents[j]] for j in subscribers],
        "publishers": {int(j): allow_list.key_of(j).decode() for j in publishers},
    }


def data_plane_keys(
    plan: Mapping[str, Any], keys: AgentKeys | None, agent: int
) -> tuple[dict[bytes, str], dict[int, bytes]]:
    """From a plan: who may subscribe to our data (key -> name), each in-neighbour's key.

    A keyed agent refuses a plan without keys and the other way round, naming the fix.
    """
    from node._errors import AgentFailure

    curve = plan.get("curve")
    if curve is None and keys is None:
        return {}, {}
    if curve is None:
        raise AgentFailure(f"agent {agent}: this agent has keys but the coordinator runs without")
    if keys is None:
        raise AgentFailure(
            f"agent {agent}: the coordinator's swarm uses keys; start this agent with --keys DIR"
        )
    try:
        subscribers = {str(k).encode(): str(name) for k, name in curve["subscribers"]}
        publishers = {int(j): str(k).encode() for j, k in curve["publishers"].items()}
    except (KeyError, TypeError, ValueError, AttributeError):
        raise AgentFailure(f"agent {agent}: the plan's key table is malformed") from None
    return subscribers, publishers


def is_loopback(endpoint: str) -> bool:
    """True for endpoints only this machine can reach (ipc, inproc, tcp on 127.x or ::1)."""
    scheme, _, rest = endpoint.partition("://")
    if scheme in ("ipc", "inproc"):
        return True
    host = rest.rsplit(":", 1)[0].strip("[]")
    return host == "localhost" or host.startswith("127.") or host == "::1"


# -- the gatekeeper ----------------------------------------------------------------------
_FAILED = {
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL: "handshake failed",
    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL: "handshake refused",
    zmq.EVENT_HANDSHAKE_FAILED_AUTH: "key refused",
}
_PROTOCOL_REASONS = {
    zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH: "security mechanism mismatch (a plaintext peer?)",
    zmq.PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC: "cryptographic check failed "
    "(wrong key, or replayed handshake bytes)",
    zmq.PROTOCOL_ERROR_ZMTP_INVALID_METADATA: "invalid handshake metadata",
    zmq.PROTOCOL_ERROR_ZMTP_UNEXPECTED_COMMAND: "unexpected handshake command",
    zmq.PROTOCOL_ERROR_ZMTP_MALFORMED_COMMAND_HELLO: "malformed HELLO",
    zmq.PROTOCOL_ERROR_ZMTP_MALFORMED_COMMAND_INITIATE: "malformed INITIATE",
    zmq.PROTOCOL_ERROR_ZMTP_MALFORMED_COMMAND_MESSAGE: "malformed MESSAGE",
}
_WATCHED = (
    zmq.EVENT_ACCEPTED
    | zmq.EVENT_CONNECTED
    | zmq.EVENT_DISCONNECTED
    | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
    | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
    | zmq.EVENT_HANDSHAKE_FAILED_AUTH
)


def _peer_of(fd: int) -> str:
    """The remote address of a connection's file descriptor (best effort)."""
    with contextlib.suppress(OSError), socket.socket(fileno=os.dup(fd)) as s:
        peer = s.getpeername()
        if isinstance(peer, tuple):
            return f"{peer[0]}:{peer[1]}"
        return "local (ipc)"
    return "unknown"


class Gatekeeper:
    """ZAP handler and handshake watcher of one process's CURVE sockets (a thread).

    ``allow(domain, keys)`` sets who may connect to the servers of a ZAP domain;
    ``watch(sock, label)`` records every refused handshake on ``sock``; ``take()`` hands
    the recorded refusals to the owning loop (at most :data:`RECORD_LIMIT` kept; ``total``
    counts all of them). The counting rule: libzmq reports a failed handshake and then the
    disconnection of that very connection from the same I/O thread, so a failure is paired
    with the next disconnection on its socket, whose address was taken when it was accepted.
    """

    def __init__(self, ctx: zmq.Context) -> None:
        self.ctx = ctx
        self._allowed: dict[str, dict[bytes, str]] = {}
        self._lock = threading.Lock()
        self._records: deque[dict[str, Any]] = deque(maxlen=RECORD_LIMIT)
        self.total = 0
        self._reported = 0
        self.by_label: dict[str, int] = {}
        self._pipe_addr = f"inproc://swarmrig-gate-{id(self)}"
        self._pipe = ctx.socket(zmq.PAIR)
        self._pipe.linger = 0
        self._pipe.bind(self._pipe_addr)
        self._zap = ctx.socket(zmq.REP)
        self._zap.linger = 0
        self._zap.bind(_ZAP_ENDPOINT)
        self._thread = threading.Thread(target=self._serve, name="swarmrig-gate", daemon=True)
        self._thread.start()
        self._pipe.recv()  # the thread is polling

    # -- owner's side (the thread that created the gatekeeper) -------------------------
    def allow(self, domain: str, keys: Mapping[bytes, str]) -> None:
        """Only these public keys (Z85 -> name given to the peer as its User-Id) may connect."""
        with self._lock:
            self._allowed[domain] = dict(keys)

    def watch(self, sock: zmq.Socket, label: str, domain: str = "") -> None:
        """Record refused handshakes of ``sock`` under ``label``; call before it binds or
        connects. ``domain``: the ZAP domain of a server socket (empty for a client)."""
        addr = f"inproc://swarmrig-monitor-{id(sock)}"
        sock.monitor(addr, _WATCHED)
        self._pipe.send_multipart([b"watch", addr.encode(), label.encode(), domain.encode()])
        self._pipe.recv()

    def trouble_with(self, label: str) -> str:
        """A sentence on failed handshakes of the client socket ``label`` ("" if none)."""
        with self._lock:
            failed = [r for r in self._records if r["socket"] == label]
            count = self.by_label.get(label, 0)
        if not count:
            return ""
        last = failed[-1] if failed else {"address": "?", "reason": "?"}
        return (
            f"; {count} handshake(s) with {last['address']} failed, last: {last['reason']}"
            " (does allow.toml name the key the coordinator uses, and is this agent's key"
            " on its allow-list?)"
        )

    def report(self, exclude: str) -> dict[str, Any] | None:
        """What to tell the coordinator: the total of refusals (not counting the client
        socket ``exclude``) and the latest few records; None when nothing is new."""
        with self._lock:
            total = self.total - self.by_label.get(exclude, 0)
            if total == self._reported:
                return None
            records = [r for r in self._records if r["socket"] != exclude]
            for r in records:
                self._records.remove(r)
        return {"total": total, "records": records[-RECORDS_PER_REPORT:]}

    def reported(self, total: int) -> None:
        self._reported = total

    def take(self) -> list[dict[str, Any]]:
        """The refusals recorded since the last call (oldest first)."""
        with self._lock:
            out = list(self._records)
            self._records.clear()
        return out

    def stop(self) -> None:
        if self._thread.is_alive():
            self._pipe.send_multipart([b"stop"])
            self._thread.join(timeout=5.0)
        self._pipe.close(linger=0)

    # -- the thread ----------------------------------------------------------------------
    def _serve(self) -> None:
        pipe = self.ctx.socket(zmq.PAIR)
        pipe.linger = 0
        pipe.connect(self._pipe_addr)
        poller = zmq.Poller()
        poller.register(pipe, zmq.POLLIN)
        poller.register(self._zap, zmq.POLLIN)
        monitors: dict[zmq.Socket, tuple[str, str]] = {}
        peers: dict[tuple[str, int], str] = {}
        failed: dict[str, deque[tuple[str, str]]] = {}
        denied: dict[str, deque[tuple[str, str]]] = {}
        pipe.send(b"up")
        try:
            while True:
                for sock, _ in poller.poll():
                    if sock is pipe:
                        cmd = pipe.recv_multipart()
                        if cmd[0] == b"stop":
                            return
                        mon = self.ctx.socket(zmq.PAIR)
                        mon.linger = 0
                        mon.connect(cmd[1].decode())
                        label = cmd[2].decode()
                        monitors[mon] = (label, cmd[3].decode())
                        failed.setdefault(label, deque(maxlen=64))
                        poller.register(mon, zmq.POLLIN)
                        pipe.send(b"ok")
                    elif sock is self._zap:
                        self._answer(self._zap.recv_multipart(), denied)
                    else:
                        self._on_event(sock, monitors[sock], peers, failed, denied)
        finally:
            for mon in monitors:
                mon.close(linger=0)
            self._zap.close(linger=0)
            pipe.close(linger=0)

    def _answer(self, msg: list[bytes], denied: dict[str, deque[tuple[str, str]]]) -> None:
        """One ZAP request (RFC 27): 200 with the key's name as User-Id, or 400."""
        if len(msg) < 6:
            if len(msg) >= 2:
                self._zap.send_multipart([b"1.0", msg[1], b"400", b"malformed", b"", b""])
            else:  # cannot even be answered; a REP socket must reply, so reply empty
                self._zap.send_multipart([b"1.0", b"", b"400", b"malformed", b"", b""])
            return
        version, request_id, domain, address, _identity, mechanism = msg[:6]
        creds = msg[6:]
        dom = domain.decode("utf-8", "replace")
        name = None
        reason = "not a CURVE peer"
        if version != b"1.0":
            reason = "unknown ZAP version"
        elif mechanism == b"CURVE" and len(creds) == 1 and len(creds[0]) == 32:
            key = zmq.utils.z85.encode(creds[0])
            with self._lock:
                name = self._allowed.get(dom, {}).get(key)
            reason = f"key {fingerprint(key)}... is not on the allow-list"
        if name is not None:
            self._zap.send_multipart([b"1.0", request_id, b"200", b"OK", name.encode(), b""])
            return
        denied.setdefault(dom, deque(maxlen=64)).append(
            (reason, address.decode("utf-8", "replace"))
        )
        self._zap.send_multipart([b"1.0", request_id, b"400", reason.encode(), b"", b""])

    def _on_event(
        self,
        mon: zmq.Socket,
        watched: tuple[str, str],
        peers: dict[tuple[str, int], str],
        failed: dict[str, deque[tuple[str, str]]],
        denied: dict[str, deque[tuple[str, str]]],
    ) -> None:
        try:
            ev = parse_monitor_message(mon.recv_multipart())
        except Exception:
            return
        label, domain = watched
        kind, value = int(ev["event"]), int(ev["value"])
        if kind in (zmq.EVENT_ACCEPTED, zmq.EVENT_CONNECTED):
            peers[(label, value)] = _peer_of(value)
        elif kind in _FAILED:
            ip = ""  # ZAP knows the peer's IP: the fallback when the fd was read too late
            if kind == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                queue = denied.get(domain)
                if queue:
                    reason, ip = queue.popleft()
                elif domain:
                    reason = f"ZAP status {value}"
                else:
                    reason = f"the server refused our key (status {value})"
            elif kind == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL:
                reason = _PROTOCOL_REASONS.get(value, f"protocol error {value:#x}")
            else:
                reason = f"{os.strerror(value)}" if value > 0 else "no detail"
            failed[label].append((f"{_FAILED[kind]}: {reason}", ip))
        elif kind == zmq.EVENT_DISCONNECTED:
            address = peers.pop((label, value), "unknown")
            queue = failed.get(label)
            if queue:
                reason, ip = queue.popleft()
                self._record(label, ip if address == "unknown" and ip else address, reason)

    def _record(self, label: str, address: str, reason: str) -> None:
        with self._lock:
            self.total += 1
            self.by_label[label] = self.by_label.get(label, 0) + 1
            self._records.append({"socket": label, "address": address, "reason": reason})
