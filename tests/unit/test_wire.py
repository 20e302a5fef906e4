"""The wire codec: exact round trips, and every malformed frame refused with a WireError.

A refusal must be a :class:`node._errors.WireError` (a ValueError subclass, so callers that
catch msgpack's own ValueErrors keep working) and nothing else: the receiving loops count
WireErrors and drop the frame, and any other exception would take the agent or the
coordinator down.
"""

from __future__ import annotations

import math
import struct
import zlib
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from node._errors import WireError
from node._wire import (
    CONTROL_SCHEMA,
    DATA,
    MAX_CONTROL_FRAME,
    MAX_DATA_FRAME,
    PROBE,
    DataLayout,
    DataMessage,
    decode_control,
    decode_data,
    encode_control,
    encode_data,
    encode_probe,
    payload_arrays,
)
from topologies._errors import SwarmrigError

SIZES = {"x": 3, "y": 1}
PAYLOAD = {"x": np.array([1.5, -2.0, 3.25]), "y": np.array([7.0])}


def sealed(body: bytes) -> bytes:
    """``body`` followed by its little-endian CRC-32: what passes the checksum."""
    return body + zlib.crc32(body).to_bytes(4, "little")


_DEFAULT: Any = object()


def raw_frame(*header: Any, payload: Any = _DEFAULT) -> bytes:
    """A checksummed data frame with an arbitrary (possibly wrong) header."""
    if payload is _DEFAULT:
        payload = {k: np.asarray(v, dtype="<f8").tobytes() for k, v in PAYLOAD.items()}
    return sealed(msgpack.packb([*header, payload]))


def good_header() -> list[Any]:
    return [DATA, 4, 2, 17, 9, 12.5]


def refused(frame: bytes, sizes: dict[str, int] | None = None, match: str | None = None) -> None:
    with pytest.raises(WireError, match=match) as info:
        decode_data(frame, SIZES if sizes is None else sizes)
    assert isinstance(info.value, ValueError)
    assert isinstance(info.value, SwarmrigError)


def refused_control(frame: bytes, match: str | None = None) -> None:
    with pytest.raises(WireError, match=match) as info:
        decode_control(frame)
    assert isinstance(info.value, ValueError)


# ------------------------------------------------------------------------- data frames


def test_data_frame_round_trip() -> None:
    frame = encode_data(4, 2, 17, 9, 12.5, PAYLOAD)
    m = decode_data(frame, SIZES)
    assert isinstance(m, DataMessage)
    assert (m.kind, m.sender, m.epoch, m.seq, m.iteration, m.send_time) == (
        DATA,
        4,
        2,
        17,
        9,
        12.5,
    )
    arrays = payload_arrays(m.payload)
    assert set(arrays) == set(SIZES)
    for k, v in PAYLOAD.items():
        assert arrays[k].dtype == np.dtype("<f8")
        np.testing.assert_array_equal(arrays[k], v)


def test_payload_arrays_are_read_only_views() -> None:
    m = decode_data(encode_data(0, 0, 0, 0, 0.0, PAYLOAD), SIZES)
    x = payload_arrays(m.payload)["x"]
    assert not x.flags.writeable
    with pytest.raises(ValueError):
        x[0] = 1.0


def test_encode_data_converts_to_little_endian_float64() -> None:
    # Big-endian float32 and integer inputs travel as the same float64 values.
    payload = {"x": np.array([1, 2, 3], dtype=">f4"), "y": np.array([5], dtype=np.int64)}
    m = decode_data(encode_data(1, 0, 0, 0, 0.0, payload), SIZES)
    arrays = payload_arrays(m.payload)
    np.testing.assert_array_equal(arrays["x"], [1.0, 2.0, 3.0])
    np.testing.assert_array_equal(arrays["y"], [5.0])


def test_probe_round_trip() -> None:
    m = decode_data(encode_probe(3, 5, 1.25), SIZES)
    assert (m.kind, m.sender, m.epoch, m.seq, m.iteration, m.send_time, m.payload) == (
        PROBE,
        3,
        5,
        -1,
        -1,
        1.25,
        {},
    )


def test_wrong_checksum_is_refused() -> None:
    frame = bytearray(encode_data(4, 2, 17, 9, 12.5, PAYLOAD))
    frame[-1] ^= 0x01
    refused(bytes(frame), match="checksum")
    frame[-1] ^= 0x01
    frame[3] ^= 0x80  # a header byte; the trailer still holds the old CRC
    refused(bytes(frame), match="checksum")


def test_every_truncation_is_refused() -> None:
    frame = encode_data(4, 2, 17, 9, 12.5, PAYLOAD)
    for n in range(len(frame)):
        refused(frame[:n])


def test_too_short_frames_name_the_bounds() -> None:
    for n in range(5):
        refused(b"\x00" * n, match=f"data frame of {n} bytes; expected 5 to {MAX_DATA_FRAME}")


def _frame_of_length(target: int) -> tuple[bytes, dict[str, int]]:
    """A valid data frame of exactly ``target`` bytes (key length tunes the last bytes)."""
    for values in range((target - 64) // 8, 0, -1):
        for key_len in range(1, 40):
            key = "k" * key_len
            frame = encode_data(1, 0, 0, 0, 0.0, {key: np.zeros(values)})
            if len(frame) == target:
                return frame, {key: values}
            if len(frame) > target:
                break
    raise AssertionError(f"no frame of {target} bytes")


def test_a_frame_of_exactly_the_bound_decodes() -> None:
    frame, sizes = _frame_of_length(MAX_DATA_FRAME)
    assert len(frame) == MAX_DATA_FRAME
    assert decode_data(frame, sizes).kind == DATA


def test_oversized_frames_are_refused_before_decoding() -> None:
    # A valid checksum on a frame one byte past the bound: the size alone refuses it.
    frame, sizes = _frame_of_length(MAX_DATA_FRAME + 1)
    refused(
        frame,
        sizes,
        match=f"data frame of {MAX_DATA_FRAME + 1} bytes; expected 5 to {MAX_DATA_FRAME}",
    )
    refused(sealed(b"\x00" * (4 * MAX_DATA_FRAME)), match="bytes; expected 5 to")


@pytest.mark.parametrize(
    "ext", [msgpack.ExtType(7, b"\x01\x02"), msgpack.ExtType(0, b""), msgpack.Timestamp(1, 0)]
)
def test_ext_types_are_refused_anywhere(ext: Any) -> None:
    # msgpack unpacks ext type -1 (timestamp) itself, so the schema must refuse it too.
    for position in range(6):
        header = good_header()
        header[position] = ext
        refused(raw_frame(*header))
    refused(raw_frame(*good_header(), payload={"x": ext, "y": f64(1)}))
    refused(raw_frame(*good_header(), payload={"x": f64(3), "y": f64(1), "z": ext}))


@pytest.mark.parametrize(
    "obj",
    [
        None,
        7,
        "frame",
        b"\x00\x01",
        {"kind": 0},
        [],
        good_header(),  # six elements: no payload
        [*good_header(), {}, "extra"],  # eight elements
    ],
    ids=["nil", "int", "str", "bin", "map", "empty", "six", "eight"],
)
def test_non_array_or_wrong_length_is_refused(obj: Any) -> None:
    refused(sealed(msgpack.packb(obj)), match="not a 7-element array")


def test_trailing_bytes_after_the_array_are_refused() -> None:
    body = msgpack.packb([*good_header(), {}]) + msgpack.packb(0)
    refused(sealed(body), match="does not decode")


@pytest.mark.parametrize(
    ("position", "value"),
    [
        (1, True),  # bool where the sender id is an int
        (1, 4.0),
        (1, "4"),
        (1, None),
        (2, False),  # epoch
        (2, 2.0),
        (3, 17.0),  # float seq
        (3, True),
        (3, b"\x11"),
        (4, 9.5),  # iteration
        (4, None),
        (5, 12),  # send time must be a float, not an int
        (5, True),
        (5, "12.5"),
    ],
)
def test_wrong_header_types_are_refused(position: int, value: Any) -> None:
    header = good_header()
    header[position] = value
    refused(raw_frame(*header), match="header has wrong types")


@pytest.mark.parametrize("payload", [[], None, "x", b"x", 3], ids=str)
def test_payload_that_is_not_a_map_is_refused(payload: Any) -> None:
    refused(raw_frame(*good_header(), payload=payload), match="header has wrong types")


@pytest.mark.parametrize("kind", [False, 0.0, True, 1.0, -0.0], ids=repr)
def test_kind_must_be_the_integer_zero_or_one(kind: Any) -> None:
    # msgpack keeps bool and float apart from int; the kind field must be as strict as the
    # other header fields (False == 0 and 1.0 == 1 in Python, which is no excuse).
    header = good_header()
    header[0] = kind
    refused(raw_frame(*header))
    refused(raw_frame(kind, 4, 2, -1, -1, 1.0, payload={}))


@pytest.mark.parametrize("kind", [2, -1, 255, "data", None])
def test_unknown_kind_is_refused(kind: Any) -> None:
    header = good_header()
    header[0] = kind
    refused(raw_frame(*header), match="out of range")


@pytest.mark.parametrize(("position", "field"), [(2, "epoch"), (3, "seq"), (4, "iteration")])
def test_negative_counters_are_refused(position: int, field: str) -> None:
    header = good_header()
    header[position] = -1
    refused(raw_frame(*header), match="out of range")


@pytest.mark.parametrize("send_time", [math.nan, math.inf, -math.inf])
def test_non_finite_send_time_is_refused(send_time: float) -> None:
    # A send time feeds the delay statistics (receive time minus send time); NaN poisons
    # every median and percentile it joins.
    header = good_header()
    header[5] = send_time
    refused(raw_frame(*header))
    layout = DataLayout(SIZES)  # the fast path too
    with pytest.raises(WireError):
        layout.decode(layout.encode(4, 2, 17, 9, send_time, PAYLOAD))


def test_probe_with_a_payload_is_refused() -> None:
    refused(raw_frame(PROBE, 3, 5, -1, -1, 1.0), match="out of range")


def f64(n: int) -> bytes:
    return np.zeros(n, dtype="<f8").tobytes()


@pytest.mark.parametrize(
    "payload",
    [
        {},  # no keys
        {"x": f64(3)},  # a key missing
        {"x": f64(3), "y": f64(1), "z": f64(1)},  # an extra key
        {"x": f64(3), "z": f64(1)},  # a wrong key
        {"x": f64(2), "y": f64(1)},  # too short
        {"x": f64(4), "y": f64(1)},  # too long
        {"x": f64(3) + b"\x00", "y": f64(1)},  # not a whole number of float64s
        {"x": f64(3), "y": b""},
        {"x": [0.0, 0.0, 0.0], "y": f64(1)},  # floats as an array, not raw bytes
        {"x": "\x00" * 24, "y": f64(1)},  # a string of the right length
        {b"x": f64(3), "y": f64(1)},  # a binary key
    ],
    ids=[
        "empty",
        "missing",
        "extra",
        "wrong-key",
        "short",
        "long",
        "ragged",
        "empty-value",
        "array",
        "str",
        "bin-key",
    ],
)
def test_wrong_payload_keys_or_lengths_are_refused(payload: dict[Any, Any]) -> None:
    refused(raw_frame(*good_header(), payload=payload), match="payload")


def test_refusal_messages_name_what_was_expected() -> None:
    with pytest.raises(WireError, match=r"payload has keys \['x'\]; expected \['x', 'y'\]"):
        decode_data(raw_frame(*good_header(), payload={"x": f64(3)}), SIZES)
    with pytest.raises(WireError, match=r"payload 'x' missing or not 3 float64 values"):
        decode_data(raw_frame(*good_header(), payload={"x": f64(2), "y": f64(1)}), SIZES)


# ------------------------------------------------------------- the fixed-width fast layout


def test_layout_round_trip_and_plain_msgpack() -> None:
    layout = DataLayout(SIZES)
    frame = layout.encode(4, 2, 17, 9, 12.5, PAYLOAD)
    assert len(frame) == layout.length
    kind, sender, epoch, seq, iteration, send_time, payload = layout.decode(frame)
    assert (kind, sender, epoch, seq, iteration, send_time) == (DATA, 4, 2, 17, 9, 12.5)
    for k, v in PAYLOAD.items():
        np.testing.assert_array_equal(layout.arrays(payload)[k], v)
    # ordinary msgpack: the general decoder and msgpack itself read it
    m = decode_data(frame, SIZES)
    assert (m.sender, m.epoch, m.seq, m.iteration, m.send_time) == (4, 2, 17, 9, 12.5)
    assert msgpack.unpackb(frame[:-4])[:6] == [DATA, 4, 2, 17, 9, 12.5]


def test_layout_reads_frames_of_the_general_encoder() -> None:
    layout = DataLayout(SIZES)
    got = layout.decode(encode_data(4, 2, 17, 9, 12.5, PAYLOAD))
    assert got[:6] == (DATA, 4, 2, 17, 9, 12.5)
    np.testing.assert_array_equal(layout.arrays(got[6])["x"], PAYLOAD["x"])
    assert layout.decode(encode_probe(3, 1, 0.5))[:6] == (PROBE, 3, 1, -1, -1, 0.5)


@pytest.mark.parametrize(
    "header",
    [
        (-1, 0, 0, 0, 0.0),
        (1 << 32, 0, 0, 0, 0.0),
        (0, -1, 0, 0, 0.0),
        (0, 1 << 32, 0, 0, 0.0),
        (0, 0, -1, 0, 0.0),
        (0, 0, 1 << 64, 0, 0.0),  # seq past uint64
        (0, 0, 0, -1, 0.0),
        (0, 0, 0, 1 << 64, 0.0),  # iteration past uint64
    ],
    ids=str,
)
def test_layout_encoder_refuses_out_of_range_headers(header: tuple[int, ...]) -> None:
    with pytest.raises(WireError, match="out of range"):
        DataLayout(SIZES).encode(*header, PAYLOAD)


def test_layout_refuses_what_it_cannot_lay_out() -> None:
    with pytest.raises(WireError, match="at most 15 payload arrays"):
        DataLayout({f"k{i}": 1 for i in range(16)})
    with pytest.raises(WireError, match="too long"):
        DataLayout({"k" * 256: 1})


def _same_outcome(layout: DataLayout, frame: bytes) -> None:
    """The fast decoder and the general one agree: both refuse, or both return the same."""
    try:
        general = decode_data(frame, layout.sizes)
    except WireError:
        with pytest.raises(WireError):
            layout.decode(frame)
        return
    fast = layout.decode(frame)
    assert fast[:6] == tuple(general[:6])
    assert [type(v) for v in fast[:6]] == [type(v) for v in general[:6]]
    a, b = layout.arrays(fast[6]), payload_arrays(general.payload)
    assert set(a) == set(b)
    for k in a:
        assert a[k].tobytes() == b[k].tobytes()


# ------------------------------------------------------------------------ control frames

#: one valid message per control type (the test below insists every type has one)
CONTROL_SAMPLES: dict[str, dict[str, Any]] = {
    "hello": {"agent": 3, "host": "buoy-3", "pid": 4242, "version": "0.1.0", "protocol": 2},
    "bound": {"endpoint": "tcp://127.0.0.1:5999"},
    "ready": {},
    "pong": {"seq": 2, "t_coord": 10.5, "t_node": 11},
    "tel": {
        "samples": [[0, 1.0, [0.5, 0.25], None, 3.0, None]],
        "links": {1: {0: [1, 1, 0, 0, 0, 0, 0, 0, 0, None, None, None]}},
        "counters": {"sent": 1, "age": 0.0},
    },
    "ack": {"directive": 1, "t_node": 2.5},
    "heard": {"sender": 3, "epoch": 1},
    "final": {
        "state": {"x": [0.5, 0.25]},
        "iteration": 100,
        "links": {},
        "counters": {"sent": 100},
        "reason": "budget",
    },
    "failed": {"error": "diverged"},
    "refused": {"total": 1, "records": [{"socket": "data", "address": "10.0.0.9:4711"}]},
    "plan": {"plan": {"agent": 3, "epoch": 0, "in_neighbours": [2, 4]}},
    "peers": {"peers": {2: ["ipc:///tmp/a2-e0", 0], 4: ["tcp://10.0.0.5:7001", 1]}},
    "ping": {"seq": 0, "t_coord": 1.0},
    "go": {"start_node": 12.25, "iteration": 0},
    "directive": {"directive": 7, "action": "add", "fault": {"fault": {}, "from": [1]}},
    "process": {"action": "slow", "factor": 3, "restart_after_s": None},
    "stop": {"reason": "budget"},
    "beat": {},
    "refuse": {"reason": "agent id 99 is not in 0..3"},
}


def packed(obj: dict[Any, Any]) -> bytes:
    return msgpack.packb(obj)


def test_every_control_type_has_a_sample() -> None:
    assert set(CONTROL_SAMPLES) == set(CONTROL_SCHEMA)
    for kind, fields in CONTROL_SAMPLES.items():
        assert set(fields) == set(CONTROL_SCHEMA[kind]), kind


@pytest.mark.parametrize("kind", sorted(CONTROL_SCHEMA))
def test_control_round_trip(kind: str) -> None:
    fields = CONTROL_SAMPLES[kind]
    msg = decode_control(encode_control(kind, **fields))
    assert msg == {"t": kind, **fields}


def test_control_encoder_turns_numpy_into_plain_values() -> None:
    msg = decode_control(
        encode_control("final", **{**CONTROL_SAMPLES["final"], "state": {"x": np.arange(3.0)}})
    )
    assert msg["state"] == {"x": [0.0, 1.0, 2.0]}
    msg = decode_control(encode_control("ping", seq=np.int64(4), t_coord=np.float64(0.5)))
    assert msg == {"t": "ping", "seq": 4, "t_coord": 0.5}
    assert type(msg["seq"]) is int


def test_encoding_an_unknown_type_is_refused() -> None:
    with pytest.raises(WireError, match="unknown control message type 'shout'"):
        encode_control("shout")


@pytest.mark.parametrize("kind", ["shout", "", "HELLO", 3, None, True, b"hello", ["hello"]])
def test_unknown_control_type_is_refused(kind: Any) -> None:
    refused_control(packed({"t": kind}), match="unknown type")


def test_control_frame_without_a_type_is_refused() -> None:
    refused_control(packed({"agent": 3}), match="unknown type None")


@pytest.mark.parametrize(
    "kind", sorted(k for k, schema in CONTROL_SCHEMA.items() if schema), ids=str
)
def test_every_missing_control_key_is_refused(kind: str) -> None:
    for key in CONTROL_SCHEMA[kind]:
        fields = {k: v for k, v in CONTROL_SAMPLES[kind].items() if k != key}
        refused_control(packed({"t": kind, **fields}), match=f"lacks key '{key}'")


@pytest.mark.parametrize("kind", sorted(CONTROL_SCHEMA))
def test_extra_control_keys_are_refused(kind: str) -> None:
    fields = CONTROL_SAMPLES[kind]
    refused_control(packed({"t": kind, **fields, "extra": 1}), match="unexpected keys")
    refused_control(packed({"t": kind, **fields, 5: 1}), match="unexpected keys")


def _wrong_values(typ: type | tuple[type, ...]) -> list[Any]:
    """Values of the wrong type for a schema entry (bool is never an int or a number)."""
    candidates = [True, False, None, "1", b"1", 1, 1.5, [1], {"a": 1}]
    types = typ if isinstance(typ, tuple) else (typ,)
    return [v for v in candidates if isinstance(v, bool) or not isinstance(v, types)]


@pytest.mark.parametrize(
    "kind", sorted(k for k, schema in CONTROL_SCHEMA.items() if schema), ids=str
)
def test_every_wrong_control_value_type_is_refused(kind: str) -> None:
    checked = 0
    for key, typ in CONTROL_SCHEMA[kind].items():
        for wrong in _wrong_values(typ):
            fields = {**CONTROL_SAMPLES[kind], key: wrong}
            refused_control(packed({"t": kind, **fields}), match=f"key '{key}' has type")
            checked += 1
    assert checked >= 5 * len(CONTROL_SCHEMA[kind])


@pytest.mark.parametrize(
    "frame",
    [b"", b"\xc1", b"\x92\x01", b"\x81\xa1t", packed([1, 2]), msgpack.packb("hello")],
    ids=["empty", "reserved-byte", "truncated", "truncated-map", "array", "str"],
)
def test_control_frames_that_are_not_maps_are_refused(frame: bytes) -> None:
    refused_control(frame)


def test_control_ext_type_is_refused() -> None:
    frame = packed({"t": "failed", "error": msgpack.ExtType(1, b"boom")})
    refused_control(frame, match="extension type 1 is not allowed")
    nested = packed(
        {**{"t": "tel"}, **CONTROL_SAMPLES["tel"], "samples": [msgpack.ExtType(9, b"")]}
    )
    refused_control(nested, match="extension type 9 is not allowed")


def test_control_timestamp_ext_type_is_refused() -> None:
    # Ext type -1 is unpacked by msgpack itself (to msgpack.Timestamp) and never reaches
    # ext_hook, so nested in a list or dict it would slip through the schema check.
    tel = {**CONTROL_SAMPLES["tel"], "samples": [msgpack.Timestamp(1, 0)]}
    refused_control(packed({"t": "tel", **tel}))
    plan = {"plan": {"when": msgpack.Timestamp(2, 5)}}
    refused_control(packed({"t": "plan", **plan}))


def test_oversized_control_frame_is_refused() -> None:
    # A frame exactly at the bound decodes; one byte more is refused by its size alone.
    base = len(packed({"t": "failed", "error": ""}))
    # str 32 header: 5 bytes instead of the fixstr's 1
    error = "e" * (MAX_CONTROL_FRAME - base - 4)
    frame = packed({"t": "failed", "error": error})
    assert len(frame) == MAX_CONTROL_FRAME
    assert decode_control(frame)["error"] == error
    frame = packed({"t": "failed", "error": error + "e"})
    refused_control(frame, match=f"control frame of {MAX_CONTROL_FRAME + 1} bytes")


# ---------------------------------------------------------------------------- properties
EXAMPLES = 250


@settings(max_examples=EXAMPLES, deadline=None)
@given(st.binary(max_size=300))
def test_random_bytes_only_ever_raise_wire_error(data: bytes) -> None:
    for frame in (data, sealed(data)):  # raw, and past the checksum
        try:
            decode_data(frame, SIZES)
        except WireError:
            pass
        try:
            decode_control(frame)
        except WireError:
            pass


msgpack_scalars = (
    st.none()
    | st.booleans()
    | st.integers(-(2**63), 2**64 - 1)
    | st.floats()
    | st.text(max_size=4)
    | st.binary(max_size=24)
)
msgpack_values = (
    msgpack_scalars
    | st.lists(msgpack_scalars, max_size=3)
    | st.dictionaries(st.text(max_size=2) | st.integers(-3, 3), msgpack_scalars, max_size=3)
)


def _conforms_data(m: DataMessage) -> None:
    assert type(m.sender) is int and type(m.epoch) is int and type(m.seq) is int
    assert type(m.iteration) is int and type(m.send_time) is float
    assert type(m.kind) is int
    if m.kind == PROBE:
        assert m.payload == {}
    else:
        assert m.kind == DATA and m.seq >= 0 and m.iteration >= 0 and m.epoch >= 0
        assert {k: len(v) for k, v in m.payload.items()} == {k: 8 * n for k, n in SIZES.items()}


@settings(max_examples=EXAMPLES, deadline=None)
@given(st.lists(msgpack_values, min_size=0, max_size=9))
def test_random_msgpack_arrays_decode_to_valid_frames_or_wire_error(items: list[Any]) -> None:
    # Random bytes rarely get past msgpack; random objects reach the schema checks.
    frame = sealed(msgpack.packb(items))
    try:
        m = decode_data(frame, SIZES)
    except WireError:
        return
    _conforms_data(m)


@settings(max_examples=EXAMPLES, deadline=None)
@given(
    st.sampled_from(sorted(CONTROL_SCHEMA)),
    st.dictionaries(st.text(max_size=10), msgpack_values, max_size=6),
    st.booleans(),
)
def test_random_control_maps_decode_to_valid_messages_or_wire_error(
    kind: str, fields: dict[str, Any], with_type: bool
) -> None:
    obj = {"t": kind, **fields} if with_type else fields
    try:
        msg = decode_control(msgpack.packb(obj))
    except WireError:
        return
    schema = CONTROL_SCHEMA[msg["t"]]
    assert set(msg) == {"t", *schema}
    for key, typ in schema.items():
        assert isinstance(msg[key], typ) and not isinstance(msg[key], bool)


headers = st.tuples(
    st.integers(0, 2**63 - 1),  # sender
    st.integers(0, 2**63 - 1),  # epoch
    st.integers(0, 2**63 - 1),  # seq
    st.integers(0, 2**63 - 1),  # iteration
    st.floats(allow_nan=False, allow_infinity=False),
)
payloads = st.dictionaries(
    st.text(min_size=1, max_size=12),
    st.lists(st.floats(allow_nan=False), min_size=0, max_size=12),
    max_size=4,
)


@settings(max_examples=EXAMPLES, deadline=None)
@given(headers, payloads)
def test_valid_frames_round_trip_exactly(
    header: tuple[int, int, int, int, float], payload: dict[str, list[float]]
) -> None:
    arrays = {k: np.asarray(v, dtype=float) for k, v in payload.items()}
    sizes = {k: len(v) for k, v in payload.items()}
    m = decode_data(encode_data(*header, arrays), sizes)
    assert (m.kind, m.sender, m.epoch, m.seq, m.iteration, m.send_time) == (DATA, *header)
    out = payload_arrays(m.payload)
    assert set(out) == set(arrays)
    for k, v in arrays.items():
        # bit-exact, so -0.0 and every subnormal survive too
        assert out[k].tobytes() == v.astype("<f8").tobytes()


@settings(max_examples=EXAMPLES, deadline=None)
@given(headers, payloads, st.data())
def test_bit_flips_in_valid_frames_are_always_refused(
    header: tuple[int, int, int, int, float], payload: dict[str, list[float]], data: st.DataObject
) -> None:
    # CRC-32 (IEEE 802.3 polynomial) detects every error of up to 3 bits in frames of up to
    # 91607 bits, and every burst of up to 32 bits: Koopman, DSN 2002 (bit count from memory).
    arrays = {k: np.asarray(v, dtype=float) for k, v in payload.items()}
    sizes = {k: len(v) for k, v in payload.items()}
    frame = encode_data(*header, arrays)
    assert 8 * len(frame) < 91607
    nbits = 8 * len(frame)
    flips = data.draw(st.sets(st.integers(0, nbits - 1), min_size=1, max_size=3))
    buf = bytearray(frame)
    for bit in flips:
        buf[bit // 8] ^= 1 << (bit % 8)
    with pytest.raises(WireError):
        decode_data(bytes(buf), sizes)


@settings(max_examples=EXAMPLES, deadline=None)
@given(headers, payloads, st.integers(0, 2**32 - 1), st.integers(1, 4))
def test_burst_errors_in_valid_frames_are_always_refused(
    header: tuple[int, int, int, int, float],
    payload: dict[str, list[float]],
    where: int,
    width: int,
) -> None:
    # Any burst of up to 32 bits: overwrite up to four consecutive bytes with other bytes.
    arrays = {k: np.asarray(v, dtype=float) for k, v in payload.items()}
    frame = encode_data(*header, arrays)
    start = where % (len(frame) - width + 1)
    old = frame[start : start + width]
    new = bytes(b ^ 0xA5 for b in old)  # 0xA5 has its first and last bit set: a full burst
    mutated = frame[:start] + new + frame[start + width :]
    with pytest.raises(WireError):
        decode_data(mutated, {k: len(v) for k, v in payload.items()})


@settings(max_examples=EXAMPLES, deadline=None)
@given(
    st.sampled_from(sorted(CONTROL_SCHEMA)),
    st.integers(-(2**63), 2**64 - 1),
    st.text(max_size=20),
    st.floats(allow_nan=False),
    st.lists(st.integers(-100, 100) | st.text(max_size=5), max_size=5),
    st.dictionaries(st.integers(0, 50), st.lists(st.text(max_size=5), max_size=3), max_size=4),
)
def test_control_frames_round_trip_exactly(
    kind: str, i: int, s: str, x: float, items: list[Any], table: dict[int, Any]
) -> None:
    values: dict[Any, Any] = {int: i, str: s, list: items, dict: table}
    fields = {}
    for key, typ in CONTROL_SCHEMA[kind].items():
        fields[key] = x if isinstance(typ, tuple) else values[typ]
    assert decode_control(encode_control(kind, **fields)) == {"t": kind, **fields}


@settings(max_examples=EXAMPLES, deadline=None)
@given(
    headers.filter(lambda h: h[0] < 1 << 32 and h[1] < 1 << 32),
    st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=6),
    st.booleans(),
)
def test_fast_decoder_is_as_strict_as_the_general_one(
    header: tuple[int, int, int, int, float], edits: list[tuple[int, int]], reseal: bool
) -> None:
    # Byte substitutions anywhere in a fast-layout frame; resealed, they pass the checksum
    # and reach the structure checks, where both decoders must reach the same verdict.
    layout = DataLayout(SIZES)
    frame = bytearray(layout.encode(*header, PAYLOAD))
    body = frame[:-4]
    for at, value in edits:
        body[at % len(body)] = value
    mutated = sealed(bytes(body)) if reseal else bytes(body) + bytes(frame[-4:])
    _same_outcome(layout, mutated)
    if not reseal and bytes(body) != bytes(frame[:-4]):
        with pytest.raises(WireError):
            layout.decode(mutated)


@settings(max_examples=EXAMPLES, deadline=None)
@given(st.lists(msgpack_values, min_size=7, max_size=7), st.booleans())
def test_fast_decoder_agrees_on_random_seven_element_frames(
    items: list[Any], payload_like: bool
) -> None:
    layout = DataLayout(SIZES)
    if payload_like:
        items[6] = {"x": f64(3), "y": f64(1)}
    _same_outcome(layout, sealed(msgpack.packb(items)))


def test_crc_trailer_is_little_endian_crc32_of_the_body() -> None:
    # zlib's CRC-32 is the IEEE 802.3 one; check value of "123456789" is 0xCBF43926
    # (common practice, no source beyond the CRC catalogues).
    assert zlib.crc32(b"123456789") == 0xCBF43926
    frame = encode_data(1, 2, 3, 4, 5.0, PAYLOAD)
    assert struct.unpack("<I", frame[-4:])[0] == zlib.crc32(frame[:-4])
    assert msgpack.unpackb(frame[:-4])[:6] == [DATA, 1, 2, 3, 4, 5.0]


def test_the_control_encoder_refuses_what_the_decoder_would() -> None:
    with pytest.raises(WireError, match="needs keys"):
        encode_control("pong", seq=1, t_coord=2.0)  # t_node missing
    with pytest.raises(WireError, match="needs keys"):
        encode_control("ready", extra=1)
    with pytest.raises(WireError, match="'seq' has type bool"):
        encode_control("ping", seq=True, t_coord=1.0)
    with pytest.raises(WireError, match="'reason' has type int"):
        encode_control("stop", reason=3)
