"""Input frames (rig -> placeloop) and control requests: bytes to typed messages and back.

One reader per kind. A reader checks only what belongs to the wire: which
keys a kind has (a table, :data:`INPUT_KEYS`), that an array is bin of whole
values or a list, and the integer width ``iw``. It turns the wire's values
into the arguments of the typed message of :mod:`decoder.messages`, whose
constructor checks every value once and refuses with a
:class:`~decoder.messages.MessageError` whose reason :func:`decode` carries
over unchanged into its :class:`~rig_adapters.wire.framing.ProtocolError`.
"""

from __future__ import annotations

import struct
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

from decoder.messages import (
    MAX_BATCH,
    MAX_MARK_CHANNELS,
    ControlCommand,
    GroupAnnounce,
    Heartbeat,
    InputMessage,
    MarkedSpikes,
    MessageError,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
    describe,
)
from decoder.signals.lfp_chunk import MAX_LFP_CHANNELS, LfpChunk
from rig_adapters.wire.framing import (
    INPUT_LIMITS,
    MAX_FRAME_BYTES,
    PROTOCOL_VERSION,
    SMALL_FRAME_BYTES,
    ProtocolError,
    pack,
    read_kind,
    unpack,
)

#: Input kinds, rig -> placeloop.
INPUT_KINDS = ("announce", "spikes", "frames", "heartbeat", "sync", "control", "lfp", "marks", "groups")

#: The prefix of a rig's own keys, which every reader ignores (PROTOCOL.md, section 2).
EXTENSION_PREFIX = "x_"


@dataclass(frozen=True)
class _Keys:
    """The keys of one input kind: those it must have (in the order errors name them), and every one it may have."""

    required: tuple[str, ...]
    allowed: frozenset[str]


def _keys(required: tuple[str, ...], optional: tuple[str, ...] = ()) -> _Keys:
    envelope = ("v", "k", "src", "seq")
    return _Keys(envelope + required, frozenset(envelope + required + optional + ("iw",)))


#: Every key of every input kind (PROTOCOL.md, sections 2, 3 and 5).
INPUT_KEYS = {
    "announce": _keys(("role", "clock", "rate_hz"), ("units",)),
    "spikes": _keys(("t", "u")),
    "frames": _keys(("t", "x", "y"), ("hd", "q")),
    "heartbeat": _keys(("t",)),
    "sync": _keys(("t", "pulse")),
    "control": _keys(("cmd",), ("args",)),
    "lfp": _keys(("t", "rate_hz", "ch", "fmt", "s"), ("uv",)),
    "marks": _keys(("t", "g", "ch", "m")),
    "groups": _keys(("g", "ch")),
}

_F64 = np.dtype("<f8")
_F32 = np.dtype("<f4")
_U8 = np.dtype("<u1")
_INT_BY_WIDTH = {4: np.dtype("<i4"), 8: np.dtype("<i8")}
_F64_THREE = struct.Struct("<3d")
_INT32 = np.iinfo(np.int32)


def _check_envelope(m: dict, kinds: tuple[str, ...]) -> str:
    """The kind of an input frame, its version, keys and integer width checked key by key; a ProtocolError names the first fault."""
    k = read_kind(m, kinds)
    spec = INPUT_KEYS[k]
    for key in m:
        if type(key) is not str:
            raise ProtocolError("bad_field", f"map keys must be strings, the frame has the key {describe(key)}")
        if key not in spec.allowed and not key.startswith(EXTENSION_PREFIX):
            raise ProtocolError(
                "unknown_field",
                f"a {k!r} message has no key {describe(key)}; a rig's own keys start with {EXTENSION_PREFIX!r} (PROTOCOL.md)",
            )
    for key in spec.required:
        if key not in m:
            raise ProtocolError("missing_field", f"a {k!r} message needs the key {key!r}; see PROTOCOL.md")
    width = m.get("iw", 4)
    if type(width) is not int or width not in _INT_BY_WIDTH:
        raise ProtocolError("bad_field", f"'iw' (integer width in bytes) must be 4 or 8, got {describe(width)}")
    return k


def _array(m: dict, key: str, wire: np.dtype) -> np.ndarray | list:
    """An array sent as bin of ``wire`` values (read in place) or as a list (checked by the message)."""
    value = m[key]
    if type(value) is bytes:
        # Every value takes at least a byte: a bin of at most MAX_BATCH bytes needs no count.
        if len(value) > MAX_BATCH and len(value) // wire.itemsize > MAX_BATCH:
            raise ProtocolError("oversized", f"{key!r} holds more than {MAX_BATCH} values")
        try:
            return np.frombuffer(value, wire)
        except ValueError:  # numpy refuses a length that is not a whole number of values
            raise ProtocolError(
                "bad_array",
                f"{key!r} has {len(value)} bytes, not a whole number of {wire.itemsize}-byte values",
            ) from None
    if type(value) is list:
        return value
    if type(value) is str:
        raise ProtocolError(
            "bad_array",
            f"{key!r} arrived as a string; pack arrays as MessagePack bin (use_bin_type) or as a list",
        )
    raise ProtocolError("bad_array", f"{key!r} must be bin or a list of numbers, got {describe(value)}")


def _read_announce(m: dict) -> SourceAnnounce:
    role = m["role"]
    if "units" in m:
        units = _array(m, "units", _INT_BY_WIDTH[m.get("iw", 4)])
    elif role == "spikes":
        raise ProtocolError("missing_field", "an 'announce' of role 'spikes' needs the key 'units'; see PROTOCOL.md")
    else:
        units = np.zeros(0, np.int64)
    return SourceAnnounce(m["src"], m["seq"], role, m["clock"], m["rate_hz"], units)


def _read_spikes(m: dict) -> SpikeBatch:
    return SpikeBatch(m["src"], m["seq"], _array(m, "t", _F64), _array(m, "u", _INT_BY_WIDTH[m.get("iw", 4)]))


def _read_frames(m: dict) -> TrackerFrames:
    t, x, y, q = m["t"], m["x"], m["y"], m.get("q")
    if (
        type(t) is bytes and type(x) is bytes and type(y) is bytes and len(t) == 8 and len(x) == 8 and len(y) == 8
        and (q is None or (type(q) is bytes and len(q) == 1)) and "hd" not in m
    ):
        # A tracker sends one frame per message: read it as floats, no arrays.
        t_s, x_cm, y_cm = _F64_THREE.unpack(t + x + y)
        return TrackerFrames.one(m["src"], m["seq"], t_s, x_cm, y_cm, None if q is None else q[0])
    return TrackerFrames.from_columns(
        m["src"], m["seq"], _array(m, "t", _F64), _array(m, "x", _F64), _array(m, "y", _F64),
        _array(m, "hd", _F64) if "hd" in m else None,
        _array(m, "q", _U8) if "q" in m else None,
    )


def _read_heartbeat(m: dict) -> Heartbeat:
    return Heartbeat(m["src"], m["seq"], m["t"])


def _read_sync(m: dict) -> SyncPulse:
    return SyncPulse(m["src"], m["seq"], m["t"], m["pulse"])


def _read_control(m: dict) -> ControlCommand:
    return ControlCommand(m["src"], m["seq"], m["cmd"], m.get("args", {}))


# -- LFP (PROTOCOL.md, section "LFP") ------------------------------------------------

#: Sample formats of an ``lfp`` frame: wire name -> little-endian dtype.
LFP_FORMATS = {"i16": np.dtype("<i2"), "f32": np.dtype("<f4")}


def _read_lfp(m: dict) -> LfpChunk:
    fmt, n_channels = m["fmt"], m["ch"]
    wire = LFP_FORMATS.get(fmt) if type(fmt) is str else None
    if wire is None:
        raise ProtocolError("bad_field", f"'fmt' must be one of {sorted(LFP_FORMATS)}, got {describe(fmt)}")
    if type(n_channels) is not int or not 1 <= n_channels <= MAX_LFP_CHANNELS:
        raise ProtocolError("bad_field", f"'ch' must be a channel count from 1 to {MAX_LFP_CHANNELS}, "
                                         f"got {describe(n_channels)}")
    if fmt == "i16" and "uv" not in m:
        raise ProtocolError("missing_field", "an 'lfp' message of format 'i16' needs 'uv', the µV per count")
    if type(m["s"]) is not bytes:
        raise ProtocolError("bad_array", "'s' must be bin: the samples as little-endian values, sample-major")
    flat = _array(m, "s", wire)
    if flat.size == 0 or flat.size % n_channels:
        raise ProtocolError("length_mismatch", f"'s' holds {flat.size} values, not a whole number (>= 1) of "
                                               f"samples of {n_channels} channels")
    return LfpChunk(m["src"], m["seq"], m["t"], m["rate_hz"], flat.reshape(-1, n_channels), m.get("uv", 1.0))


def _encode_lfp(msg: LfpChunk) -> dict:
    fmt = "i16" if msg.samples.dtype.kind == "i" else "f32"
    return _head("lfp", msg) | {
        "t": msg.t_s, "rate_hz": msg.rate_hz, "ch": msg.n_channels, "fmt": fmt, "uv": msg.uv_per_count,
        "s": np.ascontiguousarray(msg.samples, dtype=LFP_FORMATS[fmt]).tobytes(),
    }


# -- marked spikes (clusterless decoding; PROTOCOL.md, "Marked spikes") --------


def _read_marks(m: dict) -> MarkedSpikes:
    width = m["ch"]
    if type(width) is not int or not 1 <= width <= MAX_MARK_CHANNELS:
        raise ProtocolError("bad_field", f"'ch' (channels per mark) must be an integer from 1 to {MAX_MARK_CHANNELS}, "
                                         f"got {describe(width)}")
    flat = _array(m, "m", _F32)
    if type(flat) is list:
        if not all(type(v) in (int, float) for v in flat):
            raise ProtocolError("bad_array", f"'m' must be bin of float32 or a flat list of numbers, got {describe(flat)}")
        try:
            flat = np.array(flat, dtype=np.float64)
        except OverflowError:
            raise ProtocolError("bad_field", "'m' holds a number beyond the range of a float64") from None
    if flat.size % width:
        raise ProtocolError("length_mismatch", f"'m' holds {flat.size} values, not a whole number of {width}-channel marks")
    return MarkedSpikes(m["src"], m["seq"], _array(m, "t", _F64), _array(m, "g", _INT_BY_WIDTH[m.get("iw", 4)]),
                        flat.reshape(-1, width))


def _read_groups(m: dict) -> GroupAnnounce:
    width = _INT_BY_WIDTH[m.get("iw", 4)]
    return GroupAnnounce(m["src"], m["seq"], _array(m, "g", width), _array(m, "ch", width))


def _encode_groups(msg: GroupAnnounce) -> dict:
    groups, width = _int_bin(msg.group_ids)
    # Channel counts are small; they share the ids' width, which the one 'iw' key declares.
    out = _head("groups", msg) | {"g": groups, "ch": np.ascontiguousarray(msg.group_channels, _INT_BY_WIDTH[width]).tobytes()}
    if width != 4:
        out["iw"] = width
    return out


def _encode_marks(msg: MarkedSpikes) -> dict:
    groups, width = _int_bin(msg.group_id)
    out = _head("marks", msg) | {"t": _f64_bin(msg.t_s), "g": groups, "ch": int(msg.marks_uv.shape[1]),
                                 "m": np.ascontiguousarray(msg.marks_uv, dtype=_F32).tobytes()}
    if width != 4:
        out["iw"] = width
    return out


_INPUT_READERS: dict[str, Callable[[dict], InputMessage]] = {
    "announce": _read_announce,
    "spikes": _read_spikes,
    "frames": _read_frames,
    "heartbeat": _read_heartbeat,
    "sync": _read_sync,
    "control": _read_control,
    "lfp": _read_lfp,
    "marks": _read_marks,
    "groups": _read_groups,
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
    if type(data) is bytes and len(data) <= SMALL_FRAME_BYTES:
        # The usual small frame, with msgpack's own limits (see framing.unpack);
        # bytes that fail here are unpacked again by unpack(), only to name the fault.
        try:
            m = msgpack.unpackb(data, max_ext_len=0)
        except Exception:  # noqa: BLE001
            m = None
    if type(m) is not dict:
        m = unpack(data, MAX_FRAME_BYTES, INPUT_LIMITS)
    k = m.get("k")
    spec = INPUT_KEYS.get(k) if type(k) is str else None
    v = m.get("v")
    # The usual frame, checked in a few set operations: right version, a
    # known kind, no key outside its kind's, a valid width if any. The
    # readers index every required key, so a missing one raises KeyError,
    # and _check_envelope then names it.
    if not (
        spec is not None and type(v) is int and v == PROTOCOL_VERSION and m.keys() <= spec.allowed
        and ("iw" not in m or (type(m["iw"]) is int and m["iw"] in _INT_BY_WIDTH))
    ):
        k = _check_envelope(m, INPUT_KINDS)
    try:
        return _INPUT_READERS[k](m)
    except MessageError as exc:
        raise ProtocolError(exc.reason, f"in a {k!r} message, {exc.detail}") from None
    except KeyError:
        _check_envelope(m, INPUT_KINDS)
        raise


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
    LfpChunk: _encode_lfp,
    MarkedSpikes: _encode_marks,
    GroupAnnounce: _encode_groups,
}


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
    return pack(encoder(msg))


# --------------------------------------------------------------------------
# Control requests (REQ/REP)


def encode_control_request(command: str, args: dict | None = None, *, source: str = "operator", seq: int = 0) -> bytes:
    """Write a control request for placeloop's REP socket.

    Parameters
    ----------
    command : str
        One of :data:`decoder.messages.CONTROL_COMMANDS`.
    args : dict, optional
        Command arguments: string keys, plain values (None, bool, int, float, str).
    source : str
        Name of the requesting script.
    seq : int
        The requester's sequence number, one more for each request.
    """
    try:
        msg = ControlCommand(source=source, seq=seq, command=command, args={} if args is None else args)
    except MessageError as exc:
        raise ProtocolError(exc.reason, exc.detail) from None
    return encode(msg)


def decode_control_request(data: bytes) -> ControlCommand:
    """Read a control request; any other kind is refused with ``unknown_kind``."""
    read_kind(unpack(data, MAX_FRAME_BYTES, INPUT_LIMITS), ("control",))
    # Requests are rare: the bytes are unpacked once more by the one reader of every input.
    return decode(data)
