"""The LFP chunk: a few ms of continuously sampled signals from one source, as a typed input message.

It lives beside the detector that consumes it, and checks its values once,
in its constructor, by the rules of :mod:`decoder.messages`: a refusal is a
:class:`~decoder.messages.MessageError` whose reason the shell counts. What
one chunk cannot know (a gap since the previous chunk, a rate or a channel
count that changed) the session's LFP stream counts
(``decoder.session.ripples``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from decoder.messages import MAX_BATCH, MessageError, _check_source_seq, _real, _time, describe

__all__ = ["LfpChunk", "MAX_LFP_CHANNELS", "MAX_LFP_CHUNK_S", "LFP_RATE_RANGE_HZ", "LFP_DTYPES"]

#: Most channels one LFP source may carry.
MAX_LFP_CHANNELS = 512
#: Longest chunk (s): an acquisition system sends a few ms at a time, and a
#: detector that waits longer than this for its data detects nothing in time.
MAX_LFP_CHUNK_S = 1.0
#: Sample rates an LFP source may have (Hz), bounds included.
LFP_RATE_RANGE_HZ = (100.0, 100_000.0)
#: Sample types: int16 counts scaled by ``uv_per_count``, or float32.
LFP_DTYPES = (np.dtype(np.int16), np.dtype(np.float32))


@dataclass(frozen=True, slots=True)
class LfpChunk:
    """Consecutive samples of every channel of one LFP source.

    Parameters
    ----------
    source : str
    seq : int
    t_s : float
        Data time of the first sample (s), on the spike source's clock.
    rate_hz : float
        Sample rate (Hz), within :data:`LFP_RATE_RANGE_HZ`.
    samples : ndarray of int16 or float32, shape (n_samples, n_channels)
        Sample-major: row i holds every channel at ``t_s + i / rate_hz``.
        No NaN or infinite sample.
    uv_per_count : float, default 1.0
        µV per unit of ``samples`` (the amplifier's step for int16).
    """

    source: str
    seq: int
    t_s: float
    rate_hz: float
    samples: np.ndarray
    uv_per_count: float = 1.0

    def __post_init__(self) -> None:
        _check_source_seq(self)
        object.__setattr__(self, "t_s", _time("t_s", self.t_s))
        rate = _real("rate_hz", self.rate_hz)
        lo, hi = LFP_RATE_RANGE_HZ
        if not lo <= rate <= hi:
            raise MessageError("bad_field", f"rate_hz must be a sample rate from {lo:g} to {hi:g} Hz, got {rate!r}")
        object.__setattr__(self, "rate_hz", rate)
        scale = _real("uv_per_count", self.uv_per_count)
        if not (math.isfinite(scale) and scale > 0):
            raise MessageError("bad_field", f"uv_per_count must be a positive number of µV, got {scale!r}")
        object.__setattr__(self, "uv_per_count", scale)
        x = self.samples
        if type(x) is not np.ndarray or x.dtype not in LFP_DTYPES:
            raise MessageError("bad_array", f"samples must be an int16 or float32 array, got {describe(x)}")
        if x.ndim != 2 or x.shape[0] < 1 or not 1 <= x.shape[1] <= MAX_LFP_CHANNELS:
            raise MessageError("bad_array", f"samples must have shape (n_samples >= 1, 1..{MAX_LFP_CHANNELS} "
                                            f"channels), got {x.shape}")
        if x.size > MAX_BATCH:
            raise MessageError("oversized", f"samples hold {x.size} values, more than the limit of {MAX_BATCH}")
        if x.shape[0] / rate > MAX_LFP_CHUNK_S:
            raise MessageError("bad_field", f"a chunk of {x.shape[0]} samples at {rate:g} Hz lasts more than "
                                            f"{MAX_LFP_CHUNK_S:g} s; send a few ms at a time")
        if x.dtype.kind == "f" and not np.isfinite(x).all():
            raise MessageError("bad_array", "samples hold a NaN or infinite value; send every sample, or leave a "
                                            "gap in time (PROTOCOL.md, LFP)")
        if x.flags.writeable:
            x = x.copy()
            x.setflags(write=False)
        object.__setattr__(self, "samples", x)

    @property
    def n_samples(self) -> int:
        return self.samples.shape[0]

    @property
    def n_channels(self) -> int:
        return self.samples.shape[1]

    @property
    def end_s(self) -> float:
        """Data time one sample past the last: where the next chunk begins without a gap."""
        return self.t_s + self.samples.shape[0] / self.rate_hz

    def samples_uv(self) -> np.ndarray:
        """The samples in µV, float64, shape (n_samples, n_channels), contiguous."""
        return np.multiply(self.samples, self.uv_per_count, dtype=np.float64)
