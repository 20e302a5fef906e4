"""The one codec: msgpack frames, their size bounds, and schema validation.

Two kinds of frames travel:

* data frames, agent to agent on the data plane (hot path). Layout: a msgpack array
  ``[kind, sender, epoch, seq, iteration, send_time, payload]`` followed by a 4-byte
  little-endian CRC-32 of the array, so that a corrupted frame is always refused.
  ``payload`` maps names to raw little-endian float64 bytes.
* control frames, between an agent and the coordinator: a msgpack map with a ``"t"`` type
  key, validated against :data:`CONTROL_SCHEMA`.

Decoding takes one ``unpackb`` call per frame, refuses ExtType, and then checks the decoded
object against the schema, because random bytes sometimes decode to valid objects. Every
refusal is a :class:`~node._errors.WireError` that says what was wrong.
"""

from __future__ import annotations

import struct
import zlib
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple

import msgpack
import numpy as np

from node._errors import WireError

__all__ = [
    "CONTROL_SCHEMA",
    "CRC_RESIDUE",
    "DATA",
    "MAX_CONTROL_FRAME",
    "MAX_DATA_FRAME",
    "PROBE",
    "PROTOCOL",
    "DataLayout",
    "DataMessage",
    "decode_control",
    "decode_data",
    "encode_control",
    "encode_data",
    "encode_probe",
    "payload_arrays",
]

DATA = 0
PROBE = 1
#: version of the control protocol and the data frames; the hello carries it and the
#: coordinator refuses an agent that speaks another one (naming both versions)
PROTOCOL = 2
#: a data frame carries a handful of small vectors; anything near this is an attack or a bug
MAX_DATA_FRAME = 1 << 20
#: control frames carry plans and telemetry batches
MAX_CONTROL_FRAME = 64 << 20

_F64 = np.dtype("<f8")
_U32 = struct.Struct("<I")
_crc32 = zlib.crc32
#: CRC-32 of any message followed by its own little-endian CRC-32 (a property of the code)
CRC_RESIDUE = _CRC_RESIDUE = 0x2144DF1C
_new_message = tuple.__new__
_unpackb = msgpack.unpackb


def _refuse_ext(code: int, data: bytes) -> Any:
    raise WireError(f"msgpack extension type {code} is not allowed")


class DataMessage(NamedTuple):
    """One decoded data frame (a tuple: immutable and cheap to build on the hot path)."""

    kind: int
    sender: int
    epoch: int
    seq: int
    iteration: int
    send_time: float
    #: name -> raw little-endian float64 bytes (see :func:`payload_arrays`)
    payload: dict[str, bytes]


def encode_data(
    sender: int,
    epoch: int,
    seq: int,
    iteration: int,
    send_time: float,
    payload: Mapping[str, np.ndarray],
) -> bytes:
    body = msgpack.packb(
        [
            DATA,
            sender,
            epoch,
            seq,
            iteration,
            send_time,
            {k: np.ascontiguousarray(v, dtype=_F64).tobytes() for k, v in payload.items()},
        ]
    )
    return body + zlib.crc32(body).to_bytes(4, "little")


def encode_probe(sender: int, epoch: int, send_time: float) -> bytes:
    body = msgpack.packb([PROBE, sender, epoch, -1, -1, send_time, {}])
    return body + zlib.crc32(body).to_bytes(4, "little")


def decode_data(frame: bytes, sizes: Mapping[str, int]) -> DataMessage:
    """Decode and validate one data frame; ``sizes`` gives the expected payload lengths.

    The payload stays raw bytes of validated length; :func:`payload_arrays` turns it into
    float64 arrays when the algorithm needs it (only the newest message per neighbour is
    ever converted). Probe frames carry an empty payload and come back with ``kind == PROBE``.

    This sits on every message, so it is written for speed: the checksum is tested over the
    whole frame against the CRC-32 residue, and the header is checked by exact type, which
    also refuses ExtType and Timestamp objects (they are neither int, float, bytes nor dict)
    without the cost of an ``ext_hook`` call per frame.
    """
    n = len(frame)
    if n < 5 or n > MAX_DATA_FRAME:
        raise WireError(f"data frame of {n} bytes; expected 5 to {MAX_DATA_FRAME}")
    if _crc32(frame) != _CRC_RESIDUE:
        raise WireError("data frame fails its checksum")
    try:
        obj = _unpackb(frame[:-4])
    except Exception as exc:  # msgpack's rejections (ValueError subclasses, TypeError)
        raise WireError(f"data frame does not decode: {type(exc).__name__}: {exc}") from None
    if type(obj) is not list or len(obj) != 7:
        raise WireError("data frame is not a 7-element array")
    kind, sender, epoch, seq, iteration, send_time, raw = obj
    if type(kind) is not int:
        raise WireError(f"data frame kind {kind!r} out of range; expected 0 (data) or 1 (probe)")
    if (
        type(sender) is not int
        or type(epoch) is not int
        or type(seq) is not int
        or type(iteration) is not int
        or type(send_time) is not float
        or type(raw) is not dict
    ):
        raise WireError("data frame header has wrong types")
    if send_time - send_time != 0.0:  # NaN or infinite
        raise WireError(f"data frame send time {send_time} is not finite")
    if kind == DATA and seq >= 0 and iteration >= 0 and epoch >= 0 and len(raw) == len(sizes):
        for key, size in sizes.items():
            b = raw.get(key)
            if type(b) is not bytes or len(b) != 8 * size:
                raise WireError(f"payload {key!r} missing or not {size} float64 values")
        return _new_message(DataMessage, obj)
    if kind == PROBE and not raw:
        return _new_message(DataMessage, obj)
    if kind != DATA or seq < 0 or iteration < 0 or epoch < 0:
        raise WireError(f"data frame header out of range (kind {kind!r}, seq {seq})")
    raise WireError(f"payload has keys {sorted(map(str, raw))}; expected {sorted(sizes)}")


def payload_arrays(raw: Mapping[str, bytes]) -> dict[str, np.ndarray]:
    """The float64 arrays of a validated payload (read-only views, no copy)."""
    return {k: np.frombuffer(b, dtype=_F64) for k, b in raw.items()}


# msgpack markers of the fixed-width layout (msgpack numbers are big-endian)
_FIXARRAY7, _UINT32, _UINT64, _FLOAT64 = 0x97, 0xCE, 0xCF, 0xCB
_HEADER = struct.Struct(">BBBIBIBQBQBd")


def _str_header(key: str) -> bytes:
    b = key.encode()
    if len(b) < 32:
        return bytes([0xA0 | len(b)]) + b
    if len(b) < 256:
        return bytes([0xD9, len(b)]) + b
    raise WireError(f"payload key {key!r} is too long")


def _bin_header(n: int) -> bytes:
    if n < 256:
        return bytes([0xC4, n])
    if n < 65536:
        return b"\xc5" + n.to_bytes(2, "big")
    return b"\xc6" + n.to_bytes(4, "big")


class DataLayout:
    """The data frames of one algorithm: a fixed-width msgpack layout and its fast codec.

    Frames are ordinary msgpack (any decoder reads them), written with fixed-width integers
    and the payload keys in sorted order, so that the length of every frame is known and the
    header decodes with one ``struct`` call. A frame in any other valid layout still decodes,
    through :func:`decode_data`. ``decode`` returns the plain tuple
    ``(kind, sender, epoch, seq, iteration, send_time, payload)`` where ``payload`` is the
    frame itself (fast layout) or a dict of bytes; :meth:`arrays` reads either.
    """

    __slots__ = (
        "_first",
        "_head",
        "_map",
        "_parts",
        "dtype",
        "keys",
        "length",
        "sizes",
        "skeleton",
    )

    def __init__(self, sizes: Mapping[str, int]) -> None:
        self.keys = tuple(sorted(sizes))
        self.sizes = {k: int(sizes[k]) for k in self.keys}
        n = len(self.keys)
        if n >= 16:
            raise WireError("at most 15 payload arrays per message")
        self._map = bytes([0x80 | n])
        pos = _HEADER.size + 1
        parts = []
        for k in self.keys:
            hdr = _str_header(k) + _bin_header(8 * self.sizes[k])
            parts.append((k, hdr, pos, pos + len(hdr), self.sizes[k]))
            pos += len(hdr) + 8 * self.sizes[k]
        self._parts = tuple(parts)
        self.length = pos + 4
        # header, map marker and the first key's header in one struct call
        self._first = self._map + (parts[0][1] if parts else b"")
        self._head = struct.Struct(_HEADER.format + f"{len(self._first)}s")
        # For batches: the header fields as a numpy record, and every fixed byte of the
        # layout (msgpack markers, map and key headers) with its position.
        self.dtype = np.dtype(
            {
                "names": ["kind", "sender", "epoch", "seq", "iteration", "send_time"],
                "formats": ["u1", ">u4", ">u4", ">u8", ">u8", ">f8"],
                "offsets": [1, 3, 8, 13, 22, 31],
                "itemsize": self.length,
            }
        )
        fixed = {
            0: _FIXARRAY7,
            2: _UINT32,
            7: _UINT32,
            12: _UINT64,
            21: _UINT64,
            30: _FLOAT64,
            _HEADER.size: self._map[0],
        }
        for _, hdr, at, _, _ in self._parts:
            for i, b in enumerate(hdr):
                fixed[at + i] = b
        self.skeleton = (
            np.fromiter(fixed.keys(), dtype=np.intp),
            np.fromiter(fixed.values(), dtype=np.uint8),
        )

    def encode(
        self,
        sender: int,
        epoch: int,
        seq: int,
        iteration: int,
        send_time: float,
        payload: Mapping[str, np.ndarray],
    ) -> bytes:
        parts = self._parts
        try:
            # struct refuses negative or too large header values by itself
            head = self._head.pack(
                _FIXARRAY7,
                DATA,
                _UINT32,
                sender,
                _UINT32,
                epoch,
                _UINT64,
                seq,
                _UINT64,
                iteration,
                _FLOAT64,
                send_time,
                self._first,
            )
        except struct.error:
            raise WireError(
                f"header out of range: sender {sender}, epoch {epoch}, seq {seq},"
                f" iteration {iteration}"
            ) from None
        if len(parts) == 1:  # the common case: one array
            k, _, _, _, size = parts[0]
            v = payload[k]
            if v.dtype is not _F64 or v.size != size:
                v = np.ascontiguousarray(v, dtype=_F64).reshape(size)
            body = head + v.tobytes()
            return body + _U32.pack(_crc32(body))
        chunks = [head]
        for i, (k, hdr, _, _, size) in enumerate(parts):
            v = payload[k]
            if v.dtype is not _F64 or v.size != size:
                v = np.ascontiguousarray(v, dtype=_F64).reshape(size)
            if i:
                chunks.append(hdr)
            chunks.append(v.tobytes())
        body = b"".join(chunks)
        return body + _U32.pack(_crc32(body))

    def encoder(self, sender: int, epoch: int) -> Callable[..., bytes]:
        """``encode`` for one sender incarnation, with its constant header bytes built once:
        ``f(seq, iteration, send_time, payload) -> frame`` (the same bytes as ``encode``)."""
        prefix = self.encode(
            sender, epoch, 0, 0, 0.0, {k: np.zeros(n) for k, n in self.sizes.items()}
        )[:12]
        tail = struct.Struct(">BQBQBd")
        parts = self._parts
        first = self._first
        pack = tail.pack
        crc = _crc32
        u32 = _U32.pack
        if len(parts) != 1:

            def general(seq: int, iteration: int, send_time: float, payload: Mapping) -> bytes:
                return self.encode(sender, epoch, seq, iteration, send_time, payload)

            return general
        key, _, _, _, size = parts[0]

        def one(seq: int, iteration: int, send_time: float, payload: Mapping) -> bytes:
            v = payload[key]
            if v.dtype is not _F64 or v.size != size:
                v = np.ascontiguousarray(v, dtype=_F64).reshape(size)
            try:
                body = prefix + pack(_UINT64, seq, _UINT64, iteration, _FLOAT64, send_time) + first
            except struct.error:
                raise WireError(f"header out of range: seq {seq}, iteration {iteration}") from None
            body += v.tobytes()
            return body + u32(crc(body))

        return one

    def decode(self, frame: bytes) -> tuple[int, int, int, int, int, float, Any]:
        if len(frame) == self.length and frame[0] == _FIXARRAY7:
            if _crc32(frame) != _CRC_RESIDUE:
                raise WireError("data frame fails its checksum")
            h = _HEADER.unpack_from(frame)
            if (
                h[2] == _UINT32
                and h[4] == _UINT32
                and h[6] == _UINT64
                and h[8] == _UINT64
                and h[10] == _FLOAT64
                and h[1] == DATA
                and h[11] - h[11] == 0.0  # finite send time
                and frame[_HEADER.size] == self._map[0]
            ):
                for _, hdr, at, _, _ in self._parts:
                    if not frame.startswith(hdr, at):
                        break
                else:
                    return (DATA, h[3], h[5], h[7], h[9], h[11], frame)
        m = decode_data(frame, self.sizes)
        return (m.kind, m.sender, m.epoch, m.seq, m.iteration, m.send_time, m.payload)

    def finite(self, payload: Any) -> bool:
        """Every value of a payload returned by :meth:`decode` is finite (one dot product
        per array: NaN and infinity fail it, and so does a norm past 1e154, far beyond any
        state that has not diverged)."""
        if type(payload) is bytes:
            for _, _, _, start, size in self._parts:
                v = np.frombuffer(payload, dtype=_F64, count=size, offset=start)
                d = float(v.dot(v))
                if d - d != 0.0:
                    return False
            return True
        for v in payload_arrays(payload).values():
            d = float(v.dot(v))
            if d - d != 0.0:
                return False
        return True

    def finite_rows(self, u8: np.ndarray) -> np.ndarray:
        """:meth:`finite` for each row of a batch of fast-layout frames (uint8 rows)."""
        ok = np.ones(len(u8), dtype=bool)
        for _, _, _, start, size in self._parts:
            v = np.ascontiguousarray(u8[:, start : start + 8 * size]).view(_F64)
            ok &= np.isfinite((v * v).sum(axis=1))
        return ok

    def arrays(self, payload: Any) -> dict[str, np.ndarray]:
        """Float64 arrays (read-only views) of a payload returned by :meth:`decode`."""
        if type(payload) is bytes:
            return {
                k: np.frombuffer(payload, dtype=_F64, count=size, offset=start)
                for k, _, _, start, size in self._parts
            }
        return payload_arrays(payload)


# --- control frames -------------------------------------------------------------------
_NUM = (int, float)
#: type -> required keys and their accepted Python types (extra keys are refused)
CONTROL_SCHEMA: dict[str, dict[str, type | tuple[type, ...]]] = {
    # agent -> coordinator
    "hello": {"agent": int, "host": str, "pid": int, "version": str, "protocol": int},
    "bound": {"endpoint": str},
    "ready": {},
    "pong": {"seq": int, "t_coord": _NUM, "t_node": _NUM},
    "tel": {"samples": list, "links": dict, "counters": dict},
    "ack": {"directive": int, "t_node": _NUM},
    "heard": {"sender": int, "epoch": int},
    "final": {"state": dict, "iteration": int, "links": dict, "counters": dict, "reason": str},
    "failed": {"error": str},
    # peers this agent's gatekeeper refused: total so far, the latest few (bounded)
    "refused": {"total": int, "records": list},
    # coordinator -> agent
    "plan": {"plan": dict},
    "peers": {"peers": dict},
    "ping": {"seq": int, "t_coord": _NUM},
    "go": {"start_node": _NUM, "iteration": int},
    "directive": {"directive": int, "action": str, "fault": dict},
    # a process fault the agent carries out itself (slow, crash, pause, resume): agents that
    # joined by themselves are never signalled by the coordinator (coordinator._process_faults)
    "process": {"action": str, "factor": _NUM, "restart_after_s": (int, float, type(None))},
    "stop": {"reason": str},
    "beat": {},
    "refuse": {"reason": str},
}


def encode_control(kind: str, **fields: Any) -> bytes:
    """Encode a control message; its fields must fit :data:`CONTROL_SCHEMA` exactly, so a
    sender bug shows here rather than as a refusal at the other end."""
    schema = CONTROL_SCHEMA.get(kind)
    if schema is None:
        raise WireError(f"unknown control message type {kind!r}")
    if fields.keys() != schema.keys():
        raise WireError(f"control {kind!r} needs keys {sorted(schema)}; got {sorted(fields)}")
    for key, typ in schema.items():
        v = fields[key]
        if isinstance(v, np.ndarray | np.generic):  # numpy travels as plain values
            v = fields[key] = v.tolist() if isinstance(v, np.ndarray) else v.item()
        if isinstance(v, bool) or not isinstance(v, typ):
            raise WireError(f"control {kind!r} key {key!r} has type {type(v).__name__}")
    fields["t"] = kind
    return msgpack.packb(fields, default=_default)


def _default(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    raise TypeError(f"cannot encode {type(obj).__name__}")


_PLAIN = (type(None), bool, int, float, str, bytes)


def _plain(obj: Any, depth: int) -> None:
    """Refuse anything but plain msgpack data (Timestamp objects slip past ext_hook)."""
    if depth > 32:
        raise WireError("control frame nests deeper than 32 levels")
    t = type(obj)
    if t in _PLAIN:
        return
    if t is list:
        for v in obj:
            if type(v) not in _PLAIN:
                _plain(v, depth + 1)
        return
    if t is dict:
        for k, v in obj.items():
            if type(k) not in _PLAIN:
                raise WireError(f"control frame has a map key of type {type(k).__name__}")
            if type(v) not in _PLAIN:
                _plain(v, depth + 1)
        return
    raise WireError(f"control frame carries a {t.__name__}, not plain data")


def decode_control(frame: bytes) -> dict[str, Any]:
    """Decode and validate one control frame against :data:`CONTROL_SCHEMA`."""
    n = len(frame)
    if n > MAX_CONTROL_FRAME:
        raise WireError(f"control frame of {n} bytes; at most {MAX_CONTROL_FRAME}")
    try:
        obj = msgpack.unpackb(frame, ext_hook=_refuse_ext, strict_map_key=False)
    except WireError:
        raise
    except Exception as exc:
        raise WireError(f"control frame does not decode: {type(exc).__name__}: {exc}") from None
    if type(obj) is not dict:
        raise WireError("control frame is not a map")
    _plain(obj, 0)
    kind = obj.get("t")
    schema = CONTROL_SCHEMA.get(kind) if isinstance(kind, str) else None
    if schema is None:
        raise WireError(f"control frame has unknown type {kind!r}")
    for key, typ in schema.items():
        if key not in obj:
            raise WireError(f"control {kind!r} lacks key {key!r}")
        v = obj[key]
        if not isinstance(v, typ) or (isinstance(v, bool) and typ is not bool):
            raise WireError(f"control {kind!r} key {key!r} has type {type(v).__name__}")
    extra = set(obj) - set(schema) - {"t"}
    if extra:
        raise WireError(f"control {kind!r} has unexpected keys {sorted(map(str, extra))}")
    return obj
