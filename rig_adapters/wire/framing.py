"""One frame, one MessagePack map: the limits, the unpacking, the envelope, the error.

Everything that every message kind shares, inputs and outputs alike: the
version, the size limits checked before and during unpacking, the ``v`` and
``k`` keys, and :class:`ProtocolError`, the only exception a reader raises.
The per-kind readers and writers are in :mod:`rig_adapters.wire.inputs` and
:mod:`rig_adapters.wire.outputs`; :mod:`rig_adapters.wire.protocol` is the
public module.
"""

from __future__ import annotations

from typing import Any

import msgpack
import numpy as np

from decoder.messages import MAX_BATCH, REASONS, describe

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

# The unpack limits bound what hostile bytes can make msgpack allocate: a
# ten-byte frame may declare an array of four billion elements.
INPUT_LIMITS = dict(
    max_bin_len=8 * MAX_BATCH,
    max_array_len=MAX_BATCH,
    max_map_len=MAX_MAP_LEN,
    max_str_len=MAX_STR_BYTES,
    max_ext_len=0,
)
OUTPUT_LIMITS = dict(
    max_bin_len=MAX_OUTPUT_FRAME_BYTES,
    max_array_len=MAX_BATCH,
    max_map_len=MAX_MAP_LEN,
    max_str_len=MAX_STR_BYTES,
    max_ext_len=0,
)

#: Frames up to this many bytes are unpacked with msgpack's own limits, which
#: are then no looser than ours (every limit below is at least this large).
SMALL_FRAME_BYTES = min(MAX_MAP_LEN, MAX_STR_BYTES, 8 * MAX_BATCH, MAX_BATCH)


class ProtocolError(ValueError):
    """A frame that does not follow the protocol.

    Parameters
    ----------
    reason : str
        One of :data:`REASONS`, a fixed category for counters.
    detail : str
        What was wrong and how to fix it, for a person. Values from the frame
        appear in it only through :func:`decoder.messages.describe`, so it
        stays short whatever the frame holds.
    """

    def __init__(self, reason: str, detail: str) -> None:
        assert reason in REASONS, reason
        super().__init__(reason, detail)
        self.reason = reason
        self.detail = detail

    def __str__(self) -> str:
        return f"{self.reason}: {self.detail}"


def unpack(data: Any, max_bytes: int, limits: dict) -> dict:
    """The one MessagePack map a frame holds, or a ProtocolError naming what is wrong."""
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
        if n_bytes <= SMALL_FRAME_BYTES:
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
            raise ProtocolError("oversized", f"the frame holds an item over the protocol's limits ({describe(text)})") from None
        raise ProtocolError("not_msgpack", f"the frame is not one valid MessagePack value ({type(exc).__name__}: {describe(text)})") from None
    if type(obj) is not dict:
        raise ProtocolError("not_a_map", f"a frame must hold one MessagePack map, got {describe(obj)}")
    return obj


def readable_envelope(data: Any) -> tuple[str, int] | None:
    """The source and sequence number of a rejected frame, when its envelope is readable; else None.

    A frame refused for anything past its envelope (a bad array, a NaN time)
    still took its number from its source: stream health counts it as
    rejected, not as a gap. Only read on the rejection path, so a good frame
    is unpacked once. The rules are those of the messages' constructors
    (``decoder.messages``): a name of 1 to 64 characters, a number in 0..2**63 - 1.
    """
    try:
        m = unpack(data, MAX_FRAME_BYTES, INPUT_LIMITS)
    except Exception:  # noqa: BLE001 - a frame too broken to unpack has no envelope
        return None
    source, seq, version = m.get("src"), m.get("seq"), m.get("v")
    if (type(version) is int and version == PROTOCOL_VERSION and type(source) is str and 0 < len(source) <= 64
            and type(seq) is int and 0 <= seq < 2**63):
        return source, seq
    return None


def read_kind(m: dict, kinds: tuple[str, ...]) -> str:
    """Check the version ``v`` and return the kind ``k``, one of ``kinds``."""
    v = m.get("v")
    k = m.get("k")
    if type(v) is int and v == PROTOCOL_VERSION and type(k) is str and k in kinds:
        return k
    if "v" not in m:
        raise ProtocolError("missing_field", f"the frame has no protocol version 'v'; send \"v\": {PROTOCOL_VERSION}")
    if type(v) is not int or v != PROTOCOL_VERSION:
        raise ProtocolError("bad_version", f"this placeloop speaks protocol version {PROTOCOL_VERSION}, the frame says v={describe(v)}")
    if "k" not in m:
        raise ProtocolError("missing_field", f"the frame has no kind 'k'; expected one of {kinds}")
    raise ProtocolError("unknown_kind", f"kind k={describe(k)} is not one of {kinds} on this socket")


def require(m: dict, key: str, kind: str) -> Any:
    """``m[key]``, or a ProtocolError saying which key a message of ``kind`` lacks."""
    if key not in m:
        raise ProtocolError("missing_field", f"a {kind!r} message needs the key {key!r}; see PROTOCOL.md")
    return m[key]


def _plain(value: Any) -> Any:
    """msgpack ``default`` hook: numpy scalars and arrays become plain values."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot send a {type(value).__name__} over the wire")


def pack(m: dict) -> bytes:
    """One map as one frame, binary payloads as MessagePack ``bin``."""
    try:
        return msgpack.packb(m, use_bin_type=True, default=_plain)
    except (TypeError, ValueError, OverflowError) as exc:
        raise ProtocolError("bad_field", f"the message cannot be packed: {describe(str(exc))}") from None
