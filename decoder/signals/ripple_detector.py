"""Online, causal sharp-wave ripple detection, chunk by chunk, in data time.

The path of one LFP chunk::

    samples (µV) ─► ripple band (causal band-pass, state carried) ─► envelope from the quadrature
        ─► z-score per channel against a robust baseline ─► mean over channels ─► onset, duration, agreement

Why each step is as it is (group delay is the enemy: every millisecond the
envelope lags is a millisecond of latency):

* the band-pass is a low-order Butterworth (two sections by default) whose
  group delay at the band's centre is a few ms (``RippleBand.group_delay_s``);
* the envelope comes from the band-passed signal and its quadrature taken as
  a central difference (``_kernels.ripple_chunk``, which runs the band-pass
  too, in one compiled call per chunk): one sample of delay,
  where squaring and smoothing over a window lags by half the window;
* the baseline is each channel's median envelope and its spread 1.4826 times
  the median absolute deviation (the normal-consistent MAD), learned during
  the session from envelope samples taken outside candidate events (and a
  hold after each), so that the ripples themselves do not raise the bar;
* the channels' z-scores are averaged: a ripple is seen on every channel of
  the region at once, much of the background is each channel's own, so the
  mean is steadier than any one channel and a lower threshold stays quiet;
* onset is the first sample of a run above ``threshold_sd``; the detection is
  made once the run has lasted ``min_duration_s`` and at least
  ``min_channels`` channels are above ``channel_sd`` on their own; the event
  ends when the mean falls below ``end_sd`` (the envelope has fallen back),
  and a :class:`RippleOffset` says so.

What a threshold "in s.d." means. Each channel's z-score is a robust z of
its envelope, and the envelope of band-passed Gaussian noise is Rayleigh
distributed, not normal: its median is 1.177 and its normal-consistent MAD
0.664 times the band's s.d., so ``threshold_sd`` 3.5 is an envelope of
3.50 s.d., exceeded a share exp(-3.50^2 / 2) = 2.2e-3 of the time, ten
times a normal's 2.3e-4 at 3.5 s.d. (``tests/test_ripple_detector.py``
holds it to ``scipy.stats.rayleigh``). The channels' mean, where the
background is partly shared, is narrower (its robust s.d. about 0.6 on
the simulated rig's 8 channels) and skewed to the right; its excursions
above the threshold are what a false detection at rest is made of: the
shared background rising on every channel at once, so channel agreement
does not tell them from a ripple, but briefly. The envelope of noise in
a band of RMS width B stays above a high level u (in its s.d.) for about
1 / (sqrt(2 pi) B u) on average (Rice 1944, 1945), 2-3 ms for the ripple
band; a ripple's envelope stays above it for tens of ms. Hence a minimum
duration of 4 ms by default: the longest the latency allows (every ms of
it is a ms of latency), chosen on ``bench/ripples.py``'s seeds 1-6 and
measured on seeds 7-12 (see DEVELOPERS.md).

References
----------
S. O. Rice (1944, 1945), "Mathematical analysis of random noise", Bell
System Technical Journal 23:282-332 and 24:46-156 (the envelope's
distribution and its crossings of a level; citation from memory).

Each :class:`RippleDetection` carries its onset in data time and the
latency of the detection: from the onset to the end of the chunk that
completed it. Nothing here reads a clock or a socket.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from decoder.signals._kernels import median_and_mad, ripple_chunk
from decoder.signals.envelope_trace import EnvelopeTrace
from decoder.signals.ripple_band import RippleBand

__all__ = ["RippleDetection", "RippleOffset", "RippleDetector", "MAD_TO_SD"]

#: The median absolute deviation of a normal distribution times this is its s.d.
MAD_TO_SD = 1.4826


@dataclass(frozen=True, slots=True)
class RippleDetection:
    """One ripple, detected online.

    Attributes
    ----------
    onset_s : float
        Data time of the envelope sample that first crossed the threshold.
    detected_s : float
        Data time of the end of the chunk that completed the detection.
    latency_s : float
        ``detected_s - onset_s``.
    peak_sd : float
        Highest mean z-score so far in the event.
    n_channels_above : int
        Channels above ``channel_sd`` at the detecting sample.
    """

    onset_s: float
    detected_s: float
    latency_s: float
    peak_sd: float
    n_channels_above: int


@dataclass(frozen=True, slots=True)
class RippleOffset:
    """The end of a detected ripple: the channels' mean z-score fell back below ``end_sd``.

    Attributes
    ----------
    onset_s : float
        The onset of the detection it ends (``RippleDetection.onset_s``).
    offset_s : float
        Data time of the first envelope sample below ``end_sd``.
    detected_s : float
        Data time of the end of the chunk that held that sample.
    peak_sd : float
        Highest mean z-score in the event.
    """

    onset_s: float
    offset_s: float
    detected_s: float
    peak_sd: float


class RippleDetector:
    """Causal ripple detection on the chunks of one LFP source.

    Parameters
    ----------
    rate_hz : float
        Sample rate (Hz).
    n_channels : int
    band_hz : (float, float), default (150, 250)
        Ripple band (Hz), common practice.
    filter_order : int, default 2
        Butterworth order of the band-pass's prototype.
    threshold_sd : float, default 3.5
        Onset threshold on the channels' mean z-score.
    end_sd : float, default 1.0
        The event ends when the mean z-score falls below this.
    min_duration_s : float, default 0.004
        The mean z-score must stay above ``threshold_sd`` this long before a
        detection; every ms here is a ms of latency, and each filters out
        the background's brief excursions (see the module docstring).
    min_channels : int, default 1
        Channels that must each be above ``channel_sd`` at the detection.
    channel_sd : float, default 2.0
    baseline_window_s : float, default 60.0
        The baseline is learned from the newest this-many seconds of envelope.
    baseline_rate_hz : float, default 100.0
        Envelope samples kept for the baseline per second.
    warm_up_s : float, default 10.0
        Seconds of baseline needed before the first detection.
    hold_s : float, default 0.1
        After an event, envelope samples stay out of the baseline this long.
    settle_s : float, default 0.05
        After a start or a gap the filter settles this long: no detection,
        no baseline.

    Attributes
    ----------
    centre_ : ndarray, shape (n_channels,)
        Each channel's baseline envelope (µV), once ``ready_``.
    spread_ : ndarray, shape (n_channels,)
        Each channel's robust s.d. of the envelope (µV).
    ready_ : bool
        Whether the baseline has its warm-up and detections can happen.
    n_detections_ : int
    trace_ : EnvelopeTrace
        The channels' mean z-score (baseline s.d.) once ``ready_``, the peak
        of each 10 ms, for display only: nothing here reads it back.

    Examples
    --------
    >>> det = RippleDetector(1500.0, 4, warm_up_s=1.0)
    >>> det.process(0.0, np.zeros((3, 4)))
    []
    """

    def __init__(self, rate_hz: float, n_channels: int, *, band_hz: tuple[float, float] = (150.0, 250.0),
                 filter_order: int = 2, threshold_sd: float = 3.5, end_sd: float = 1.0,
                 min_duration_s: float = 0.004, min_channels: int = 1, channel_sd: float = 2.0,
                 baseline_window_s: float = 60.0, baseline_rate_hz: float = 100.0, warm_up_s: float = 10.0,
                 hold_s: float = 0.1, settle_s: float = 0.05) -> None:
        if not (math.isfinite(rate_hz) and rate_hz > 0):
            raise ValueError(f"rate_hz must be a positive sample rate in Hz, got {rate_hz!r}")
        if isinstance(n_channels, bool) or not isinstance(n_channels, (int, np.integer)) or n_channels < 1:
            raise ValueError(f"n_channels must be a whole number of at least 1, got {n_channels!r}")
        if not end_sd < threshold_sd:
            raise ValueError(f"end_sd ({end_sd}) must lie below threshold_sd ({threshold_sd})")
        if not 1 <= min_channels <= n_channels:
            raise ValueError(f"min_channels must lie in 1..{n_channels} (the LFP's channels), got {min_channels}")
        for name, value in (("min_duration_s", min_duration_s), ("hold_s", hold_s), ("settle_s", settle_s)):
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be a finite number of seconds >= 0, got {value!r}")
        if not (0 < baseline_rate_hz <= rate_hz and 0 < warm_up_s <= baseline_window_s):
            raise ValueError("the baseline needs 0 < baseline_rate_hz <= rate_hz and 0 < warm_up_s <= "
                             f"baseline_window_s; got {baseline_rate_hz}, {warm_up_s}, {baseline_window_s}")
        self.rate_hz = float(rate_hz)
        self.n_channels = int(n_channels)
        self.threshold_sd = float(threshold_sd)
        self.end_sd = float(end_sd)
        self.min_channels = int(min_channels)
        self.channel_sd = float(channel_sd)
        self.band = RippleBand(self.rate_hz, self.n_channels, band_hz, filter_order)
        centre_rad = math.pi * (band_hz[0] + band_hz[1]) / self.rate_hz
        self._inv_two_sin = 1.0 / (2.0 * math.sin(centre_rad))
        self._min_samples = int(round(min_duration_s * self.rate_hz))
        self._hold_samples = int(round(hold_s * self.rate_hz))
        self._settle_samples = int(round(settle_s * self.rate_hz))
        self._stride = max(1, int(round(self.rate_hz / baseline_rate_hz)))
        # Channel-major, so that one channel's history is contiguous for its median.
        self._buffer = np.zeros((self.n_channels, max(2, int(baseline_window_s * self.rate_hz / self._stride))))
        self._warm_up_rows = max(2, int(warm_up_s * self.rate_hz / self._stride))
        self.centre_ = np.zeros(self.n_channels)
        self.spread_ = np.full(self.n_channels, np.inf)
        self._inv_spread = np.zeros(self.n_channels)
        self.ready_ = False
        self.n_detections_ = 0
        self.trace_ = EnvelopeTrace()
        self._rows = 0          # baseline rows written so far (the ring's head is rows % capacity)
        self._refresh_channel = 0
        self._tail = np.zeros((2, self.n_channels))
        self._index = 0         # samples taken since the start or the last gap
        self._quiet_until = self._settle_samples
        self._held_until = 0    # envelope samples before this stay out of the baseline (after an event)
        self._run_start = -1    # first sample of the current run above threshold; -1 for none
        self._run_onset_s = math.nan
        self._in_event = False
        self._peak = -math.inf

    # -- the one entry point ---------------------------------------------------------------

    def process(self, t_s: float, samples_uv: np.ndarray) -> list[RippleDetection | RippleOffset]:
        """Take the next chunk; return the ripples it completed and the ends of those it saw end, in time order.

        Parameters
        ----------
        t_s : float
            Data time of the chunk's first sample.
        samples_uv : ndarray of float64, shape (n_samples, n_channels)
            Sample-major, in µV, following the previous chunk without a gap
            (after a gap call :meth:`restart` first).

        Returns
        -------
        list of RippleDetection and RippleOffset
            Each detection is followed, in this chunk or a later one, by its
            offset (unless a :meth:`restart` comes first).
        """
        n = samples_uv.shape[0]
        y = np.empty_like(samples_uv)
        env = np.empty_like(samples_uv)
        z = np.empty(n)
        band = self.band
        ripple_chunk(samples_uv, band.sos_, band.zi_, self._tail, self._inv_two_sin, self.centre_, self._inv_spread,
                     y, env, z)
        first = self._index
        self._index += n
        end_s = t_s + n / self.rate_hz
        out: list[RippleDetection | RippleOffset] = []
        if self.ready_:
            out = self._events(t_s, first, z, env, end_s)
            self.trace_.add(t_s, z, self.rate_hz)
        self._learn(first, env, z)
        return out

    def restart(self) -> None:
        """The signal broke off (a gap, a restarted source): start the filter afresh and let it settle."""
        self.band.reset()
        self._tail[...] = 0.0
        self._index = 0
        self._quiet_until = self._settle_samples
        self._held_until = 0
        self._run_start = -1
        self._in_event = False

    @property
    def threshold_uv(self) -> np.ndarray:
        """Each channel's envelope at the onset threshold (µV); inf before the baseline is ready."""
        return self.centre_ + self.threshold_sd * self.spread_

    # -- events --------------------------------------------------------------------------

    def _events(self, t_s: float, first: int, z: np.ndarray, env: np.ndarray,
                end_s: float) -> list[RippleDetection | RippleOffset]:
        out: list[RippleDetection | RippleOffset] = []
        thr = self.threshold_sd
        for i, zi in enumerate(z.tolist()):
            k = first + i
            if k < self._quiet_until:
                continue
            if self._in_event:
                self._peak = max(self._peak, zi)
                if zi < self.end_sd:
                    self._in_event = False
                    self._run_start = -1
                    self._held_until = k + self._hold_samples
                    out.append(RippleOffset(self._run_onset_s, t_s + (i - 1) / self.rate_hz, end_s, self._peak))
                continue
            if zi < thr:
                self._run_start = -1
                continue
            if self._run_start < 0:
                self._run_start = k
                # The envelope sample of chunk row i belongs to the sample before it.
                self._run_onset_s = t_s + (i - 1) / self.rate_hz
                self._peak = zi
            self._peak = max(self._peak, zi)
            if k - self._run_start < self._min_samples:
                continue
            above = int(np.count_nonzero((env[i] - self.centre_) * self._inv_spread >= self.channel_sd))
            if above < self.min_channels:
                continue
            self._in_event = True
            self.n_detections_ += 1
            out.append(RippleDetection(self._run_onset_s, end_s, end_s - self._run_onset_s, self._peak, above))
        return out

    # -- the baseline ----------------------------------------------------------------------

    def _learn(self, first: int, env: np.ndarray, z: np.ndarray) -> None:
        """Keep every stride-th envelope sample outside events; refresh one channel's baseline."""
        n = z.size
        k = first + np.arange(n)
        keep = (k % self._stride == 0) & (k >= self._quiet_until) & (k >= self._held_until)
        if self._in_event or self._run_start >= 0:
            keep[:] = False
        if self.ready_:
            keep &= z < self.threshold_sd
        if not keep.any():
            return
        cap = self._buffer.shape[1]
        for row in env[keep]:
            self._buffer[:, self._rows % cap] = row
            self._rows += 1
        if not self.ready_:
            if self._rows >= self._warm_up_rows:
                for c in range(self.n_channels):
                    self._refresh(c)
                self.ready_ = True
            return
        # One channel per new baseline row: the cost of a median spread evenly over the chunks.
        self._refresh(self._refresh_channel)
        self._refresh_channel = (self._refresh_channel + 1) % self.n_channels

    def _refresh(self, c: int) -> None:
        centre, mad = median_and_mad(self._buffer[c, : min(self._rows, self._buffer.shape[1])])
        spread = MAD_TO_SD * mad
        self.centre_[c] = centre
        self.spread_[c] = spread
        self._inv_spread[c] = 1.0 / spread if spread > 0 else 0.0
