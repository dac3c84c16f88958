"""Typed input messages: what the pipeline consumes.

The wire codec (``rig_adapters.wire.protocol``) turns bytes into these and back;
the pipeline never sees bytes. Every message carries the name of its source
and that source's sequence number, so that gaps can be counted, and its
timestamps are acquisition (data) time in float seconds on the source's clock.

Arrays are validated once, in the constructors below, so that the core can
trust them: right dtype, one dimension, equal lengths, finite times.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numba
import numpy as np

#: Largest number of spikes or frames one message may carry; a batch this
#: large covers seconds of a 1000-unit recording, so anything bigger is a
#: malformed or hostile message rather than data.
MAX_BATCH = 200_000

SOURCE_KINDS = ("spikes", "tracker", "sync", "control")

_F64 = np.dtype(np.float64)
_I64 = np.dtype(np.int64)
_I32 = np.dtype(np.int32)
_U8 = np.dtype(np.uint8)


def _read_only(arr: np.ndarray) -> np.ndarray:
    arr.setflags(write=False)
    return arr


#: The quality array of one frame, one shared read-only array per value.
SINGLE_FRAME_QUALITY = tuple(_read_only(np.array([value], np.uint8)) for value in range(256))


class MessageError(ValueError):
    """A message that is well-formed on the wire but makes no sense as data."""


def _vector(name: str, values: Any, dtype: Any) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise MessageError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if arr.size > MAX_BATCH:
        raise MessageError(f"{name} has {arr.size} elements, more than the limit of {MAX_BATCH}")
    if np.dtype(dtype).kind == "i" and arr.dtype.kind == "f":
        # Checked before the cast, which would warn on NaN and wrap infinities.
        if not np.all(np.isfinite(arr)) or not np.array_equal(arr, np.round(arr)):
            raise MessageError(f"{name} must hold whole numbers")
    try:
        out = arr.astype(dtype, casting="same_kind" if arr.dtype.kind == np.dtype(dtype).kind else "unsafe")
    except (TypeError, ValueError) as exc:
        raise MessageError(f"{name} cannot be read as {np.dtype(dtype).name}: {exc}") from None
    out = np.ascontiguousarray(out)
    out.setflags(write=False)
    return out


def _finite_times(name: str, t_s: np.ndarray) -> None:
    if not np.isfinite(t_s).all():
        raise MessageError(f"{name} holds a NaN or infinite timestamp")


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
    return (
        type(arr) is np.ndarray and arr.dtype == dtype and arr.ndim == 1 and arr.size <= MAX_BATCH
        and not arr.flags.writeable and arr.flags.c_contiguous
    )


def _source(source: Any) -> str:
    if type(source) is not str or not source or len(source) > 64:
        raise MessageError(f"source must be a non-empty name of at most 64 characters, got {source!r}")
    return source


def _check_source_seq(msg: Any) -> None:
    """Check a message's ``source`` and ``seq`` where they stand; ``seq`` becomes a Python int."""
    _source(msg.source)
    seq = msg.seq
    if type(seq) is not int or seq < 0:
        object.__setattr__(msg, "seq", _seq(seq))


def _seq(seq: Any) -> int:
    if type(seq) is int and seq >= 0:
        return seq
    if isinstance(seq, bool) or not isinstance(seq, (int, np.integer)) or seq < 0:
        raise MessageError(f"seq must be a non-negative integer, got {seq!r}")
    return int(seq)


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
        if self.kind not in SOURCE_KINDS:
            raise MessageError(f"kind must be one of {SOURCE_KINDS}, got {self.kind!r}")
        if not isinstance(self.clock, str) or not self.clock:
            raise MessageError(f"clock must be a non-empty name, got {self.clock!r}")
        rate = float(self.sample_rate_hz)
        if not np.isfinite(rate) or rate <= 0:
            raise MessageError(f"sample_rate_hz must be positive, got {self.sample_rate_hz!r}")
        object.__setattr__(self, "sample_rate_hz", rate)
        ids = _vector("unit_ids", self.unit_ids, np.int64)
        if np.unique(ids).size != ids.size:
            raise MessageError("unit_ids holds a repeated id")
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
            if type(u) is np.ndarray and u.dtype == _I32 and u.ndim == 1:
                # Ids come off the wire as int32: widening is always exact.
                u = u.astype(_I64)
                u.setflags(write=False)
            else:
                u = _vector("unit_id", u, np.int64)
        if t.size != u.size:
            raise MessageError(f"t_s has {t.size} spikes but unit_id has {u.size}")
        if not finite_non_decreasing(t):
            _finite_times("t_s", t)
            raise MessageError("spike times within a batch must not decrease")
        object.__setattr__(self, "t_s", t)
        object.__setattr__(self, "unit_id", u)


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
        0 for a lost frame, 1..255 for increasing confidence. A frame with
        quality 0 or a NaN coordinate is treated as lost.
    """

    source: str
    seq: int
    t_s: np.ndarray
    xy_cm: np.ndarray
    head_dir_rad: np.ndarray | None = None
    quality: np.ndarray | None = None

    def __post_init__(self) -> None:
        _check_source_seq(self)
        if not self._take_one_frame():
            self._take_frames()

    @classmethod
    def one(cls, source: str, seq: int, t_s: float, x_cm: float, y_cm: float,
            quality: int | None = None) -> TrackerFrames:
        """One frame from Python scalars: what the constructor makes of 1-element arrays, for less.

        A tracker sends one frame per message, 30 to 60 times a second, and
        the wire reader has the values as floats already; building the
        message from them skips the array checks. Values the one-frame path
        does not take (an infinite coordinate, a bad quality, ...) go through
        the constructor, which raises its usual :class:`MessageError`.
        """
        if not (
            type(t_s) is float and type(x_cm) is float and type(y_cm) is float and math.isfinite(t_s)
            and not math.isinf(x_cm) and not math.isinf(y_cm)
            and (quality is None or (type(quality) is int and 0 <= quality <= 255))
        ):
            q = None if quality is None else np.array([quality])
            return cls(source, seq, np.array([t_s], np.float64), np.array([[x_cm, y_cm]], np.float64), None, q)
        self = object.__new__(cls)
        object.__setattr__(self, "source", _source(source))
        object.__setattr__(self, "seq", _seq(seq))
        object.__setattr__(self, "head_dir_rad", None)
        self._store_one(t_s, x_cm, y_cm, quality)
        return self

    def _take_one_frame(self) -> bool:
        """Store a single float64 frame through :meth:`_store_one`; False if not that case.

        Anything unusual (other dtypes, several frames, head direction, an
        invalid value) goes to ``_take_frames``, which gives the same result
        and the error messages.
        """
        t, xy, q = self.t_s, self.xy_cm, self.quality
        if not (
            type(t) is np.ndarray and t.shape == (1,) and t.dtype == _F64
            and type(xy) is np.ndarray and xy.shape == (1, 2) and xy.dtype == _F64
            and self.head_dir_rad is None
            and (q is None or (type(q) is np.ndarray and q.shape == (1,) and q.dtype == _U8))
        ):
            return False
        t_s, x, y = t.item(0), xy.item(0), xy.item(1)
        if not math.isfinite(t_s) or math.isinf(x) or math.isinf(y):
            return False
        self._store_one(t_s, x, y, None if q is None else q.item(0))
        return True

    def _store_one(self, t_s: float, x_cm: float, y_cm: float, quality: int | None) -> None:
        """Store one checked frame (finite time, finite or NaN coordinates, quality 0..255 or None)."""
        seen = x_cm == x_cm and y_cm == y_cm
        if quality is None:
            quality = 1 if seen else 0
        if quality == 0 or not seen:
            x_cm = y_cm = math.nan
            quality = 0
        # One read-only buffer for time and position: numpy's constructors cost more than the checks.
        txy = np.array((t_s, x_cm, y_cm))
        txy.setflags(write=False)
        object.__setattr__(self, "t_s", txy[:1])
        object.__setattr__(self, "xy_cm", txy[1:].reshape(1, 2))
        object.__setattr__(self, "quality", SINGLE_FRAME_QUALITY[quality])

    def _take_frames(self) -> None:
        t = _vector("t_s", self.t_s, np.float64)
        _finite_times("t_s", t)
        if t.size > 1 and np.any(np.diff(t) <= 0):
            raise MessageError("frame times within a message must increase")
        xy = np.asarray(self.xy_cm, dtype=np.float64)
        if xy.shape != (t.size, 2):
            raise MessageError(f"xy_cm must have shape ({t.size}, 2), got {xy.shape}")
        if np.any(np.isinf(xy)):
            raise MessageError("xy_cm holds an infinite coordinate; send NaN for a lost frame")
        xy = np.ascontiguousarray(xy)
        if self.quality is None:
            q = np.where(np.all(np.isfinite(xy), axis=1), 1, 0).astype(np.uint8)
        else:
            q = _vector("quality", self.quality, np.int64)
            if q.size != t.size or np.any((q < 0) | (q > 255)):
                raise MessageError("quality must give one value in 0..255 per frame")
            q = q.astype(np.uint8)
        lost = (q == 0) | ~np.all(np.isfinite(xy), axis=1)
        if np.any(lost):
            xy = xy.copy()
            xy[lost] = np.nan
            q = q.copy()
            q[lost] = 0
        xy.setflags(write=False)
        q.setflags(write=False)
        hd = None
        if self.head_dir_rad is not None:
            hd = _vector("head_dir_rad", self.head_dir_rad, np.float64)
            if hd.size != t.size:
                raise MessageError("head_dir_rad must give one value per frame")
            if np.any(np.isinf(hd)):
                raise MessageError("head_dir_rad holds an infinite angle; send NaN where unknown")
        object.__setattr__(self, "t_s", t)
        object.__setattr__(self, "xy_cm", xy)
        object.__setattr__(self, "head_dir_rad", hd)
        object.__setattr__(self, "quality", q)


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """A source's clock is at ``t_s`` and it has sent everything before it."""

    source: str
    seq: int
    t_s: float

    def __post_init__(self) -> None:
        _check_source_seq(self)
        t = self.t_s
        # Half of all messages are heartbeats: a float, the usual type, needs no conversion.
        if type(t) is not float:
            t = float(t)
            object.__setattr__(self, "t_s", t)
        if not math.isfinite(t):
            raise MessageError("heartbeat t_s must be finite")


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
        t = float(self.t_s)
        if not math.isfinite(t):
            raise MessageError("sync t_s must be finite")
        object.__setattr__(self, "t_s", t)
        object.__setattr__(self, "pulse_id", _seq(self.pulse_id))


CONTROL_COMMANDS = (
    "start_learning",
    "stop_learning",
    "fit",
    "load_model",
    "arm",
    "disarm",
    "status",
    "stall",
)


@dataclass(frozen=True, slots=True)
class ControlCommand:
    """A command from the experiment-control script or the shell.

    Control commands are recorded and replayed like any input, so that a
    replay passes through the same session states at the same data time.
    ``stall`` is raised by the shell's watchdog when a stream goes quiet.
    """

    source: str
    seq: int
    command: str
    args: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        _check_source_seq(self)
        if self.command not in CONTROL_COMMANDS:
            raise MessageError(f"command must be one of {CONTROL_COMMANDS}, got {self.command!r}")
        if not isinstance(self.args, dict):
            raise MessageError("args must be a map")


InputMessage = SourceAnnounce | SpikeBatch | TrackerFrames | Heartbeat | SyncPulse | ControlCommand
