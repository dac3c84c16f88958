"""Whatever a rig sends, the codec gives a valid typed message or a ProtocolError with a counted reason.

Property-based checks with hypothesis, and hand-made frames at the edges.
Throwing generated garbage at a parser and asserting that only its own error
escapes is common practice for fuzzing (no single published source). Byte
layouts follow the MessagePack specification (msgpack/msgpack, spec.md):
0x91 is a fixarray of one element, 0xc4 a bin 8, 0xde a map 16. The largest
nesting msgpack's unpacker accepts, 1,024 containers, was measured with this
msgpack version; Python's default recursion limit of 1,000 is from memory.
"""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from decoder.messages import (
    ControlCommand,
    Heartbeat,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)
from rig_adapters.wire.protocol import (
    INPUT_KEYS,
    REASONS,
    ProtocolError,
    decode,
    decode_control_request,
    encode,
)

#: Longest error text a refusal may have, in characters: one sentence.
MAX_ERROR_CHARS = 400

#: Deepest nesting msgpack's unpacker accepts (measured: 1,025 raises StackError).
MSGPACK_MAX_DEPTH = 1024

TYPED = (SourceAnnounce, SpikeBatch, TrackerFrames, Heartbeat, SyncPulse, ControlCommand)

VALID = {
    "announce": {"v": 1, "k": "announce", "src": "ephys", "seq": 0, "role": "spikes", "clock": "ephys",
                 "rate_hz": 30000.0, "units": [3, 7, 12]},
    "spikes": {"v": 1, "k": "spikes", "src": "ephys", "seq": 5, "t": np.array([0.001, 0.002]).tobytes(),
               "u": np.array([3, 7], np.int32).tobytes()},
    "spikes_lists": {"v": 1, "k": "spikes", "src": "ephys", "seq": 5, "t": [0.001, 0.002], "u": [3, 7]},
    "frame": {"v": 1, "k": "frames", "src": "cam", "seq": 2, "t": np.array([1.0]).tobytes(),
              "x": np.array([10.0]).tobytes(), "y": np.array([20.0]).tobytes(), "q": b"\x07"},
    "frames": {"v": 1, "k": "frames", "src": "cam", "seq": 2, "t": [1.0, 1.02], "x": [10.0, 11.0],
               "y": [20.0, 21.0], "hd": [0.0, 0.1], "q": [5, 0]},
    "heartbeat": {"v": 1, "k": "heartbeat", "src": "ephys", "seq": 9, "t": 12.5},
    "sync": {"v": 1, "k": "sync", "src": "syncbox", "seq": 1, "t": 3.25, "pulse": 17},
    "control": {"v": 1, "k": "control", "src": "script", "seq": 0, "cmd": "arm", "args": {"zone": "goal"}},
}

ALL_KEYS = sorted(set().union(*(spec.allowed for spec in INPUT_KEYS.values())))


def assert_valid(msg) -> None:
    """What every decoded message promises the core (decoder/messages.py docstrings)."""
    assert isinstance(msg, TYPED)
    assert type(msg.source) is str and 1 <= len(msg.source) <= 64
    assert type(msg.seq) is int and 0 <= msg.seq < 2**63
    if isinstance(msg, SpikeBatch):
        assert msg.t_s.dtype == np.float64 and msg.unit_id.dtype == np.int64
        assert msg.t_s.shape == msg.unit_id.shape and np.isfinite(msg.t_s).all()
        assert not (np.diff(msg.t_s) < 0).any()
    elif isinstance(msg, TrackerFrames):
        n = msg.t_s.size
        assert msg.xy_cm.shape == (n, 2) and msg.quality.shape == (n,) and msg.quality.dtype == np.uint8
        assert np.isfinite(msg.t_s).all() and (np.diff(msg.t_s) > 0).all()
        assert not np.isinf(msg.xy_cm).any()
        lost = msg.quality == 0
        assert np.isnan(msg.xy_cm[lost]).all() and np.isfinite(msg.xy_cm[~lost]).all()
    elif isinstance(msg, (Heartbeat, SyncPulse)):
        assert type(msg.t_s) is float and math.isfinite(msg.t_s)
    elif isinstance(msg, SourceAnnounce):
        assert msg.unit_ids.dtype == np.int64 and np.unique(msg.unit_ids).size == msg.unit_ids.size
    # A valid message survives its own round trip (PROTOCOL.md: decode(encode(msg)) gives it back).
    assert type(decode(encode(msg))) is type(msg)


def check(data: bytes, reader=decode) -> str:
    """Decode; return "ok" for a valid message or the refusal's reason. Anything else fails the test."""
    try:
        msg = reader(data)
    except ProtocolError as exc:
        assert exc.reason in REASONS
        assert exc.detail and len(str(exc)) <= MAX_ERROR_CHARS, str(exc)[:200]
        return exc.reason
    assert_valid(msg)
    return "ok"


# ----------------------------------------------------------------- generated garbage

_leaves = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**63), max_value=2**64 - 1),  # the MessagePack integer range (spec)
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=80),
    st.binary(max_size=40),
)
_values = st.recursive(
    _leaves,
    lambda inner: st.one_of(
        st.lists(inner, max_size=6),
        st.dictionaries(st.one_of(st.text(max_size=8), st.binary(max_size=4)), inner, max_size=5),
    ),
    max_leaves=20,
)


@st.composite
def structured_frames(draw) -> bytes:
    """A valid input map with keys replaced, removed or added, packed."""
    m = dict(draw(st.sampled_from(list(VALID.values()))))
    for _ in range(draw(st.integers(1, 4))):
        key = draw(st.one_of(st.sampled_from(ALL_KEYS), st.sampled_from(list(m)), st.text(max_size=6),
                             st.binary(min_size=1, max_size=3)))
        if draw(st.integers(0, 4)) == 0:
            m.pop(key, None)
        else:
            m[key] = draw(_values)
    return msgpack.packb(m, use_bin_type=True)


_FUZZ = settings(max_examples=600, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@pytest.mark.filterwarnings("error")  # a numpy warning on hostile input would be a leak too
@_FUZZ
@given(structured_frames())
def test_structured_garbage_gives_a_valid_message_or_a_counted_reason(data):
    check(data)


@pytest.mark.filterwarnings("error")
@_FUZZ
@given(st.binary(max_size=2048))
def test_random_bytes_give_a_valid_message_or_a_counted_reason(data):
    check(data)


@pytest.mark.filterwarnings("error")
@settings(max_examples=300, deadline=None)
@given(structured_frames())
def test_control_requests_of_garbage_give_a_reply_reason(data):
    check(data, decode_control_request)


# ----------------------------------------------------------------- hostile frames by hand

_MARK = "\u2603" * 3  # a placeholder string that packs to bytes found nowhere else in the frame


def frame_with(base: dict, key: str, raw_value: bytes) -> bytes:
    """``base`` with ``key`` holding the MessagePack bytes ``raw_value``, spliced in by hand."""
    packed = msgpack.packb(base | {key: _MARK}, use_bin_type=True)
    mark = msgpack.packb(_MARK)
    assert packed.count(mark) == 1
    return packed.replace(mark, raw_value)


def deep_list(depth: int) -> bytes:
    return b"\x91" * depth + b"\x01"  # fixarray of one, ``depth`` times, around the integer 1


@pytest.mark.parametrize("depth", [999, 1000, MSGPACK_MAX_DEPTH - 1])
@pytest.mark.parametrize(
    "base, key",
    [("heartbeat", k) for k in ("v", "k", "src", "seq", "t", "iw")]
    + [("spikes", "t"), ("spikes", "u"), ("frames", "x"), ("frames", "q"), ("frames", "hd"),
       ("announce", "role"), ("announce", "units"), ("announce", "rate_hz"), ("sync", "pulse"),
       ("control", "cmd"), ("control", "args")],
)
def test_a_list_nested_a_thousand_deep_in_any_field_is_a_short_refusal(base, key, depth):
    # Issue: ~1 KB frames with lists 1,000 deep in v, k, src or seq raised RecursionError.
    reason = check(frame_with(VALID[base], key, deep_list(depth)))
    assert reason != "ok"


def test_a_list_nested_a_thousand_deep_in_control_args_is_refused():
    args = b"\x81\xa4zone" + deep_list(1000)  # fixmap of one: "zone" -> the deep list
    assert check(frame_with(VALID["control"], "args", args), decode_control_request) == "bad_field"


@pytest.mark.parametrize(
    "base, key, reason",
    [("heartbeat", "v", "bad_version"), ("heartbeat", "k", "unknown_kind"), ("heartbeat", "src", "bad_field"),
     ("heartbeat", "seq", "bad_field"), ("heartbeat", "t", "bad_field"), ("control", "args", "bad_field"),
     ("spikes", "u", "bad_array")],
)
def test_a_huge_map_in_any_field_is_a_short_refusal(base, key, reason):
    huge = {f"key{i}": [i, [i]] for i in range(1000)}  # 1,000 entries: under the 1,024 map limit (PROTOCOL.md)
    assert check(msgpack.packb(VALID[base] | {key: huge}, use_bin_type=True)) == reason


def test_bytes_as_map_keys_are_refused():
    for key in (b"v", b"x_own", b"\xff"):
        assert check(msgpack.packb(VALID["heartbeat"] | {key: 1}, use_bin_type=True)) == "bad_field"
    args = {"zone": "goal", b"zone": "start"}
    assert check(msgpack.packb(VALID["control"] | {"args": args}, use_bin_type=True)) == "bad_field"


@pytest.mark.parametrize("iw", [0, 3, 16, -8, 8.0, True, "8", [8], None, 2**64 - 1])
@pytest.mark.parametrize("base", ["heartbeat", "spikes", "frame", "announce", "sync", "control"])
def test_a_bogus_integer_width_is_refused_on_every_kind(base, iw):
    # PROTOCOL.md section 3: iw is 4 or 8, on any message.
    assert check(msgpack.packb(VALID[base] | {"iw": iw}, use_bin_type=True)) == "bad_field"


def test_every_hand_made_valid_frame_decodes():
    for m in VALID.values():
        assert check(msgpack.packb(m, use_bin_type=True)) == "ok"
