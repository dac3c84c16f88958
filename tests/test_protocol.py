"""The wire codec (rig_adapters.wire.protocol) on real bytes.

References used below: the MessagePack specification (msgpack/msgpack,
spec.md: format bytes for fixmap, fixstr, float 64, bin 8, array 32, ext);
IEEE 754 binary64/binary32 layouts as written by Python's ``struct`` module,
independent of numpy; PROTOCOL.md beside the module for the key names.
"""

from __future__ import annotations

import math
import random
import re
import socket
import struct
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq

from rig_adapters.wire import protocol
from decoder.messages import (
    MAX_BATCH,
    ControlCommand,
    Heartbeat,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)
from rig_adapters.wire.protocol import (
    MAX_FRAME_BYTES,
    PROTOCOL_VERSION,
    REASONS,
    ProtocolError,
    decode,
    decode_control_reply,
    decode_control_request,
    decode_output,
    encode,
    encode_control_reply,
    encode_control_request,
    encode_event,
    encode_state,
)

PROTOCOL_MD = Path(protocol.__file__).with_name("PROTOCOL.md")


def pack(m: dict) -> bytes:
    return msgpack.packb(m, use_bin_type=True)


def reason_of(data, decoder=decode) -> str:
    with pytest.raises(ProtocolError) as info:
        decoder(data)
    assert info.value.reason in REASONS
    assert info.value.detail  # a sentence for the user, never empty
    return info.value.reason


def spikes_map(**over) -> dict:
    m = {"v": 1, "k": "spikes", "src": "ephys", "seq": 5, "t": [0.001, 0.002, 0.002], "u": [3, 7, 3]}
    m.update(over)
    return m


def frames_map(**over) -> dict:
    m = {"v": 1, "k": "frames", "src": "cam", "seq": 2, "t": [1.0, 1.033], "x": [10.0, 11.0], "y": [20.0, 21.5]}
    m.update(over)
    return m


VALID_MAPS = {
    "announce": {"v": 1, "k": "announce", "src": "ephys", "seq": 0, "role": "spikes", "clock": "ephys",
                 "rate_hz": 30000, "units": [3, 7, 12]},
    "spikes": spikes_map(),
    "frames": frames_map(),
    "heartbeat": {"v": 1, "k": "heartbeat", "src": "ephys", "seq": 9, "t": 12.5},
    "sync": {"v": 1, "k": "sync", "src": "syncbox", "seq": 1, "t": 3.25, "pulse": 17},
    "control": {"v": 1, "k": "control", "src": "script", "seq": 0, "cmd": "arm", "args": {"zone": "goal"}},
}


def assert_same(a, b) -> None:
    assert type(a) is type(b)
    for name in a.__slots__:
        x, y = getattr(a, name), getattr(b, name)
        if isinstance(x, np.ndarray) or isinstance(y, np.ndarray):
            np.testing.assert_array_equal(x, y)
            assert np.asarray(x).dtype == np.asarray(y).dtype
        else:
            assert x == y, name


# ----------------------------------------------------------------- round trips

ROUND_TRIP = [
    SourceAnnounce("ephys", 0, "spikes", "ephys", 30000.0, [3, 7, 12]),
    SourceAnnounce("ephys", 0, "spikes", "ephys", 30000.0, [1, 2**40]),  # ids beyond int32: iw = 8
    SourceAnnounce("cam", 0, "tracker", "camclock", 50.0),
    SpikeBatch("ephys", 1, [0.5, 0.5, 0.75], [7, 3, 7]),
    SpikeBatch("ephys", 2, [], []),
    TrackerFrames("cam", 3, [1.0, 1.02, 1.04], [[1.0, 2.0], [np.nan, np.nan], [3.0, 4.0]],
                  head_dir_rad=[0.1, np.nan, -3.0], quality=[200, 0, 17]),
    TrackerFrames("cam", 4, [2.0], [[5.0, 6.0]]),
    Heartbeat("ephys", 5, 1234.5),
    SyncPulse("syncbox", 6, 2.5, 41),
    ControlCommand("script", 7, "load_model", {"path": "/data/m.npz", "strict": True}),
]


@pytest.mark.parametrize("msg", ROUND_TRIP, ids=lambda m: type(m).__name__)
def test_round_trip_of_every_input_kind(msg):
    assert_same(decode(encode(msg)), msg)


def test_spike_arrays_travel_as_little_endian_bin():
    batch = SpikeBatch("ephys", 1, [0.5, 0.625, 1.0], [7, 3, 70000])
    m = msgpack.unpackb(encode(batch), raw=False)
    # IEEE 754 binary64 and int32, little-endian, as Python's struct writes them (PROTOCOL.md section 3)
    assert m["t"] == struct.pack("<3d", 0.5, 0.625, 1.0)
    assert m["u"] == struct.pack("<3i", 7, 3, 70000)
    assert "iw" not in m


def test_wide_unit_ids_declare_int64():
    m = msgpack.unpackb(encode(SpikeBatch("ephys", 1, [0.5], [2**40])), raw=False)
    assert m["iw"] == 8 and m["u"] == struct.pack("<q", 2**40)  # struct: int64 little-endian


def test_plain_lists_decode_like_bin():
    as_lists = decode(pack(spikes_map()))
    as_bin = decode(pack(spikes_map(t=struct.pack("<3d", 0.001, 0.002, 0.002), u=struct.pack("<3i", 3, 7, 3))))
    assert_same(as_lists, as_bin)
    assert as_lists.t_s.dtype == np.float64 and as_lists.unit_id.dtype == np.int64


def test_whole_number_floats_are_accepted_as_unit_ids():
    # a MATLAB rig sends doubles by default (PROTOCOL.md section 3)
    assert decode(pack(spikes_map(u=[3.0, 7.0, 3.0]))).unit_id.tolist() == [3, 7, 3]


def test_int64_bin_with_iw_8():
    m = spikes_map(t=[0.1], u=struct.pack("<q", 2**40), iw=8)
    assert decode(pack(m)).unit_id.tolist() == [2**40]


def test_frames_as_lists_with_optional_arrays():
    msg = decode(pack(frames_map(hd=[0.0, math.pi], q=struct.pack("<2B", 255, 9))))
    np.testing.assert_array_equal(msg.xy_cm, [[10.0, 20.0], [11.0, 21.5]])
    assert msg.head_dir_rad.tolist() == [0.0, math.pi] and msg.quality.tolist() == [255, 9]


def test_nan_position_is_a_lost_frame_and_accepted():
    msg = decode(pack(frames_map(x=[float("nan"), 11.0])))
    assert np.all(np.isnan(msg.xy_cm[0])) and msg.quality.tolist() == [0, 1]


def test_hand_assembled_frame_from_the_msgpack_spec():
    # {"v": 1, "k": "heartbeat", "src": "a", "seq": 1, "t": 2.5}, byte by byte per the MessagePack spec:
    # 0x85 fixmap of 5; 0xa1 'v' fixstr; 0x01 positive fixint; 0xa9 fixstr of 9; 0xcb float 64, big-endian.
    data = (b"\x85" + b"\xa1v\x01" + b"\xa1k\xa9heartbeat" + b"\xa3src\xa1a" + b"\xa3seq\x01"
            + b"\xa1t\xcb" + struct.pack(">d", 2.5))
    assert decode(data) == Heartbeat("a", 1, 2.5)


def test_hand_assembled_bin_8_array():
    # 0xc4 = bin 8: a one-byte length, then the bytes (MessagePack spec); 16 bytes = two little-endian float64
    head = pack({"v": 1, "k": "spikes", "src": "a", "seq": 0, "u": [1, 2]})
    assert head[0] == 0x85  # fixmap of 5 (MessagePack spec); one more entry follows
    data = b"\x86" + head[1:] + b"\xa1t" + b"\xc4\x10" + struct.pack("<2d", 0.25, 0.5)
    assert decode(data).t_s.tolist() == [0.25, 0.5]


def test_decode_accepts_a_zmq_frame_buffer():
    data = encode(Heartbeat("ephys", 1, 2.0))
    assert decode(memoryview(data)) == Heartbeat("ephys", 1, 2.0)
    assert decode(zmq.Frame(data)) == Heartbeat("ephys", 1, 2.0)


def test_a_rigs_own_keys_are_ignored():
    # PROTOCOL.md section 2: rigs may add their own keys, prefixed x_
    assert decode(pack(VALID_MAPS["heartbeat"] | {"x_myrig_temp_c": 36.6})) == Heartbeat("ephys", 9, 12.5)
    assert decode(pack(VALID_MAPS["heartbeat"] | {"x_nested": [[[1]]], "iw": 8})) == Heartbeat("ephys", 9, 12.5)


@pytest.mark.parametrize("kind", list(VALID_MAPS))
def test_unknown_keys_are_refused(kind):
    # PROTOCOL.md section 2: a key the kind does not have, without the x_ prefix, is refused and counted
    assert reason_of(pack(VALID_MAPS[kind] | {"temp_c": 36.6})) == "unknown_field"
    assert reason_of(pack(VALID_MAPS[kind] | {"hd ": [0.0, 0.0]})) == "unknown_field"


def test_keys_of_another_kind_are_unknown():
    assert reason_of(pack(spikes_map(hd=[0.0, 0.0, 0.0]))) == "unknown_field"
    assert reason_of(pack(VALID_MAPS["heartbeat"] | {"pulse": 3})) == "unknown_field"


# ----------------------------------------------------------------- bad input

def test_random_bytes_are_not_msgpack():
    assert reason_of(b"\xc1") == "not_msgpack"  # 0xc1 is the one byte the spec never uses
    assert reason_of(b"") == "not_msgpack"
    assert reason_of(pack(spikes_map())[:-3]) == "not_msgpack"  # truncated
    assert reason_of(pack(spikes_map()) + b"\x00") == "not_msgpack"  # trailing bytes
    assert reason_of(b"\xa2\xff\xfe") == "not_msgpack"  # fixstr holding invalid UTF-8
    assert reason_of("a str, not bytes") == "not_msgpack"


@pytest.mark.parametrize("value", [[1, 2], 3, "spikes", None, b"\x00"])
def test_a_msgpack_value_other_than_a_map(value):
    assert reason_of(pack(value)) == "not_a_map"


@pytest.mark.parametrize("v", [0, 2, "1", 1.0, True, None])
def test_wrong_version(v):
    assert reason_of(pack(spikes_map(v=v))) == "bad_version"


def test_missing_version_or_kind():
    m = spikes_map()
    del m["v"]
    assert reason_of(pack(m)) == "missing_field"
    m = spikes_map()
    del m["k"]
    assert reason_of(pack(m)) == "missing_field"


@pytest.mark.parametrize("k", ["spike", "event", "state", "reply", 3, None, ["spikes"]])
def test_unknown_kind(k):
    assert reason_of(pack(spikes_map(k=k))) == "unknown_kind"


REQUIRED = {
    "announce": ["src", "seq", "role", "clock", "rate_hz", "units"],
    "spikes": ["src", "seq", "t", "u"],
    "frames": ["src", "seq", "t", "x", "y"],
    "heartbeat": ["src", "seq", "t"],
    "sync": ["src", "seq", "t", "pulse"],
    "control": ["src", "seq", "cmd"],
}


@pytest.mark.parametrize("kind, key", [(k, key) for k, keys in REQUIRED.items() for key in keys])
def test_each_required_field_is_required(kind, key):
    m = dict(VALID_MAPS[kind])
    del m[key]
    assert reason_of(pack(m)) == "missing_field"


def test_units_are_optional_for_a_tracker_announce():
    m = VALID_MAPS["announce"] | {"role": "tracker"}
    del m["units"]
    assert decode(pack(m)).unit_ids.size == 0


@pytest.mark.parametrize(
    "kind, key, value",
    [
        ("spikes", "src", 7),
        ("spikes", "src", ""),
        ("spikes", "src", "x" * 65),
        ("spikes", "seq", -1),
        ("spikes", "seq", 1.0),
        ("spikes", "seq", True),
        ("spikes", "iw", 3),
        ("spikes", "iw", [4]),
        ("spikes", "iw", True),
        ("heartbeat", "iw", 16),
        ("frames", "iw", "8"),
        ("spikes", "seq", 2**64 - 1),
        ("sync", "pulse", 2**63),
        ("announce", "role", "camera"),
        ("announce", "rate_hz", "30k"),
        ("announce", "rate_hz", 0),
        ("announce", "rate_hz", float("inf")),
        ("announce", "clock", 5),
        ("announce", "units", [3, 3]),
        ("sync", "pulse", -2),
        ("sync", "pulse", "a"),
        ("heartbeat", "t", "12.5"),
        ("control", "cmd", "self_destruct"),
        ("control", "args", [1, 2]),
        ("control", "args", {"path": ["nested", ["list"]]}),
        ("control", "args", {"n": 2**64 - 1}),
        ("frames", "q", [0, 256]),
        ("frames", "x", [float("inf"), 1.0]),
        ("frames", "y", [1.0, float("-inf")]),
        ("spikes", "u", [1.5, 2.0, 3.0]),
    ],
)
def test_wrong_types_and_ranges_are_bad_fields(kind, key, value):
    assert reason_of(pack(VALID_MAPS[kind] | {key: value})) == "bad_field"


@pytest.mark.parametrize(
    "value",
    [
        "0.001",                              # a str where bin belongs
        b"\x00" * 12,                        # 12 bytes: not a whole number of float64
        [0.1, "a", 0.3],
        [[0.1], [0.2], [0.3]],
        [0.1, None, 0.3],
        [0.1, True, 0.3],                    # MessagePack true is no number here
        {"0": 0.1},
        7.0,
    ],
)
def test_malformed_arrays(value):
    assert reason_of(pack(spikes_map(t=value))) == "bad_array"


@pytest.mark.parametrize(
    "u",
    [
        [2**64 - 1],            # msgpack uint 64 (MessagePack spec): beyond int64, numpy would read it as uint64
        [-1, 2**64 - 1],        # numpy reads this mix as float64, and a cast to int64 would wrap
        [1.0, 2.0**63],         # a whole float just past int64's largest value, 2**63 - 1
        [-(2.0**64)],
    ],
)
def test_unit_ids_beyond_int64_are_refused_never_wrapped(u):
    # int64 holds -2**63 .. 2**63 - 1 (two's complement, 64 bits): anything outside is refused, not wrapped
    m = spikes_map(t=[0.1] * len(u), u=u)
    assert reason_of(pack(m)) == "bad_field"
    assert reason_of(pack(VALID_MAPS["announce"] | {"units": u})) == "bad_field"


def test_the_largest_int64_unit_id_is_kept_exactly():
    # the int64 range's own ends (two's complement, 64 bits) are valid ids and stay exact
    ids = [-(2**63), 2**63 - 1]
    assert decode(pack(spikes_map(t=[0.1, 0.2], u=ids))).unit_id.tolist() == ids


@pytest.mark.parametrize(
    "m",
    [
        spikes_map(u=[1, 2]),
        spikes_map(u=struct.pack("<2i", 1, 2)),
        frames_map(x=[1.0]),
        frames_map(y=[1.0, 2.0, 3.0]),
        frames_map(hd=[0.1]),
        frames_map(q=b"\x01"),
    ],
)
def test_mismatched_array_lengths(m):
    assert reason_of(pack(m)) == "length_mismatch"


@pytest.mark.parametrize(
    "m",
    [
        spikes_map(t=[0.1, float("nan"), 0.3]),
        spikes_map(t=[0.1, float("inf"), 0.3]),
        spikes_map(t=struct.pack("<3d", 0.1, -math.inf, 0.3)),
        spikes_map(t=[0.3, 0.2, 0.1]),
        frames_map(t=[1.0, 1.0]),
        frames_map(t=[1.0, float("nan")]),
        VALID_MAPS["heartbeat"] | {"t": float("nan")},
        VALID_MAPS["sync"] | {"t": float("-inf")},
    ],
)
def test_nan_inf_and_disordered_times(m):
    assert reason_of(pack(m)) == "bad_time"


def test_oversized_frame_is_rejected_before_unpacking():
    data = b"\x00" * (MAX_FRAME_BYTES + 1)  # would be not_msgpack if it were unpacked
    assert reason_of(data) == "oversized"


def test_oversized_arrays():
    n = MAX_BATCH + 1
    assert reason_of(pack(spikes_map(t=[0.0] * n, u=[0] * n))) == "oversized"
    assert reason_of(pack(spikes_map(t=np.zeros(n).tobytes(), u=[0]))) == "oversized"
    # 0xdd = array 32 with a 4-byte length (MessagePack spec): a 16-byte frame declaring 4 billion items
    assert reason_of(b"\x81\xa1t\xdd\xff\xff\xff\xff" + b"\x00" * 8) == "oversized"
    # 0xc6 = bin 32 declaring 2 GiB with no bytes behind it: incomplete, refused before any allocation
    assert reason_of(b"\x81\xa1t\xc6\x7f\xff\xff\xff") == "not_msgpack"


def test_extension_types_are_refused():
    # the MessagePack spec's ext types (0xd4..0xd8, 0xc7..0xc9), the timestamp type -1 among them
    assert reason_of(pack(spikes_map(t=msgpack.ExtType(1, b"abcd")))) == "bad_field"
    assert reason_of(pack(VALID_MAPS["heartbeat"] | {"t": msgpack.Timestamp(5)})) == "bad_field"


def test_deep_nesting_is_refused_without_crashing():
    assert reason_of(b"\x91" * 100_000 + b"\x01") == "not_msgpack"  # 0x91 = fixarray of 1


def test_protocol_error_is_a_value_error_with_reason_and_detail():
    err = ProtocolError("bad_field", "'seq' must be a non-negative integer")
    assert isinstance(err, ValueError) and str(err).startswith("bad_field: ")


# ----------------------------------------------------------------- fuzzing

def _mutate(rng: random.Random, data: bytes) -> bytes:
    b = bytearray(data)
    for _ in range(rng.randint(1, 4)):
        op = rng.randrange(5)
        pos = rng.randrange(len(b) + 1)
        if op == 0 and b:
            b[min(pos, len(b) - 1)] = rng.randrange(256)
        elif op == 1:
            b[pos:pos] = bytes(rng.randrange(256) for _ in range(rng.randint(1, 8)))
        elif op == 2:
            del b[pos:pos + rng.randint(1, 8)]
        elif op == 3:
            b = b[:pos]
        else:
            b[pos:pos] = rng.choice([b"\xdd\xff\xff\xff\xff", b"\xc6\x00\x10\x00\x00", b"\xcb", b"\xc1", b"\x91" * 50])
    return bytes(b)


_ODD_VALUES = [None, True, -1, 0, 2**63, 2**64 - 1, -(2**63), 1e308, float("nan"), float("inf"), "", "x" * 70,
               b"", b"\x00" * 7, [], [1, "a"], [[1]], {}, {"a": []}, [float("nan")] * 3, msgpack.ExtType(0, b"")]


def _structured_case(rng: random.Random) -> bytes:
    m = dict(rng.choice(list(VALID_MAPS.values())))
    for _ in range(rng.randint(1, 3)):
        key = rng.choice(list(m) + ["iw", "hd", "q", "units", "args"])
        if rng.random() < 0.2:
            m.pop(key, None)
        else:
            m[key] = rng.choice(_ODD_VALUES)
    return msgpack.packb(m, use_bin_type=True)


def _fuzz_cases(seed: int, n: int):
    rng = random.Random(seed)
    seeds = [pack(m) for m in VALID_MAPS.values()] + [encode(msg) for msg in ROUND_TRIP]
    for i in range(n):
        pick = i % 3
        if pick == 0:
            yield bytes(rng.randrange(256) for _ in range(rng.randint(0, 64)))
        elif pick == 1:
            yield _mutate(rng, rng.choice(seeds))
        else:
            yield _structured_case(rng)


@pytest.mark.filterwarnings("error")  # a numpy warning on hostile input would be a leak too
def test_fuzz_only_protocol_error_escapes_decode():
    outcomes = {"ok": 0}
    for data in _fuzz_cases(seed=20240601, n=3000):
        try:
            msg = decode(data)
        except ProtocolError as exc:
            outcomes[exc.reason] = outcomes.get(exc.reason, 0) + 1
        else:
            assert isinstance(msg, (SourceAnnounce, SpikeBatch, TrackerFrames, Heartbeat, SyncPulse, ControlCommand))
            outcomes["ok"] += 1
    assert set(outcomes) - {"ok"} <= set(REASONS)
    assert len(outcomes) >= 6  # the cases reach many different checks, not one early exit


def test_fuzz_only_protocol_error_escapes_the_other_decoders():
    state = encode_state(**STATE_FIELDS, posterior=np.full((3, 4), 1 / 12))
    reply = encode_control_reply(True, state="idle")
    rng = random.Random(7)
    for i in range(1500):
        data = _mutate(rng, rng.choice([state, reply, encode(ROUND_TRIP[-1])]))
        for decoder in (decode_output, decode_control_reply, decode_control_request):
            try:
                decoder(data)
            except ProtocolError:
                pass


# ----------------------------------------------------------------- outputs

EVENT_FIELDS = dict(
    source="placeloop", seq=0, event_id=3, zone="goal", rule="enter_goal", t_s=101.25,
    map_xy_cm=(12.5, -3.0), mean_xy_cm=np.array([12.0, -2.5]), zone_mass=0.83,
    tracked_xy_cm=(np.nan, np.nan), wall_received_s=1.7e9, wall_decoded_s=1.7e9 + 0.002,
)

STATE_FIELDS = dict(
    source="placeloop", seq=41, t_s=101.25, state="decoding", armed=True, map_xy_cm=(12.5, -3.0),
    mean_xy_cm=(12.0, -2.5), tracked_xy_cm=(11.0, -2.0), hpd95_size=42.0, peak_prob=0.12,
    zone_masses={"goal": 0.83, "start": 0.01}, n_spikes=np.int64(17),
)


def test_event_round_trip_and_send_stamp():
    before = time.time()
    out = decode_output(encode_event(**EVENT_FIELDS))
    assert out["kind"] == "event" and out["zone"] == "goal" and out["event_id"] == 3
    assert out["mean_xy_cm"] == (12.0, -2.5) and math.isnan(out["tracked_xy_cm"][0])
    assert before <= out["wall_sent_s"] <= time.time()
    assert decode_output(encode_event(**EVENT_FIELDS, wall_sent_s=5.0))["wall_sent_s"] == 5.0


def test_event_wire_keys_match_protocol_md():
    m = msgpack.unpackb(encode_event(**EVENT_FIELDS), raw=False)
    assert set(m) == {"v", "k", "src", "seq", "id", "zone", "rule", "t", "map", "mean", "mass", "pos",
                      "rx_wall", "dec_wall", "tx_wall"}
    text = PROTOCOL_MD.read_text()
    for key in set(m) - {"v", "k", "src", "seq"}:
        assert f"| `{key}` |" in text, key


def test_state_round_trip_with_posterior_as_float32():
    posterior = np.arange(12, dtype=float).reshape(3, 4) / 66.0
    out = decode_output(encode_state(**STATE_FIELDS, posterior=posterior, stats={"gaps": 2, "p99_ms": 3.5}))
    assert out["kind"] == "state" and out["armed"] is True and out["n_spikes"] == 17
    assert out["grid_shape"] == (3, 4) and out["posterior"].dtype == np.float32
    np.testing.assert_array_equal(out["posterior"], posterior.astype(np.float32))
    assert out["stats"] == {"gaps": 2, "p99_ms": 3.5} and out["zone_masses"]["goal"] == 0.83
    m = msgpack.unpackb(encode_state(**STATE_FIELDS, posterior=posterior), raw=False)
    assert m["post"] == struct.pack("<12f", *posterior.ravel())  # IEEE 754 binary32, little-endian, row-major


def test_state_without_posterior():
    out = decode_output(encode_state(**STATE_FIELDS))
    assert out["posterior"] is None and out["grid_shape"] is None and out["stats"] is None


def test_flat_posterior_with_explicit_grid_shape():
    out = decode_output(encode_state(**STATE_FIELDS, posterior=np.full(6, 1 / 6), grid_shape=(2, 3)))
    assert out["posterior"].shape == (2, 3)


@pytest.mark.parametrize(
    "change, reason",
    [
        ({"zone": None}, "missing_field"),
        ({"zone": 5}, "bad_field"),
        ({"t_s": float("nan")}, "bad_field"),
        ({"map_xy_cm": (1.0, 2.0, 3.0)}, "bad_field"),
        ({"map_xy_cm": (np.inf, 2.0)}, "bad_field"),
        ({"event_id": -1}, "bad_field"),
        ({"zone_name": "goal"}, "bad_field"),
    ],
)
def test_encode_event_validates_fields(change, reason):
    with pytest.raises(ProtocolError) as info:
        encode_event(**(EVENT_FIELDS | change))
    assert info.value.reason == reason


def test_encode_state_rejects_a_shape_that_does_not_fit():
    with pytest.raises(ProtocolError) as info:
        encode_state(**STATE_FIELDS, posterior=np.ones(6), grid_shape=(4, 2))
    assert info.value.reason == "length_mismatch"


def test_decode_output_validates_required_fields_and_kinds():
    m = msgpack.unpackb(encode_event(**EVENT_FIELDS), raw=False)
    for key in ("id", "zone", "tx_wall", "src"):
        assert reason_of(pack({k: v for k, v in m.items() if k != key}), decode_output) == "missing_field"
    assert reason_of(pack(m | {"mass": "high"}), decode_output) == "bad_field"
    assert reason_of(encode(Heartbeat("ephys", 1, 2.0)), decode_output) == "unknown_kind"
    s = msgpack.unpackb(encode_state(**STATE_FIELDS, posterior=np.ones(6) / 6), raw=False)
    assert reason_of(pack(s | {"shape": [4, 2]}), decode_output) == "length_mismatch"
    assert reason_of(pack(s | {"post": b"\x00" * 5}), decode_output) == "bad_array"
    assert reason_of(pack(s | {"post": [0.5, 0.5]}), decode_output) == "bad_array"
    assert reason_of(pack({k: v for k, v in s.items() if k != "shape"}), decode_output) == "missing_field"


# ----------------------------------------------------------------- control socket

def test_control_request_round_trip():
    cmd = decode_control_request(encode_control_request("load_model", {"path": "m.npz"}, source="script", seq=4))
    assert cmd == ControlCommand("script", 4, "load_model", {"path": "m.npz"})


def test_control_request_refuses_other_kinds_and_bad_commands():
    assert reason_of(encode(Heartbeat("ephys", 1, 2.0)), decode_control_request) == "unknown_kind"
    with pytest.raises(ProtocolError):
        encode_control_request("launch")


def test_control_reply_round_trip():
    reply = decode_control_reply(encode_control_reply(True, state="armed", n_events=np.int64(2),
                                                      masses=np.array([0.5, 0.25])))
    assert reply == {"ok": True, "state": "armed", "n_events": 2, "masses": [0.5, 0.25]}
    refusal = decode_control_reply(encode_control_reply(False, error="no model is loaded; run fit first"))
    assert refusal["ok"] is False and "fit" in refusal["error"]


def test_control_reply_validation():
    with pytest.raises(ProtocolError):
        encode_control_reply(False)  # a refusal must say why
    with pytest.raises(ProtocolError):
        encode_control_reply(True, k="status")
    assert reason_of(pack({"v": 1, "k": "reply", "ok": "yes"}), decode_control_reply) == "bad_field"
    assert reason_of(pack({"v": 1, "k": "reply", "ok": False}), decode_control_reply) == "missing_field"
    assert reason_of(pack({"v": 1, "k": "reply"}), decode_control_reply) == "missing_field"


def test_version_constant_matches_the_document():
    assert PROTOCOL_VERSION == 1 and "version 1" in PROTOCOL_MD.read_text().splitlines()[0]


# ----------------------------------------------------------------- the worked example in PROTOCOL.md

def _example(name: str) -> str:
    blocks = re.findall(r"```python\n(.*?)```", PROTOCOL_MD.read_text(), flags=re.S)
    [code] = [b for b in blocks if b.startswith(f"# example: {name}\n")]
    # the example must stay copyable to other languages: plain pyzmq + msgpack, no placeloop code
    assert "decoder" not in code and "rig_adapters" not in code
    return code


def _free_endpoint() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return f"tcp://127.0.0.1:{s.getsockname()[1]}"


@pytest.mark.timeout(20)
def test_worked_example_rig_publishes_valid_frames():
    namespace: dict = {}
    exec(compile(_example("rig"), "PROTOCOL.md:rig", "exec"), namespace)
    endpoint = _free_endpoint()
    n_batches = 5
    rig = threading.Thread(target=namespace["run_rig"], kwargs=dict(endpoint=endpoint, n_batches=n_batches))
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    try:
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.connect(endpoint)  # before the bind: ZeroMQ retries until the rig is up
        rig.start()
        received = []
        while len(received) < 1 + 2 * n_batches and sub.poll(5000):
            received.append(decode(sub.recv()))
    finally:
        rig.join(timeout=10)
        sub.close(linger=0)
    assert isinstance(received[0], SourceAnnounce) and received[0].unit_ids.tolist() == [3, 7, 12]
    assert [m.seq for m in received] == list(range(1 + 2 * n_batches))  # PROTOCOL.md section 7: no gaps
    batches = [m for m in received if isinstance(m, SpikeBatch)]
    assert len(batches) == n_batches and batches[1].t_s.tolist() == pytest.approx([0.0112, 0.0140, 0.0193])
    assert all(isinstance(m, Heartbeat) for m in received[2::2])


@pytest.mark.timeout(20)
def test_worked_example_bridge_receives_events():
    namespace: dict = {}
    exec(compile(_example("bridge"), "PROTOCOL.md:bridge", "exec"), namespace)
    endpoint = _free_endpoint()
    fired = []
    result = {}

    def bridge():
        result["missed"] = namespace["run_bridge"](
            lambda zone, rule, t, event_id: fired.append((zone, rule, t, event_id)), endpoint=endpoint, max_events=3
        )

    ctx = zmq.Context.instance()
    pub = ctx.socket(zmq.PUB)
    thread = threading.Thread(target=bridge)
    try:
        pub.bind(endpoint)
        thread.start()
        seq = 0
        deadline = time.monotonic() + 10
        while thread.is_alive() and time.monotonic() < deadline:
            # keep publishing: the first frames are lost until the subscription arrives (slow joiner)
            pub.send(encode_state(**STATE_FIELDS))  # not an event: the bridge skips it
            pub.send(encode_event(**(EVENT_FIELDS | {"seq": seq, "event_id": 100 + seq})))
            seq += 1
            time.sleep(0.01)
    finally:
        thread.join(timeout=5)
        pub.close(linger=0)
    assert len(fired) == 3 and result["missed"] == 0
    assert [f[0] for f in fired] == ["goal"] * 3 and fired[0][2] == 101.25
    ids = [f[3] for f in fired]
    assert ids == sorted(set(ids))  # in publishing order; a late one may be refused as stale (MAX_AGE_S)


@pytest.mark.parametrize(
    "x, q",
    [(10.0, None), (10.0, b"\x07"), (float("nan"), None), (10.0, b"\x00")],
)
def test_single_frame_as_bin_decodes_like_lists(x, q):
    # One frame as bin takes a scalar fast path; as plain lists it takes the general one.
    extra = {} if q is None else {"q": q}
    as_bin = decode(pack(frames_map(t=struct.pack("<d", 1.0), x=struct.pack("<d", x), y=struct.pack("<d", 20.0),
                                    **extra)))
    as_lists = decode(pack(frames_map(t=[1.0], x=[x], y=[20.0], **({} if q is None else {"q": list(q)}))))
    assert_same(as_bin, as_lists)


@pytest.mark.parametrize(
    "t, x, reason",
    [(float("nan"), 10.0, "bad_time"), (1.0, float("inf"), "bad_field")],
)
def test_single_bad_frame_as_bin_keeps_its_reason(t, x, reason):
    frame = pack(frames_map(t=struct.pack("<d", t), x=struct.pack("<d", x), y=struct.pack("<d", 20.0)))
    assert reason_of(frame) == reason


@pytest.mark.parametrize(
    "m, reason",
    [
        (VALID_MAPS["heartbeat"] | {"t": float("inf")}, "bad_time"),
        (VALID_MAPS["heartbeat"] | {"src": "x" * 65}, "bad_field"),
        (VALID_MAPS["heartbeat"] | {"seq": -1}, "bad_field"),
        (spikes_map(t=np.array([0.2, 0.1]).tobytes(), u=np.array([3, 7], np.int32).tobytes()), "bad_time"),
        (spikes_map(t=np.array([0.2, np.nan]).tobytes(), u=np.array([3, 7], np.int32).tobytes()), "bad_time"),
        (spikes_map(t=np.array([0.2]).tobytes(), u=np.array([3, 7], np.int32).tobytes()), "length_mismatch"),
    ],
)
def test_bin_arrays_and_floats_refused_with_their_reason(m, reason):
    assert reason_of(pack(m)) == reason
