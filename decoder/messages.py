"""Typed input messages: what the pipeline consumes.

The wire codec (``rig_adapters.wire.protocol``) turns bytes into these and back;
the pipeline never sees bytes. Every message carries the name of its source
and that source's sequence number, so that gaps can be counted, and its
timestamps are acquisition (data) time in float seconds on the source's clock.

Values are validated once, in the constructors below, so that the core can
trust them: right dtype, one dimension, equal lengths, finite times, integers
inside the signed 64-bit range. A refusal is a :class:`MessageError` whose
``reason`` is one of :data:`REASONS`, the fixed categories the shell counts,
and whose ``detail`` describes the offending value through :func:`describe`,
which stays short whatever the value (a list nested a thousand deep, a map of
a thousand entries, an integer of a thousand digits).
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field
from typing import Any

import numba
import numpy as np

#: Largest number of spikes or frames one message may carry; a batch this
#: large covers seconds of a 1000-unit recording, so anything bigger is a
#: malformed or hostile message rather than data.
MAX_BATCH = 200_000

SOURCE_KINDS = ("spikes", "tracker", "sync", "control")

#: Every reason a message can be refused for, on the wire or in a constructor;
#: the shell keeps one counter each (PROTOCOL.md, section 10).
REASONS = (
    "oversized",
    "not_msgpack",
    "not_a_map",
    "bad_version",
    "unknown_kind",
    "missing_field",
    "unknown_field",
    "bad_field",
    "bad_array",
    "length_mismatch",
    "bad_time",
)

_F64 = np.dtype(np.float64)
_I64 = np.dtype(np.int64)
_I32 = np.dtype(np.int32)
_INT64_MIN, _INT64_MAX = -(2**63), 2**63 - 1
#: Plain Python types a list of numbers may hold (bool is an int in Python, not here).
_NUMBER_TYPES = (int, float, np.integer, np.floating)
_NOT_NUMBERS = (bool, np.bool_)
#: A frame's time and position packed as three float64, native order, as numpy reads them back.
_TXY = struct.Struct("=3d")


def _read_only(arr: np.ndarray) -> np.ndarray:
    arr.setflags(write=False)
    return arr


#: The quality array of one frame, one shared read-only array per value.
SINGLE_FRAME_QUALITY = tuple(_read_only(np.array([value], np.uint8)) for value in range(256))


class MessageError(ValueError):
    """A message whose values make no sense as data.

    Parameters
    ----------
    reason : str
        One of :data:`REASONS`, the category the shell counts it under.
    detail : str
        What was wrong and how to fix it, for a person; bounded in length.
    """

    def __init__(self, reason: str, detail: str) -> None:
        assert reason in REASONS, reason
        super().__init__(reason, detail)
        self.reason = reason
        self.detail = detail

    def __str__(self) -> str:
        return f"{self.reason}: {self.detail}"


# --------------------------------------------------------------------------
# Describing a value in an error message


#: Longest description :func:`describe` returns, in characters.
DESCRIBE_MAX_CHARS = 80
#: Items of a list, or entries of a map, that :func:`describe` shows.
_DESCRIBE_ITEMS = 4


def _describe_leaf(value: Any, max_chars: int) -> str:
    """One value without looking inside it: containers by kind and size."""
    if value is None or isinstance(value, (bool, np.bool_, float, np.floating)):
        return repr(value)
    if isinstance(value, (int, np.integer)):
        # repr of a 5000-digit integer raises (Python's int-to-str limit) and
        # would be unreadable anyway.
        bits = int(value).bit_length()
        return repr(int(value)) if bits <= 64 else f"an integer of {bits} bits"
    if isinstance(value, str):
        text = repr(value[:max_chars])
        return text if len(value) <= max_chars else text[:-1] + "...'"
    if isinstance(value, (bytes, bytearray, memoryview)):
        return f"{memoryview(value).nbytes} bytes"
    if isinstance(value, (list, tuple)):
        return f"[{len(value)} items]"
    if isinstance(value, dict):
        return f"{{{len(value)} entries}}"
    if isinstance(value, np.ndarray):
        return f"an array of shape {value.shape} and dtype {value.dtype}"
    return f"a {type(value).__name__}"


def describe(value: Any, max_chars: int = DESCRIBE_MAX_CHARS) -> str:
    """A short description of any value, for an error message built from rig input.

    Looks one level into a list or map (at most a few items, each described
    without looking further) and never recurses, so that no value, however
    deep or large, can make an error message raise or grow without bound.

    Parameters
    ----------
    value : any
    max_chars : int
        Longest description returned.

    Returns
    -------
    str
        At most ``max_chars`` characters.

    Examples
    --------
    >>> describe([1, "a", [2, [3]]])
    "[1, 'a', [2 items]]"
    """
    if isinstance(value, (list, tuple)):
        shown = ", ".join(_describe_leaf(item, 20) for item in value[:_DESCRIBE_ITEMS])
        more = f", ... ({len(value)} items)" if len(value) > _DESCRIBE_ITEMS else ""
        text = f"[{shown}{more}]"
    elif isinstance(value, dict):
        entries = []
        for n, (key, item) in enumerate(value.items()):
            if n == _DESCRIBE_ITEMS:
                entries.append(f"... ({len(value)} entries)")
                break
            entries.append(f"{_describe_leaf(key, 20)}: {_describe_leaf(item, 20)}")
        text = "{" + ", ".join(entries) + "}"
    else:
        text = _describe_leaf(value, max_chars)
    return text if len(text) <= max_chars else text[: max_chars - 3] + "..."


# --------------------------------------------------------------------------
# Scalars and arrays


def _count(name: str, value: Any) -> int:
    """A non-negative integer inside the signed 64-bit range (sequence numbers, pulse ids)."""
    if type(value) is int and 0 <= value <= _INT64_MAX:
        return value
    if isinstance(value, _NOT_NUMBERS) or not isinstance(value, (int, np.integer)) or not 0 <= value <= _INT64_MAX:
        raise MessageError("bad_field", f"{name} must be an integer from 0 to 2**63 - 1, got {describe(value)}")
    return int(value)


def _real(name: str, value: Any) -> float:
    """A number as a Python float (NaN and infinities included); other types are refused."""
    if type(value) is float:
        return value
    if isinstance(value, _NOT_NUMBERS) or not isinstance(value, _NUMBER_TYPES):
        raise MessageError("bad_field", f"{name} must be a number, got {describe(value)}")
    try:
        return float(value)
    except OverflowError:
        raise MessageError("bad_field", f"{name} is beyond the range of a float64, got {describe(value)}") from None


def _time(name: str, value: Any) -> float:
    t = _real(name, value)
    if not math.isfinite(t):
        raise MessageError("bad_time", f"{name} must be a finite time in seconds, got {t!r}")
    return t


def _name(name: str, value: Any) -> str:
    if type(value) is not str or not value or len(value) > 64:
        raise MessageError("bad_field", f"{name} must be a non-empty name of at most 64 characters, got {describe(value)}")
    return value


def _array_from_list(name: str, values: list | tuple, integers: bool) -> np.ndarray:
    """A flat list of numbers as int64 (all Python ints, range-checked first) or float64."""
    if not values:
        return np.zeros(0, np.int64 if integers else np.float64)
    types = set(map(type, values))
    if not all(issubclass(t, _NUMBER_TYPES) and not issubclass(t, _NOT_NUMBERS) for t in types):
        raise MessageError("bad_array", f"{name} must be a flat list of numbers, got {describe(values)}")
    try:
        if integers and all(issubclass(t, (int, np.integer)) for t in types):
            # Checked before numpy sees them: numpy reads a mix of -1 and
            # 2**64 - 1 as float64, which a cast to int64 would then wrap.
            if min(values) < _INT64_MIN or max(values) > _INT64_MAX:
                raise MessageError("bad_field", f"{name} holds an integer beyond the signed 64-bit range")
            return np.array(values, dtype=np.int64)
        return np.array(values, dtype=np.float64)
    except OverflowError:
        raise MessageError("bad_field", f"{name} holds a number beyond the range of a float64") from None


def _vector(name: str, values: Any, dtype: Any) -> np.ndarray:
    """A read-only, contiguous 1-D array of ``dtype`` (float64 or int64), or a MessageError."""
    dtype = np.dtype(dtype)
    integers = dtype.kind == "i"
    if isinstance(values, (list, tuple)):
        arr = _array_from_list(name, values, integers)
    elif isinstance(values, np.ndarray):
        arr = values
    else:
        raise MessageError("bad_array", f"{name} must be an array or a list of numbers, got {describe(values)}")
    if arr.ndim != 1:
        raise MessageError("bad_array", f"{name} must be one-dimensional, got shape {arr.shape}")
    if arr.size > MAX_BATCH:
        raise MessageError("oversized", f"{name} has {arr.size} elements, more than the limit of {MAX_BATCH}")
    if arr.dtype.kind not in "iuf":
        raise MessageError("bad_array", f"{name} must hold numbers, got dtype {arr.dtype}")
    if integers and arr.size:
        if arr.dtype.kind == "f":
            # Checked before the cast, which would warn on NaN and wrap what lies beyond int64.
            if not (np.all(np.isfinite(arr)) and np.array_equal(arr, np.round(arr))):
                raise MessageError("bad_field", f"{name} must hold whole numbers")
            if arr.min() < -(2.0**63) or arr.max() >= 2.0**63:
                raise MessageError("bad_field", f"{name} holds a value beyond the signed 64-bit range")
        elif arr.dtype.kind == "u" and arr.max() > _INT64_MAX:
            raise MessageError("bad_field", f"{name} holds a value beyond the signed 64-bit range")
    out = np.ascontiguousarray(arr, dtype=dtype)
    if out is values and out.flags.writeable:
        out = out.copy()  # never freeze the caller's own array
    out.setflags(write=False)
    return out


def _same_length(name: str, arr: np.ndarray, n: int, of: str) -> None:
    if arr.size != n:
        raise MessageError("length_mismatch", f"{name} has {arr.size} values but {of} has {n}")


@numba.njit(cache=True)
def finite_non_decreasing(t_s):
    """Whether every time is finite and none is below the one before; t_s (n,) float64.

    One compiled pass: a spike batch arrives every few ms, and the two numpy
    reductions this replaces cost more than the batch's own work.
    """
    previous = -np.inf
    for t in t_s:
        if not (np.isfinite(t) and t >= previous):
            return False
        previous = t
    return True


def finite_non_decreasing_numpy(t_s: np.ndarray) -> bool:
    """Numpy twin of :func:`finite_non_decreasing` (the tests' reference)."""
    return bool(np.isfinite(t_s).all() and not (t_s[1:] < t_s[:-1]).any())


def _is_ready_vector(arr: Any, dtype: np.dtype) -> bool:
    """Whether ``arr`` is already what :func:`_vector` would make: 1-D, ``dtype``, contiguous, read-only.

    Arrays read straight off the wire with ``numpy.frombuffer`` are, and
    checking costs a fraction of converting.
    """
    if type(arr) is not np.ndarray or arr.ndim != 1 or arr.dtype != dtype or arr.size > MAX_BATCH:
        return False
    flags = arr.flags
    return not flags.writeable and flags.c_contiguous


def _check_source_seq(msg: Any) -> None:
    """Check a message's ``source`` and ``seq`` where they stand; ``seq`` becomes a Python int."""
    source = msg.source
    if type(source) is not str or not 0 < len(source) <= 64:
        _name("source", source)
    seq = msg.seq
    if type(seq) is not int or not 0 <= seq <= _INT64_MAX:
        object.__setattr__(msg, "seq", _count("seq", seq))


# --------------------------------------------------------------------------
# The messages


@dataclass(frozen=True, slots=True)
class SourceAnnounce:
    """A source says what it is: its kind, its units, its clock.

    Parameters
    ----------
    source : str
        Name of the source, unique on the rig (for example ``"ephys"``).
    seq : int
        The source's sequence number.
    kind : {"spikes", "tracker", "sync", "control"}
    clock : str
        Name of the clock the source's timestamps run on.
    sample_rate_hz : float
        Sampling rate of that clock (30 kHz for an acquisition system,
        the frame rate for a tracker).
    unit_ids : ndarray of int64, shape (n_units,)
        The units a spike source will send; empty for other kinds.
    """

    source: str
    seq: int
    kind: str
    clock: str
    sample_rate_hz: float
    unit_ids: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))

    def __post_init__(self) -> None:
        _check_source_seq(self)
        if type(self.kind) is not str or self.kind not in SOURCE_KINDS:
            raise MessageError("bad_field", f"kind must be one of {SOURCE_KINDS}, got {describe(self.kind)}")
        if type(self.clock) is not str or not self.clock:
            raise MessageError("bad_field", f"clock must be a non-empty name, got {describe(self.clock)}")
        rate = _real("sample_rate_hz", self.sample_rate_hz)
        if not (math.isfinite(rate) and rate > 0):
            raise MessageError("bad_field", f"sample_rate_hz must be a positive rate in Hz, got {rate!r}")
        object.__setattr__(self, "sample_rate_hz", rate)
        ids = _vector("unit_ids", self.unit_ids, np.int64)
        if np.unique(ids).size != ids.size:
            raise MessageError("bad_field", "unit_ids holds a repeated id")
        object.__setattr__(self, "unit_ids", ids)


@dataclass(frozen=True, slots=True)
class SpikeBatch:
    """Spikes from one source, in acquisition-time order.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
        Spike times, non-decreasing within the batch.
    unit_id : ndarray of int64, shape (n,)
        The unit of each spike.
    """

    source: str
    seq: int
    t_s: np.ndarray
    unit_id: np.ndarray

    def __post_init__(self) -> None:
        _check_source_seq(self)
        t = self.t_s if _is_ready_vector(self.t_s, _F64) else _vector("t_s", self.t_s, np.float64)
        u = self.unit_id
        if not _is_ready_vector(u, _I64):
            if type(u) is np.ndarray and u.dtype == _I32 and u.ndim == 1 and u.size <= MAX_BATCH:
                # Ids come off the wire as int32: widening is always exact.
                u = _read_only(u.astype(_I64))
            else:
                u = _vector("unit_id", u, np.int64)
        if u.size != t.size:
            _same_length("unit_id", u, t.size, "t_s")
        if not finite_non_decreasing(t):
            if not np.isfinite(t).all():
                raise MessageError("bad_time", "t_s holds a NaN or infinite time; times are finite seconds")
            raise MessageError("bad_time", "spike times within a batch must not decrease")
        object.__setattr__(self, "t_s", t)
        object.__setattr__(self, "unit_id", u)


# Marked spikes (clusterless decoding). Most channels of one electrode group
# (a 64-site shank segment), and the largest mark taken (uV), far beyond any spike.
MAX_MARK_CHANNELS = 64
MAX_MARK_UV = 1e5


@dataclass(frozen=True, slots=True)
class MarkedSpikes:
    """Threshold crossings with their waveform marks, in acquisition-time order, unsorted.

    ``t_s`` (n,) float64 s, non-decreasing; ``group_id`` (n,) int64, the
    electrode group of each spike; ``marks_uv`` (n, n_channels) float32, each
    spike's mark on its group's channels (peak amplitudes, uV): one width per
    batch (1 to :data:`MAX_MARK_CHANNELS`), finite, at most :data:`MAX_MARK_UV`
    in magnitude. The pipeline checks the width against the group's announcement.
    """

    source: str
    seq: int
    t_s: np.ndarray
    group_id: np.ndarray
    marks_uv: np.ndarray

    def __post_init__(self) -> None:
        _check_source_seq(self)
        t = self.t_s if _is_ready_vector(self.t_s, _F64) else _vector("t_s", self.t_s, np.float64)
        g = self.group_id
        g = _read_only(g.astype(_I64)) if type(g) is np.ndarray and g.dtype == _I32 else _vector("group_id", g, np.int64)
        _same_length("group_id", g, t.size, "t_s")
        m = self.marks_uv
        if not (type(m) is np.ndarray and m.ndim == 2 and m.dtype.kind in "iuf" and m.shape[0] == t.size):
            raise MessageError("bad_array", f"marks_uv must be an array of {t.size} spikes by channels, got {describe(m)}")
        if m.size > MAX_BATCH or not 1 <= m.shape[1] <= MAX_MARK_CHANNELS:
            raise MessageError("oversized" if m.size > MAX_BATCH else "bad_field", f"marks_uv holds {m.size} values of "
                               f"{m.shape[1]} channels; at most {MAX_BATCH} values of 1 to {MAX_MARK_CHANNELS} channels")
        with np.errstate(over="ignore"):  # beyond float32 becomes inf, refused just below
            m = _read_only(np.array(m, dtype=np.float32, order="C"))
        if m.size and not (np.isfinite(m).all() and np.abs(m).max() <= MAX_MARK_UV):
            raise MessageError("bad_field", f"marks_uv holds a NaN, infinite or beyond {MAX_MARK_UV:g} uV amplitude")
        if not finite_non_decreasing(t):
            raise MessageError("bad_time", "t_s must hold finite spike times that do not decrease within a batch")
        object.__setattr__(self, "t_s", t)
        object.__setattr__(self, "group_id", g)
        object.__setattr__(self, "marks_uv", m)


@dataclass(frozen=True, slots=True)
class GroupAnnounce:
    """A spike source says which electrode groups it sends marked spikes of, and each one's channels.

    ``group_ids`` (n_groups,) int64 without repeats; ``group_channels``
    (n_groups,) int64, 1 to :data:`MAX_MARK_CHANNELS` each: the width of the group's marks.
    """

    source: str
    seq: int
    group_ids: np.ndarray
    group_channels: np.ndarray

    def __post_init__(self) -> None:
        _check_source_seq(self)
        groups, channels = _vector("group_ids", self.group_ids, np.int64), _vector("group_channels", self.group_channels, np.int64)
        _same_length("group_channels", channels, groups.size, "group_ids")
        if np.unique(groups).size != groups.size or (channels.size and not 1 <= channels.min() <= channels.max() <= MAX_MARK_CHANNELS):
            raise MessageError("bad_field", f"group_ids must not repeat and group_channels be 1 to {MAX_MARK_CHANNELS} each")
        object.__setattr__(self, "group_ids", groups)
        object.__setattr__(self, "group_channels", channels)


def stored_frame(t_s: Any, x_cm: Any, y_cm: Any, quality: Any = None) -> tuple[float, float, float, int]:
    """The rule for one tracker frame: what a frame (t, x, y, quality) is stored as.

    A frame is lost when a coordinate is NaN or its quality is 0; it is then
    stored with NaN coordinates and quality 0. Without a quality a seen frame
    gets 1. This is the only place the rule is written: :class:`TrackerFrames`
    applies it to each frame of a batch and to the single frame of
    :meth:`TrackerFrames.one`.

    Parameters
    ----------
    t_s : float
        Frame time, s; must be finite.
    x_cm, y_cm : float
        Position, cm; NaN where the tracker lost the animal, never infinite.
    quality : int, optional
        0 (lost) to 255 (most confident).

    Returns
    -------
    (t_s, x_cm, y_cm, quality) : (float, float, float, int)

    Raises
    ------
    MessageError
        ``bad_time`` for a NaN or infinite time, ``bad_field`` for an
        infinite coordinate, a quality outside 0..255 or a value that is not
        a number.

    Examples
    --------
    >>> stored_frame(1.5, 10.0, float("nan"), 7)
    (1.5, nan, nan, 0)
    """
    if not (type(t_s) is float and type(x_cm) is float and type(y_cm) is float):
        t_s, x_cm, y_cm = _real("t_s", t_s), _real("x_cm", x_cm), _real("y_cm", y_cm)
    if not math.isfinite(t_s):
        raise MessageError("bad_time", f"a frame time must be finite seconds, got {t_s!r}")
    if math.isinf(x_cm) or math.isinf(y_cm):
        raise MessageError("bad_field", "a frame holds an infinite coordinate; send NaN for a lost frame")
    if quality is None:
        quality = 1
    elif type(quality) is not int or not 0 <= quality <= 255:
        if isinstance(quality, _NOT_NUMBERS) or not isinstance(quality, (int, np.integer)) or not 0 <= quality <= 255:
            raise MessageError("bad_field", f"a frame's quality must be an integer from 0 to 255, got {describe(quality)}")
        quality = int(quality)
    if quality == 0 or x_cm != x_cm or y_cm != y_cm:
        return t_s, math.nan, math.nan, 0
    return t_s, x_cm, y_cm, quality


@dataclass(frozen=True, slots=True)
class TrackerFrames:
    """One or more tracker frames.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
        Frame times, strictly increasing.
    xy_cm : ndarray of float64, shape (n, 2)
        Position in the arena's frame; NaN where the tracker lost the animal.
    head_dir_rad : ndarray of float64, shape (n,) or None
        Head direction, NaN where unknown.
    quality : ndarray of uint8, shape (n,)
        0 for a lost frame, 1..255 for increasing confidence. Each frame is
        stored by :func:`stored_frame`: a frame with quality 0 or a NaN
        coordinate is lost, NaN with quality 0.
    """

    source: str
    seq: int
    t_s: np.ndarray
    xy_cm: np.ndarray
    head_dir_rad: np.ndarray | None = None
    quality: np.ndarray | None = None

    def __post_init__(self) -> None:
        _check_source_seq(self)
        xy = self.xy_cm
        if not (type(xy) is np.ndarray and xy.ndim == 2 and xy.shape[1] == 2 and xy.dtype.kind in "iuf"):
            if isinstance(xy, (list, tuple)) and not all(type(row) in (list, tuple) for row in xy):
                raise MessageError("bad_array", f"xy_cm must be a list of (x, y) pairs, got {describe(xy)}")
            try:
                xy = np.asarray(xy, dtype=np.float64)
            except (TypeError, ValueError, OverflowError):
                raise MessageError("bad_array", f"xy_cm must be an (n, 2) array of numbers, got {describe(xy)}") from None
            if xy.ndim != 2 or xy.shape[1] != 2:
                raise MessageError("bad_array", f"xy_cm must have shape (n, 2), got {xy.shape}")
        self._take_columns(self.t_s, xy[:, 0], xy[:, 1], self.head_dir_rad, self.quality)

    @classmethod
    def from_columns(cls, source: str, seq: int, t_s: Any, x_cm: Any, y_cm: Any,
                     head_dir_rad: Any = None, quality: Any = None) -> TrackerFrames:
        """Frames from one array (or list) per quantity, as the wire carries them.

        Parameters
        ----------
        t_s, x_cm, y_cm : array_like of float, shape (n,)
        head_dir_rad : array_like of float, shape (n,), optional
        quality : array_like of int, shape (n,), optional
        """
        self = object.__new__(cls)
        object.__setattr__(self, "source", source)
        object.__setattr__(self, "seq", seq)
        _check_source_seq(self)
        self._take_columns(t_s, x_cm, y_cm, head_dir_rad, quality)
        return self

    @classmethod
    def one(cls, source: str, seq: int, t_s: float, x_cm: float, y_cm: float,
            quality: int | None = None) -> TrackerFrames:
        """One frame from scalars: :func:`stored_frame` on the frame, without arrays to check.

        A tracker sends one frame per message, 30 to 60 times a second, and
        the wire reader has the values as floats already.
        """
        t_s, x_cm, y_cm, quality = stored_frame(t_s, x_cm, y_cm, quality)
        self = object.__new__(cls)
        put = object.__setattr__
        put(self, "source", source)
        put(self, "seq", seq)
        _check_source_seq(self)
        put(self, "head_dir_rad", None)
        # One buffer for time and position, read-only as bytes are: numpy's constructors cost more than the rule.
        txy = np.frombuffer(_TXY.pack(t_s, x_cm, y_cm), _F64)
        put(self, "t_s", txy[:1])
        put(self, "xy_cm", txy[None, 1:])
        put(self, "quality", SINGLE_FRAME_QUALITY[quality])
        return self

    def _take_columns(self, t_s: Any, x_cm: Any, y_cm: Any, head_dir_rad: Any, quality: Any) -> None:
        """Check the columns' shapes, store every frame by :func:`stored_frame`, and the head direction."""
        t = _vector("t_s", t_s, np.float64)
        x = _vector("x_cm", x_cm, np.float64)
        y = _vector("y_cm", y_cm, np.float64)
        _same_length("x_cm", x, t.size, "t_s")
        _same_length("y_cm", y, t.size, "t_s")
        q = [None] * t.size
        if quality is not None:
            q_arr = _vector("quality", quality, np.int64)
            _same_length("quality", q_arr, t.size, "t_s")
            q = q_arr.tolist()
        frames = [stored_frame(*frame) for frame in zip(t.tolist(), x.tolist(), y.tolist(), q)]
        times = [frame[0] for frame in frames]
        if any(later <= earlier for earlier, later in zip(times, times[1:])):
            raise MessageError("bad_time", "frame times within a message must increase")
        stored = np.array(frames, dtype=np.float64).reshape(t.size, 4)
        hd = None
        if head_dir_rad is not None:
            hd = _vector("head_dir_rad", head_dir_rad, np.float64)
            _same_length("head_dir_rad", hd, t.size, "t_s")
            if np.any(np.isinf(hd)):
                raise MessageError("bad_field", "head_dir_rad holds an infinite angle; send NaN where unknown")
        object.__setattr__(self, "t_s", _read_only(np.ascontiguousarray(stored[:, 0])))
        object.__setattr__(self, "xy_cm", _read_only(np.ascontiguousarray(stored[:, 1:3])))
        object.__setattr__(self, "head_dir_rad", hd)
        object.__setattr__(self, "quality", _read_only(stored[:, 3].astype(np.uint8)))


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """A source's clock is at ``t_s`` and it has sent everything before it."""

    source: str
    seq: int
    t_s: float

    def __post_init__(self) -> None:
        _check_source_seq(self)
        t = self.t_s
        # Half of all messages are heartbeats: a finite float, the usual case, is taken as it is.
        if type(t) is not float or not math.isfinite(t):
            object.__setattr__(self, "t_s", _time("t_s", t))


@dataclass(frozen=True, slots=True)
class SyncPulse:
    """A shared sync pulse seen by one source, identified by ``pulse_id``.

    The same pulse seen by two sources (same ``pulse_id``) ties their clocks.
    """

    source: str
    seq: int
    t_s: float
    pulse_id: int

    def __post_init__(self) -> None:
        _check_source_seq(self)
        object.__setattr__(self, "t_s", _time("t_s", self.t_s))
        object.__setattr__(self, "pulse_id", _count("pulse_id", self.pulse_id))


CONTROL_COMMANDS = ("start_learning", "stop_learning", "fit", "load_model", "arm", "disarm", "status", "stall")

#: Most arguments one control command may carry.
MAX_CONTROL_ARGS = 64
#: Longest string argument of a control command, in characters (a file path, a reason).
MAX_ARG_CHARS = 4096


def _plain_value(value: Any) -> bool:
    """Whether a control argument is a plain value: nil, bool, number in range, or a string not too long."""
    if value is None or type(value) in (bool, float):
        return True
    if type(value) is str:
        return len(value) <= MAX_ARG_CHARS
    return type(value) is int and _INT64_MIN <= value <= _INT64_MAX


@dataclass(frozen=True, slots=True)
class ControlCommand:
    """A command from the experiment-control script or the shell.

    Control commands are recorded and replayed like any input, so that a
    replay passes through the same session states at the same data time.
    ``stall`` is raised by the shell's watchdog when a stream goes quiet.
    ``args`` maps names to plain values (None, bool, int, float, str of at
    most :data:`MAX_ARG_CHARS`), so that nothing a requester sends can be
    nested or unbounded.
    """

    source: str
    seq: int
    command: str
    args: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        _check_source_seq(self)
        if type(self.command) is not str or self.command not in CONTROL_COMMANDS:
            raise MessageError("bad_field", f"command must be one of {CONTROL_COMMANDS}, got {describe(self.command)}")
        args = self.args
        if not isinstance(args, dict) or len(args) > MAX_CONTROL_ARGS:
            raise MessageError("bad_field", f"args must be a map of at most {MAX_CONTROL_ARGS} entries, got {describe(args)}")
        for key, value in args.items():
            if type(key) is not str or not _plain_value(value):
                raise MessageError(
                    "bad_field",
                    f"args must map names to plain values (nil, bool, number, string), got {describe(key)}: {describe(value)}",
                )


InputMessage = (SourceAnnounce | SpikeBatch | MarkedSpikes | GroupAnnounce | TrackerFrames | Heartbeat | SyncPulse
                | ControlCommand)
