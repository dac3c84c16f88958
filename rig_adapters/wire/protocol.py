"""The wire protocol: typed messages to MessagePack bytes and back.

Every message is one ZeroMQ frame holding one MessagePack map. The full
specification, with a table of every key, is ``PROTOCOL.md`` beside this
file; this module is its reference implementation.

Inputs (rig -> placeloop) decode into the typed messages of
:mod:`decoder.messages`; outputs (placeloop -> subscribers) are plain dicts
with the Python names used by :func:`encode_event` and :func:`encode_state`.
Decoding validates a frame once, at the edge. Whatever the bytes, the only
exception a decoder raises is :class:`ProtocolError`, whose ``reason`` is a
short fixed category that the shell counts and whose ``detail`` is a sentence
a rig developer can act on.

Arrays travel as MessagePack ``bin`` holding little-endian values, read with
``numpy.frombuffer`` so that a batch of thousands of spikes costs no Python
loop; simple rigs may send plain MessagePack arrays of numbers instead.
"""

from __future__ import annotations

import math
import struct
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

from decoder.messages import (
    CONTROL_COMMANDS,
    MAX_BATCH,
    SOURCE_KINDS,
    ControlCommand,
    Heartbeat,
    InputMessage,
    MessageError,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)

PROTOCOL_VERSION = 1

#: Largest input or control frame, in bytes, checked before unpacking. The
#: largest valid input, MAX_BATCH tracker frames with every optional array,
#: takes 33 bytes per frame as bin (6.6 MB); plain arrays of MAX_BATCH spikes
#: take at most 18 bytes per spike (3.6 MB).
MAX_FRAME_BYTES = 8 * 1024 * 1024

#: Largest output frame, in bytes: room for a float32 posterior of two
#: million bins, far beyond any arena at a useful bin size.
MAX_OUTPUT_FRAME_BYTES = 16 * 1024 * 1024

#: Longest string, in bytes, anywhere in a frame (names, paths in control args).
MAX_STR_BYTES = 4096

#: Most entries in any one map (the message itself, control args, zone masses, stats).
MAX_MAP_LEN = 1024

#: Input kinds, rig -> placeloop.
INPUT_KINDS = ("announce", "spikes", "frames", "heartbeat", "sync", "control")

#: Output kinds, placeloop -> subscribers.
OUTPUT_KINDS = ("event", "state")

#: Kind of a reply on the control socket.
REPLY_KIND = "reply"

#: Every value ``ProtocolError.reason`` can take; the shell keeps one counter each.
REASONS = (
    "oversized",
    "not_msgpack",
    "not_a_map",
    "bad_version",
    "unknown_kind",
    "missing_field",
    "bad_field",
    "bad_array",
    "length_mismatch",
    "bad_time",
)

# The unpack limits bound what hostile bytes can make msgpack allocate: a
# ten-byte frame may declare an array of four billion elements.
_INPUT_LIMITS = dict(
    max_bin_len=8 * MAX_BATCH,
    max_array_len=MAX_BATCH,
    max_map_len=MAX_MAP_LEN,
    max_str_len=MAX_STR_BYTES,
    max_ext_len=0,
)
_OUTPUT_LIMITS = dict(
    max_bin_len=MAX_OUTPUT_FRAME_BYTES,
    max_array_len=MAX_BATCH,
    max_map_len=MAX_MAP_LEN,
    max_str_len=MAX_STR_BYTES,
    max_ext_len=0,
)

#: Frames up to this many bytes are unpacked with msgpack's own limits, which
#: are then no looser than ours (every limit below is at least this large).
_SMALL_FRAME_BYTES = min(MAX_MAP_LEN, MAX_STR_BYTES, 8 * MAX_BATCH, MAX_BATCH)

_F64 = np.dtype("<f8")
_F32 = np.dtype("<f4")
_U8 = np.dtype("<u1")
_INT_BY_WIDTH = {4: np.dtype("<i4"), 8: np.dtype("<i8")}
_F64_THREE = struct.Struct("<3d")
_INT32 = np.iinfo(np.int32)
_INT64_MAX = np.iinfo(np.int64).max


class ProtocolError(ValueError):
    """A frame that does not follow the protocol.

    Parameters
    ----------
    reason : str
        One of :data:`REASONS`, a fixed category for counters.
    detail : str
        What was wrong and how to fix it, for a person.
    """

    def __init__(self, reason: str, detail: str) -> None:
        assert reason in REASONS, reason
        super().__init__(reason, detail)
        self.reason = reason
        self.detail = detail

    def __str__(self) -> str:
        return f"{self.reason}: {self.detail}"


# --------------------------------------------------------------------------
# Reading a frame


def _unpack(data: Any, max_bytes: int, limits: dict) -> dict:
    if type(data) is bytes:
        n_bytes = len(data)
    else:
        try:
            n_bytes = memoryview(data).nbytes
        except TypeError:
            raise ProtocolError("not_msgpack", f"a frame must be bytes, got {type(data).__name__}") from None
    if n_bytes > max_bytes:
        raise ProtocolError("oversized", f"the frame has {n_bytes} bytes, more than the limit of {max_bytes}")
    try:
        if n_bytes <= _SMALL_FRAME_BYTES:
            # msgpack bounds every length by the frame's own size when not told
            # otherwise, tighter than our limits for a frame this small; passing
            # them all costs more than unpacking a heartbeat.
            obj = msgpack.unpackb(data, max_ext_len=0)
        else:
            obj = msgpack.unpackb(data, raw=False, strict_map_key=True, **limits)
    # msgpack signals bad bytes with several exception types (ValueError,
    # FormatError, StackError, ExtraData, UnicodeDecodeError, MemoryError);
    # at this edge every one of them means "not a frame we can read".
    except Exception as exc:
        text = str(exc)
        if "exceeds max_ext_len" in text:
            raise ProtocolError("bad_field", "the frame holds a MessagePack extension type, which the protocol does not use") from None
        if "exceeds max_" in text:
            raise ProtocolError("oversized", f"the frame holds an item over the protocol's limits ({text})") from None
        kind = type(exc).__name__
        raise ProtocolError("not_msgpack", f"the frame is not one valid MessagePack value ({kind}: {text})") from None
    if not isinstance(obj, dict):
        raise ProtocolError("not_a_map", f"a frame must hold one MessagePack map, got {type(obj).__name__}")
    return obj


def _envelope(m: dict, kinds: tuple[str, ...]) -> str:
    if "v" not in m:
        raise ProtocolError("missing_field", "the frame has no protocol version 'v'; send \"v\": 1")
    v = m["v"]
    if isinstance(v, bool) or not isinstance(v, int) or v != PROTOCOL_VERSION:
        raise ProtocolError("bad_version", f"this placeloop speaks protocol version {PROTOCOL_VERSION}, the frame says v={v!r}")
    if "k" not in m:
        raise ProtocolError("missing_field", f"the frame has no kind 'k'; expected one of {kinds}")
    k = m["k"]
    if k not in kinds:
        raise ProtocolError("unknown_kind", f"kind k={k!r} is not one of {kinds} on this socket")
    return k


def _require(m: dict, key: str, kind: str) -> Any:
    if key not in m:
        raise ProtocolError("missing_field", f"a {kind!r} message needs the key {key!r}; see PROTOCOL.md")
    return m[key]


def _string(m: dict, key: str, kind: str) -> str:
    value = _require(m, key, kind)
    if not isinstance(value, str) or not value:
        raise ProtocolError("bad_field", f"{key!r} must be a non-empty string, got {value!r}")
    return value


def _integer(m: dict, key: str, kind: str) -> int:
    value = _require(m, key, kind)
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ProtocolError("bad_field", f"{key!r} must be a non-negative integer, got {value!r}")
    return value


def _real(m: dict, key: str, kind: str) -> float:
    value = _require(m, key, kind)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ProtocolError("bad_field", f"{key!r} must be a number, got {type(value).__name__}")
    return float(value)


def _time(m: dict, key: str, kind: str) -> float:
    t = _real(m, key, kind)
    if not math.isfinite(t):
        raise ProtocolError("bad_time", f"{key!r} must be a finite time in seconds, got {t!r}")
    return t


def _array(m: dict, key: str, kind: str, wire: np.dtype) -> np.ndarray:
    """Read an array sent as bin of ``wire`` values or as a plain list of numbers."""
    value = _require(m, key, kind)
    if isinstance(value, bytes):
        if len(value) % wire.itemsize:
            raise ProtocolError(
                "bad_array",
                f"{key!r} has {len(value)} bytes, not a whole number of {wire.itemsize}-byte values",
            )
        if len(value) // wire.itemsize > MAX_BATCH:
            raise ProtocolError("oversized", f"{key!r} holds more than {MAX_BATCH} values")
        return np.frombuffer(value, dtype=wire)
    if isinstance(value, list):
        if not value:
            return np.zeros(0, dtype=wire)
        try:
            arr = np.array(value)
        except (ValueError, TypeError, OverflowError):
            arr = None
        if arr is None or arr.ndim != 1 or arr.dtype.kind not in "iuf":
            raise ProtocolError("bad_array", f"{key!r} must be a flat list of numbers")
        if arr.dtype.kind == "u" and arr.max() > _INT64_MAX:
            raise ProtocolError("bad_array", f"{key!r} holds a value beyond the signed 64-bit range")
        if wire.kind in "iu" and arr.dtype.kind == "f" and not np.all(np.isfinite(arr) & (arr == np.round(arr))):
            raise ProtocolError("bad_field", f"{key!r} holds integers; a float value must be a whole number")
        return arr
    if isinstance(value, str):
        raise ProtocolError(
            "bad_array",
            f"{key!r} arrived as a string; pack arrays as MessagePack bin (use_bin_type) or as a list",
        )
    raise ProtocolError("bad_array", f"{key!r} must be bin or a list of numbers, got {type(value).__name__}")


def _int_width(m: dict) -> np.dtype:
    width = m.get("iw", 4)
    if isinstance(width, bool) or not isinstance(width, int) or width not in _INT_BY_WIDTH:
        raise ProtocolError("bad_field", f"'iw' (integer width in bytes) must be 4 or 8, got {width!r}")
    return _INT_BY_WIDTH[width]


def _times(m: dict, key: str, kind: str, strictly: bool) -> np.ndarray:
    t = _array(m, key, kind, _F64)
    if not np.isfinite(t).all():
        raise ProtocolError("bad_time", f"{key!r} holds a NaN or infinite time; times are finite seconds")
    out_of_order = (t[1:] <= t[:-1]) if strictly else (t[1:] < t[:-1])
    if out_of_order.any():
        order = "increase" if strictly else "not decrease"
        raise ProtocolError("bad_time", f"times in {key!r} must {order} within a message")
    return t


def _same_length(key: str, arr: np.ndarray, n: int) -> None:
    if arr.size != n:
        raise ProtocolError("length_mismatch", f"{key!r} has {arr.size} values but 't' has {n}")


def _build(cls: type, **fields: Any) -> Any:
    try:
        return cls(**fields)
    except (MessageError, TypeError, ValueError, OverflowError) as exc:
        raise ProtocolError("bad_field", str(exc)) from None


def _source_seq(m: dict, kind: str) -> dict:
    return {"source": _string(m, "src", kind), "seq": _integer(m, "seq", kind)}


def _decode_announce(m: dict) -> SourceAnnounce:
    role = _string(m, "role", "announce")
    if role not in SOURCE_KINDS:
        raise ProtocolError("bad_field", f"'role' must be one of {SOURCE_KINDS}, got {role!r}")
    rate = _real(m, "rate_hz", "announce")
    if not (math.isfinite(rate) and rate > 0):
        raise ProtocolError("bad_field", f"'rate_hz' must be a positive sample rate in Hz, got {rate!r}")
    if role == "spikes" or "units" in m:
        units = _array(m, "units", "announce", _int_width(m))
    else:
        units = np.zeros(0, np.int64)
    return _build(
        SourceAnnounce,
        **_source_seq(m, "announce"),
        kind=role,
        clock=_string(m, "clock", "announce"),
        sample_rate_hz=rate,
        unit_ids=units,
    )


def _decode_spikes(m: dict) -> SpikeBatch:
    t = _times(m, "t", "spikes", strictly=False)
    u = _array(m, "u", "spikes", _int_width(m))
    _same_length("u", u, t.size)
    return _build(SpikeBatch, **_source_seq(m, "spikes"), t_s=t, unit_id=u)


def _decode_frames(m: dict) -> TrackerFrames:
    t = _times(m, "t", "frames", strictly=True)
    x = _array(m, "x", "frames", _F64)
    y = _array(m, "y", "frames", _F64)
    _same_length("x", x, t.size)
    _same_length("y", y, t.size)
    xy = np.column_stack((x, y)).astype(np.float64)
    if np.any(np.isinf(xy)):
        raise ProtocolError("bad_field", "'x' or 'y' holds an infinite coordinate; send NaN for a lost frame")
    hd = None
    if "hd" in m:
        hd = _array(m, "hd", "frames", _F64)
        _same_length("hd", hd, t.size)
    q = None
    if "q" in m:
        q = _array(m, "q", "frames", _U8)
        _same_length("q", q, t.size)
    return _build(TrackerFrames, **_source_seq(m, "frames"), t_s=t, xy_cm=xy, head_dir_rad=hd, quality=q)


def _quick(m: dict) -> InputMessage | None:
    """The well-formed heartbeat, spike batch or single frame, read with the fewest checks; None otherwise.

    These three kinds are nearly all the traffic, and the general readers'
    per-key helpers cost more than a heartbeat's own work. Whatever this
    declines or whatever the message's constructor refuses, :func:`decode`
    reads again on the general path, which gives the error and its reason;
    the constructors still check every value.
    """
    v, src, seq, k = m.get("v"), m.get("src"), m.get("seq"), m.get("k")
    if not (type(v) is int and v == PROTOCOL_VERSION and type(src) is str and type(seq) is int):
        return None
    try:
        if k == "heartbeat":
            t = m.get("t")
            return Heartbeat(src, seq, t) if type(t) is float else None
        if k == "spikes":
            t, u, width = m.get("t"), m.get("u"), m.get("iw", 4)
            if not (type(t) is bytes and type(u) is bytes and type(width) is int and width in _INT_BY_WIDTH
                    and len(t) % 8 == 0 and len(u) * 8 == len(t) * width):
                return None
            # Positional dtypes: numpy parses keywords slower than it reads a small batch.
            return SpikeBatch(src, seq, np.frombuffer(t, _F64), np.frombuffer(u, _INT_BY_WIDTH[width]))
        if k == "frames":
            return _one_frame(m)
    except MessageError:
        return None
    return None


def _one_frame(m: dict) -> TrackerFrames | None:
    """A valid single frame sent as bin, read with scalar checks; None for anything else (part of :func:`_quick`).

    A tracker sends one frame per message, 30 to 60 times a second, and the
    general path's numpy calls on 1-element arrays dominated a replay's
    decoding time. Whatever this declines (several frames, head direction,
    plain lists) or ``TrackerFrames.one`` refuses (a bad value), the general
    path reads, with its error reasons.
    """
    t, x, y, q = m.get("t"), m.get("x"), m.get("y"), m.get("q", b"\x01")
    if not (
        type(t) is bytes and type(x) is bytes and type(y) is bytes and type(q) is bytes
        and len(t) == 8 and len(x) == 8 and len(y) == 8 and len(q) == 1 and "hd" not in m
    ):
        return None
    t_s, x_cm, y_cm = _F64_THREE.unpack(t + x + y)
    return TrackerFrames.one(m["src"], m["seq"], t_s, x_cm, y_cm, q[0] if "q" in m else None)


def _decode_heartbeat(m: dict) -> Heartbeat:
    return _build(Heartbeat, **_source_seq(m, "heartbeat"), t_s=_time(m, "t", "heartbeat"))


def _decode_sync(m: dict) -> SyncPulse:
    return _build(
        SyncPulse,
        **_source_seq(m, "sync"),
        t_s=_time(m, "t", "sync"),
        pulse_id=_integer(m, "pulse", "sync"),
    )


def _decode_control(m: dict) -> ControlCommand:
    command = _string(m, "cmd", "control")
    if command not in CONTROL_COMMANDS:
        raise ProtocolError("bad_field", f"'cmd' must be one of {CONTROL_COMMANDS}, got {command!r}")
    args = m.get("args", {})
    if not isinstance(args, dict) or not all(isinstance(key, str) for key in args):
        raise ProtocolError("bad_field", "'args' must be a map with string keys")
    return _build(ControlCommand, **_source_seq(m, "control"), command=command, args=args)


_INPUT_DECODERS: dict[str, Callable[[dict], InputMessage]] = {
    "announce": _decode_announce,
    "spikes": _decode_spikes,
    "frames": _decode_frames,
    "heartbeat": _decode_heartbeat,
    "sync": _decode_sync,
    "control": _decode_control,
}


def decode(data: bytes) -> InputMessage:
    """Read one input frame into a typed message, validating everything once.

    Parameters
    ----------
    data : bytes-like
        One ZeroMQ frame, at most :data:`MAX_FRAME_BYTES` long.

    Returns
    -------
    SourceAnnounce, SpikeBatch, TrackerFrames, Heartbeat, SyncPulse or ControlCommand

    Raises
    ------
    ProtocolError
        For any frame that does not follow PROTOCOL.md; nothing else escapes.

    Examples
    --------
    >>> from decoder.messages import Heartbeat
    >>> decode(encode(Heartbeat(source="ephys", seq=4, t_s=12.5)))
    Heartbeat(source='ephys', seq=4, t_s=12.5)
    """
    m = None
    if type(data) is bytes and len(data) <= _SMALL_FRAME_BYTES:
        # The usual small frame, unpacked without _unpack's layers (the same
        # call as its small-frame branch); bytes that fail here are unpacked
        # again by _unpack, only to name what is wrong.
        try:
            m = msgpack.unpackb(data, max_ext_len=0)
        except Exception:  # noqa: BLE001 - _unpack below names the error
            m = None
    if type(m) is not dict:
        m = _unpack(data, MAX_FRAME_BYTES, _INPUT_LIMITS)
    return _quick(m) or _INPUT_DECODERS[_envelope(m, INPUT_KINDS)](m)


# --------------------------------------------------------------------------
# Writing an input frame


def _f64_bin(values: np.ndarray) -> bytes:
    return np.ascontiguousarray(values, dtype=_F64).tobytes()


def _int_bin(values: np.ndarray) -> tuple[bytes, int]:
    """Pack ids as int32 when they fit, which halves the bytes; int64 otherwise."""
    if values.size == 0 or (values.min() >= _INT32.min and values.max() <= _INT32.max):
        return np.ascontiguousarray(values, dtype=_INT_BY_WIDTH[4]).tobytes(), 4
    return np.ascontiguousarray(values, dtype=_INT_BY_WIDTH[8]).tobytes(), 8


def _head(kind: str, msg: InputMessage) -> dict:
    return {"v": PROTOCOL_VERSION, "k": kind, "src": msg.source, "seq": msg.seq}


def _encode_announce(msg: SourceAnnounce) -> dict:
    units, width = _int_bin(msg.unit_ids)
    out = _head("announce", msg) | {"role": msg.kind, "clock": msg.clock, "rate_hz": msg.sample_rate_hz, "units": units}
    if width != 4:
        out["iw"] = width
    return out


def _encode_spikes(msg: SpikeBatch) -> dict:
    units, width = _int_bin(msg.unit_id)
    out = _head("spikes", msg) | {"t": _f64_bin(msg.t_s), "u": units}
    if width != 4:
        out["iw"] = width
    return out


def _encode_frames(msg: TrackerFrames) -> dict:
    out = _head("frames", msg) | {
        "t": _f64_bin(msg.t_s),
        "x": _f64_bin(msg.xy_cm[:, 0]),
        "y": _f64_bin(msg.xy_cm[:, 1]),
        "q": np.ascontiguousarray(msg.quality, dtype=_U8).tobytes(),
    }
    if msg.head_dir_rad is not None:
        out["hd"] = _f64_bin(msg.head_dir_rad)
    return out


def _encode_heartbeat(msg: Heartbeat) -> dict:
    return _head("heartbeat", msg) | {"t": msg.t_s}


def _encode_sync(msg: SyncPulse) -> dict:
    return _head("sync", msg) | {"t": msg.t_s, "pulse": msg.pulse_id}


def _encode_control(msg: ControlCommand) -> dict:
    return _head("control", msg) | {"cmd": msg.command, "args": msg.args}


_INPUT_ENCODERS: dict[type, Callable[[Any], dict]] = {
    SourceAnnounce: _encode_announce,
    SpikeBatch: _encode_spikes,
    TrackerFrames: _encode_frames,
    Heartbeat: _encode_heartbeat,
    SyncPulse: _encode_sync,
    ControlCommand: _encode_control,
}


def _plain(value: Any) -> Any:
    """msgpack ``default`` hook: numpy scalars and arrays become plain values."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot send a {type(value).__name__} over the wire")


def _pack(m: dict) -> bytes:
    try:
        return msgpack.packb(m, use_bin_type=True, default=_plain)
    except (TypeError, ValueError, OverflowError) as exc:
        raise ProtocolError("bad_field", f"the message cannot be packed: {exc}") from None


def encode(msg: InputMessage) -> bytes:
    """Write a typed input message as one frame, arrays as little-endian bin.

    Parameters
    ----------
    msg : SourceAnnounce, SpikeBatch, TrackerFrames, Heartbeat, SyncPulse or ControlCommand

    Returns
    -------
    bytes
        One MessagePack map; ``decode(encode(msg))`` gives back the same message.
    """
    encoder = _INPUT_ENCODERS.get(type(msg))
    if encoder is None:
        raise TypeError(f"encode takes a message from decoder.messages, got {type(msg).__name__}")
    return _pack(encoder(msg))


# --------------------------------------------------------------------------
# Output messages: event and state


@dataclass(frozen=True)
class _Field:
    """One key of an output message: Python name, wire key, value type."""

    name: str
    key: str
    type: str
    required: bool = True


_EVENT_FIELDS = (
    _Field("source", "src", "name"),
    _Field("seq", "seq", "count"),
    _Field("event_id", "id", "count"),
    _Field("zone", "zone", "name"),
    _Field("rule", "rule", "name"),
    _Field("t_s", "t", "time"),
    _Field("map_xy_cm", "map", "xy"),
    _Field("mean_xy_cm", "mean", "xy"),
    _Field("zone_mass", "mass", "real"),
    _Field("tracked_xy_cm", "pos", "xy"),
    _Field("wall_received_s", "rx_wall", "time"),
    _Field("wall_decoded_s", "dec_wall", "time"),
    _Field("wall_sent_s", "tx_wall", "time"),
)

_STATE_FIELDS = (
    _Field("source", "src", "name"),
    _Field("seq", "seq", "count"),
    _Field("t_s", "t", "time"),
    _Field("state", "state", "name"),
    _Field("armed", "armed", "flag"),
    _Field("map_xy_cm", "map", "xy"),
    _Field("mean_xy_cm", "mean", "xy"),
    _Field("tracked_xy_cm", "pos", "xy"),
    _Field("hpd95_size", "hpd", "real"),
    _Field("peak_prob", "peak", "real"),
    _Field("zone_masses", "zones", "masses"),
    _Field("n_spikes", "nspk", "count"),
    _Field("posterior", "post", "posterior", required=False),
    _Field("grid_shape", "shape", "shape", required=False),
    _Field("stats", "stats", "stats", required=False),
)

_OUTPUT_FIELDS = {"event": _EVENT_FIELDS, "state": _STATE_FIELDS}


def _check_value(f: _Field, value: Any) -> Any:
    """Validate one output value; return it in plain wire form (posterior as an array)."""

    def bad(expected: str) -> ProtocolError:
        return ProtocolError("bad_field", f"{f.name} ({f.key!r}) must be {expected}, got {value!r:.80}")

    def number(x: Any) -> bool:
        return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))

    if f.type == "name":
        if not isinstance(value, str) or not value:
            raise bad("a non-empty string")
        return value
    if f.type == "count":
        if not isinstance(value, (int, np.integer)) or isinstance(value, (bool, np.bool_)) or value < 0:
            raise bad("a non-negative integer")
        return int(value)
    if f.type == "flag":
        if not isinstance(value, (bool, np.bool_)):
            raise bad("true or false")
        return bool(value)
    if f.type in ("time", "real"):
        if not number(value) or not math.isfinite(value):
            raise bad("a finite number")
        return float(value)
    if f.type == "xy":
        if isinstance(value, (bytes, str, dict)):
            raise bad("an (x, y) pair in cm")
        try:
            xy = [float(c) for c in value]
        except (TypeError, ValueError):
            raise bad("an (x, y) pair in cm") from None
        if len(xy) != 2 or any(math.isinf(c) for c in xy):
            raise bad("an (x, y) pair in cm, NaN where unknown")
        return xy
    if f.type == "masses":
        if not isinstance(value, dict) or not all(
            isinstance(k, str) and number(v) and math.isfinite(v) for k, v in value.items()
        ):
            raise bad("a map from zone name to posterior mass")
        return {k: float(v) for k, v in value.items()}
    if f.type == "stats":
        if not isinstance(value, dict) or not all(isinstance(k, str) and number(v) for k, v in value.items()):
            raise bad("a map from name to number")
        return {k: (int(v) if isinstance(v, (int, np.integer)) else float(v)) for k, v in value.items()}
    if f.type == "shape":
        if isinstance(value, (bytes, str, dict)):
            raise bad("a list of 1 to 3 positive integers")
        try:
            shape = [int(s) for s in value]
        except (TypeError, ValueError):
            raise bad("a list of 1 to 3 positive integers") from None
        if not 1 <= len(shape) <= 3 or any(s <= 0 for s in shape) or shape != list(value):
            raise bad("a list of 1 to 3 positive integers")
        return shape
    assert f.type == "posterior", f.type
    if isinstance(value, bytes):
        if len(value) % _F32.itemsize:
            raise ProtocolError("bad_array", f"'post' has {len(value)} bytes, not a whole number of float32 values")
        return np.frombuffer(value, dtype=_F32)
    try:
        p = np.asarray(value, dtype=np.float32)
    except (TypeError, ValueError):
        raise bad("an array of probabilities") from None
    if not 1 <= p.ndim <= 3:
        raise bad("an array of probabilities with 1 to 3 dimensions")
    return p


def _encode_output(kind: str, fields: dict) -> bytes:
    spec = _OUTPUT_FIELDS[kind]
    unknown = set(fields) - {f.name for f in spec}
    if unknown:
        raise ProtocolError("bad_field", f"{kind} has no field(s) {sorted(unknown)}; see PROTOCOL.md")
    m: dict[str, Any] = {"v": PROTOCOL_VERSION, "k": kind}
    for f in spec:
        if fields.get(f.name) is None:
            if f.required:
                raise ProtocolError("missing_field", f"an {kind} message needs {f.name}")
            continue
        m[f.key] = _check_value(f, fields[f.name])
    if "post" in m:
        p = m["post"]
        shape = m.setdefault("shape", list(p.shape))
        if math.prod(shape) != p.size:
            raise ProtocolError("length_mismatch", f"grid_shape {shape} does not hold the {p.size} posterior values")
        m["post"] = np.ascontiguousarray(p, dtype=_F32).tobytes()
    elif "shape" in m:
        raise ProtocolError("bad_field", "grid_shape was given without a posterior")
    return _pack(m)


def encode_event(**fields: Any) -> bytes:
    """Write an ``event`` frame: a trigger fired.

    Parameters
    ----------
    source : str
        Name of the placeloop instance publishing.
    seq : int
        Sequence number on the event stream, 0, 1, 2, ...
    event_id : int
        The trigger event's id, unique in the session.
    zone, rule : str
        The zone entered and the rule that fired.
    t_s : float
        Data time (acquisition seconds) of the decoding step.
    map_xy_cm, mean_xy_cm : (2,) floats
        Decoded maximum a posteriori and posterior-mean positions.
    zone_mass : float
        The zone's posterior mass, 0..1.
    tracked_xy_cm : (2,) floats
        Tracked position at ``t_s``, NaN when lost.
    wall_received_s, wall_decoded_s : float
        Wall-clock seconds at receipt of the message that closed the step
        and at the end of decoding.
    wall_sent_s : float, optional
        Wall-clock seconds at sending; taken now if not given.

    Returns
    -------
    bytes
    """
    fields.setdefault("wall_sent_s", time.time())
    return _encode_output("event", fields)


def encode_state(**fields: Any) -> bytes:
    """Write a ``state`` frame: the decoder after one step, for monitoring.

    Parameters
    ----------
    source : str
    seq : int
        Sequence number on the state stream.
    t_s : float
        Data time of the step, seconds.
    state : str
        Session state name.
    armed : bool
    map_xy_cm, mean_xy_cm, tracked_xy_cm : (2,) floats
        Positions in cm; the tracked one is NaN when lost.
    hpd95_size : float
        Size of the 95% highest-posterior-density region, cm² in an arena,
        cm on a track or graph.
    peak_prob : float
        Largest posterior probability of one bin.
    zone_masses : dict of str to float
        Posterior mass of each zone.
    n_spikes : int
        Spikes in the decoding window.
    posterior : ndarray, shape (n_bins,) or grid_shape, optional
        Sent as float32.
    grid_shape : sequence of int, optional
        ``(ny, nx)`` for an arena, ``(n_bins,)`` otherwise; defaults to the
        posterior's own shape.
    stats : dict of str to number, optional
        Counters and latency figures.

    Returns
    -------
    bytes
    """
    return _encode_output("state", fields)


def decode_output(data: bytes) -> dict:
    """Read an ``event`` or ``state`` frame into a dict of Python names.

    Returns
    -------
    dict
        ``{"kind": "event" | "state", <name>: value, ...}`` with the names of
        :func:`encode_event` / :func:`encode_state`; positions as tuples,
        ``posterior`` as a float32 array of ``grid_shape`` (or None), absent
        optional fields as None.

    Raises
    ------
    ProtocolError
    """
    m = _unpack(data, MAX_OUTPUT_FRAME_BYTES, _OUTPUT_LIMITS)
    kind = _envelope(m, OUTPUT_KINDS)
    out: dict[str, Any] = {"kind": kind}
    for f in _OUTPUT_FIELDS[kind]:
        if f.key not in m:
            if f.required:
                raise ProtocolError("missing_field", f"an {kind!r} message needs the key {f.key!r}")
            out[f.name] = None
            continue
        if f.type == "posterior" and not isinstance(m[f.key], bytes):
            raise ProtocolError("bad_array", "'post' must be bin holding little-endian float32 values")
        value = _check_value(f, m[f.key])
        out[f.name] = tuple(value) if f.type in ("xy", "shape") else value
    if (out.get("posterior") is None) != (out.get("grid_shape") is None):
        raise ProtocolError("missing_field", "'post' and 'shape' travel together")
    if out.get("posterior") is not None:
        if math.prod(out["grid_shape"]) != out["posterior"].size:
            raise ProtocolError(
                "length_mismatch",
                f"'shape' {list(out['grid_shape'])} does not hold the {out['posterior'].size} values of 'post'",
            )
        out["posterior"] = out["posterior"].reshape(out["grid_shape"])
    return out


# --------------------------------------------------------------------------
# Control socket (REQ/REP)


def encode_control_request(command: str, args: dict | None = None, *, source: str = "operator", seq: int = 0) -> bytes:
    """Write a control request for placeloop's REP socket.

    Parameters
    ----------
    command : str
        One of :data:`decoder.messages.CONTROL_COMMANDS`.
    args : dict, optional
        Command arguments, string keys.
    source : str
        Name of the requesting script.
    seq : int
        The requester's sequence number, one more for each request.
    """
    try:
        msg = ControlCommand(source=source, seq=seq, command=command, args={} if args is None else args)
    except MessageError as exc:
        raise ProtocolError("bad_field", str(exc)) from None
    return encode(msg)


def decode_control_request(data: bytes) -> ControlCommand:
    """Read a control request; any other kind is refused with ``unknown_kind``."""
    m = _unpack(data, MAX_FRAME_BYTES, _INPUT_LIMITS)
    _envelope(m, ("control",))
    return _decode_control(m)


def encode_control_reply(ok: bool, **fields: Any) -> bytes:
    """Write a reply on the control socket.

    Parameters
    ----------
    ok : bool
        Whether the command was accepted.
    **fields
        Anything the command reports (plain values, numpy scalars or arrays).
        A refusal (``ok=False``) must carry ``error``, a sentence for the user.
    """
    if not isinstance(ok, (bool, np.bool_)):
        raise ProtocolError("bad_field", f"ok must be true or false, got {ok!r}")
    clash = {"v", "k", "ok"} & set(fields)
    if clash:
        raise ProtocolError("bad_field", f"reply fields may not be named {sorted(clash)}")
    if not ok and not isinstance(fields.get("error"), str):
        raise ProtocolError("missing_field", "a refusal (ok=False) needs error, a sentence saying why")
    return _pack({"v": PROTOCOL_VERSION, "k": REPLY_KIND, "ok": bool(ok)} | fields)


def decode_control_reply(data: bytes) -> dict:
    """Read a control reply into ``{"ok": bool, **fields}``."""
    m = _unpack(data, MAX_OUTPUT_FRAME_BYTES, _OUTPUT_LIMITS)
    _envelope(m, (REPLY_KIND,))
    ok = _require(m, "ok", REPLY_KIND)
    if not isinstance(ok, bool):
        raise ProtocolError("bad_field", f"'ok' must be true or false, got {ok!r}")
    if not ok and not isinstance(m.get("error"), str):
        raise ProtocolError("missing_field", "a refusal (ok false) needs 'error', a sentence saying why")
    return {key: value for key, value in m.items() if key not in ("v", "k")}
