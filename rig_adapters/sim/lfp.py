"""A simulated local field potential: 1/f background, theta while running, sharp-wave ripples at rest.

:class:`LfpSynth` makes the continuously sampled signals of a few recording
channels, block by block with its state carried over, so that a session of
any length never holds whole-session arrays and the blocks join without a
seam. It is pure and seeded, like the rest of the simulated rig.

What the signal holds (typical values are common practice for a rat's CA1
recorded with tetrodes or a silicon probe; the figures are from memory):

* a 1/f background: a sum of first-order autoregressive processes whose
  corner frequencies are spread evenly in log frequency from 0.5 Hz to
  ``background_top_hz``, each with the same variance, which gives a spectrum
  falling as 1/f between the corners and as 1/f^2 above them, then a
  first-order low-pass at ``background_rolloff_hz`` (the steeper fall of
  hippocampal LFP power at high frequencies); part of it is shared by every channel
  (nearby electrodes see the same field), the rest is each channel's own;
* amplifier noise, white, each channel's own;
* theta (about 8 Hz) whose amplitude follows running: full above
  ``theta_speed_cm_s``, none at rest;
* sharp-wave ripples while the animal rests (slower than ``rest_speed_cm_s``
  for at least ``rest_settle_s``; a rest ends once the speed has stayed at
  or above it for ``rest_break_s``, so that the wander of a resting animal's
  tracked position does not cut it short): a Poisson train at ``ripple_rate_hz``
  with a least interval between ripples; each ripple is an oscillation at a
  frequency drawn from ``ripple_hz`` under a Gaussian envelope that rises
  smoothly (no step), lasting ``ripple_duration_s`` (taken as 5 s.d. of the
  envelope), seen on every channel with a channel's own gain.

The ripples' times are the ground truth a benchmark scores detections
against (:attr:`LfpSynth.ripples`).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from scipy import signal

from rig_adapters.sim.table_keys import known_keys

#: Autoregressive processes summed into the 1/f background.
_BACKGROUND_POLES = 8
#: A ripple's envelope is cut at this many s.d. either side of its peak.
_ENVELOPE_HALF_WIDTH_SD = 2.5


@dataclass(frozen=True)
class LfpSettings:
    """What the simulated LFP draws from: the ``[simulation.lfp]`` table.

    Ranges are ``(low, high)`` pairs drawn uniformly for each ripple.
    """

    #: Sample rate (Hz); acquisition systems deliver LFP at 1-2 kHz (common practice).
    rate_hz: float = 1500.0
    #: Number of channels.
    n_channels: int = 8
    #: Length of one LFP message (s); an acquisition system sends a few ms at a time.
    chunk_s: float = 0.002
    #: Sample format on the wire: "int16" (with ``uv_per_count``) or "float32" (µV).
    sample_format: str = "int16"
    #: µV per count of an int16 sample.
    uv_per_count: float = 0.195
    #: RMS of the 1/f background (µV); hundreds of µV in CA1.
    background_uv: float = 150.0
    #: Highest corner frequency of the background (Hz): above it the spectrum falls as 1/f^2.
    background_top_hz: float = 20.0
    #: Corner of the background's final low-pass (Hz).
    background_rolloff_hz: float = 100.0
    #: Share of the background's variance that every channel sees alike, 0..1.
    shared_fraction: float = 0.6
    #: RMS of each channel's white amplifier noise (µV).
    noise_uv: float = 4.0
    #: Peak amplitude of theta while running (µV).
    theta_uv: float = 120.0
    #: Frequency of theta (Hz).
    theta_hz: float = 8.0
    #: Speed at and above which theta is at full amplitude (cm/s).
    theta_speed_cm_s: float = 10.0
    #: Below this speed the animal rests (cm/s); ripples come only at rest.
    rest_speed_cm_s: float = 2.0
    #: Rest must have lasted this long before the first ripple (s).
    rest_settle_s: float = 0.5
    #: A rest ends when the speed has stayed at or above rest_speed_cm_s this long (s): immobility
    #: is speed below a few cm/s for some hundreds of ms, brief excursions merged (common practice),
    #: so the jitter of a resting animal's measured speed neither ends a rest nor restarts its ripple
    #: train; no ripple begins during an excursion. 0 ends a rest at the first faster sample.
    rest_break_s: float = 0.5
    #: Mean rate of ripples at rest (Hz); about 0.5-2 Hz in quiet rest.
    ripple_rate_hz: float = 0.8
    #: Least time from the end of one ripple to the start of the next (s).
    ripple_gap_s: float = 0.2
    #: Oscillation frequency of a ripple (Hz); 150-250 Hz.
    ripple_hz: tuple[float, float] = (160.0, 220.0)
    #: Duration of a ripple (s); 30-100 ms.
    ripple_duration_s: tuple[float, float] = (0.03, 0.1)
    #: Peak envelope of a ripple (µV) on a channel of gain 1.
    ripple_uv: tuple[float, float] = (100.0, 220.0)
    #: Each channel's gain on the ripple, drawn once per channel.
    channel_gain: tuple[float, float] = (0.6, 1.2)

    _RANGES = ("ripple_hz", "ripple_duration_s", "ripple_uv", "channel_gain")

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name in self._RANGES:
                try:
                    low, high = (float(v) for v in value)
                except (TypeError, ValueError):
                    raise ValueError(f"lfp.{f.name} must be a pair [low, high], got {value!r}") from None
                if not (0 < low <= high < math.inf):
                    raise ValueError(f"lfp.{f.name} must be a pair 0 < low <= high, got {value!r}")
                object.__setattr__(self, f.name, (low, high))
            elif f.name == "sample_format":
                if value not in ("int16", "float32"):
                    raise ValueError(f"lfp.sample_format must be 'int16' or 'float32', got {value!r}")
            elif f.name == "n_channels":
                if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 256:
                    raise ValueError(f"lfp.n_channels must be a whole number from 1 to 256, got {value!r}")
            else:
                if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                    raise ValueError(f"lfp.{f.name} must be a finite number, got {value!r}")
                if value < 0:
                    raise ValueError(f"lfp.{f.name} must be >= 0, got {value!r}")
                object.__setattr__(self, f.name, float(value))
        if self.rate_hz < 2.5 * self.ripple_hz[1]:
            raise ValueError(f"lfp.rate_hz ({self.rate_hz}) must be at least 2.5 times the top ripple frequency")
        if not 0 < self.chunk_s <= 0.05 or abs(self.chunk_s * self.rate_hz - round(self.chunk_s * self.rate_hz)) > 1e-6:
            raise ValueError(f"lfp.chunk_s ({self.chunk_s}) must be a whole number of samples, at most 50 ms")
        if not 0 <= self.shared_fraction <= 1:
            raise ValueError(f"lfp.shared_fraction must lie in [0, 1], got {self.shared_fraction}")
        if self.uv_per_count <= 0:
            raise ValueError(f"lfp.uv_per_count must be positive, got {self.uv_per_count}")

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> LfpSettings:
        """Settings from a ``[simulation.lfp]`` table; missing keys take their defaults."""
        return cls(**known_keys(cls, d, "simulation.lfp"))

    @property
    def samples_per_chunk(self) -> int:
        return int(round(self.chunk_s * self.rate_hz))


class Ripple(NamedTuple):
    """One simulated ripple: the ground truth.

    ``start_s`` and ``end_s`` bound the envelope (±2.5 s.d. around ``peak_s``).
    """

    start_s: float
    peak_s: float
    end_s: float
    freq_hz: float
    peak_uv: float


class LfpSynth:
    """The simulated LFP of one session, made block by block.

    Parameters
    ----------
    settings : LfpSettings
    seed : int or sequence of int
        Seed of its own generator (independent of the spikes' generator, so
        that turning the LFP on changes nothing else in a simulated session).

    Attributes
    ----------
    ripples : list of Ripple
        Every ripple drawn so far, in time order.
    channel_gain : ndarray, shape (n_channels,)
    """

    def __init__(self, settings: LfpSettings, seed: Any) -> None:
        self.settings = s = settings
        self._rng = np.random.default_rng(seed)
        self.ripples: list[Ripple] = []
        self.channel_gain = self._rng.uniform(*s.channel_gain, s.n_channels)
        nyquist = s.rate_hz / 2
        corners = np.geomspace(0.5, min(s.background_top_hz, 0.9 * nyquist), _BACKGROUND_POLES)
        self._poles = np.exp(-2 * np.pi * corners / s.rate_hz)
        # Each AR(1) process gets unit variance: innovations of s.d. sqrt(1 - a^2).
        self._innovation_sd = np.sqrt(1 - self._poles**2) * s.background_uv / math.sqrt(_BACKGROUND_POLES)
        self._state = np.zeros((_BACKGROUND_POLES, 1 + s.n_channels))  # lfilter's state; column 0: the shared part
        self._rolloff = math.exp(-2 * np.pi * s.background_rolloff_hz / s.rate_hz)
        self._rolloff_state = np.zeros((1, 1 + s.n_channels))
        self._n = 0
        # Not resting yet: the first sample below rest_speed_cm_s starts a rest, so that a session that
        # begins at rest draws ripples from its start, not only after the first run.
        self._rest_since_s = math.inf
        self._moving_since_s = math.inf
        self._next_ripple_s = math.inf
        self._theta_phase = 0.0

    def block(self, speed_cm_s: np.ndarray) -> np.ndarray:
        """The next ``speed_cm_s.size`` samples of every channel, in µV.

        Parameters
        ----------
        speed_cm_s : ndarray of float, shape (n,)
            The animal's speed at each sample.

        Returns
        -------
        ndarray of float64, shape (n, n_channels), sample-major
        """
        s = self.settings
        n = speed_cm_s.size
        t = (self._n + np.arange(n)) / s.rate_hz
        out = self._background(n)
        theta_gain = np.clip(speed_cm_s / s.theta_speed_cm_s, 0.0, 1.0)
        phase = self._theta_phase + 2 * np.pi * s.theta_hz * np.arange(1, n + 1) / s.rate_hz
        out += (s.theta_uv * theta_gain * np.cos(phase))[:, None]
        self._theta_phase = float(phase[-1] % (2 * np.pi)) if n else self._theta_phase
        self._draw_ripples(t, speed_cm_s)
        ripple = np.zeros(n)
        for r in self._ripples_within(t[0], t[-1]) if n else ():
            sd = (r.end_s - r.start_s) / (2 * _ENVELOPE_HALF_WIDTH_SD)
            inside = (t >= r.start_s) & (t <= r.end_s)
            tt = t[inside]
            ripple[inside] += r.peak_uv * np.exp(-0.5 * ((tt - r.peak_s) / sd) ** 2) * np.sin(
                2 * np.pi * r.freq_hz * (tt - r.start_s))
        out += ripple[:, None] * self.channel_gain[None, :]
        self._n += n
        return out

    def _background(self, n: int) -> np.ndarray:
        s = self.settings
        shared, own = math.sqrt(s.shared_fraction), math.sqrt(1 - s.shared_fraction)
        innovations = self._rng.standard_normal((n, 1 + s.n_channels))
        total = np.zeros((n, 1 + s.n_channels))
        for i, a in enumerate(self._poles):
            y, self._state[i] = signal.lfilter([self._innovation_sd[i]], [1.0, -a], innovations, axis=0,
                                               zi=self._state[i][None, :])
            total += y
        a = self._rolloff
        total, self._rolloff_state = signal.lfilter([1 - a], [1.0, -a], total, axis=0, zi=self._rolloff_state)
        out = shared * total[:, :1] + own * total[:, 1:]
        out += s.noise_uv * self._rng.standard_normal((n, s.n_channels))
        return out

    def _draw_ripples(self, t: np.ndarray, speed_cm_s: np.ndarray) -> None:
        """Extend the ripple train over the block's samples, at rest only."""
        s = self.settings
        for ti, v in zip(t.tolist(), speed_cm_s.tolist()):
            if not v < s.rest_speed_cm_s:
                if self._moving_since_s == math.inf:
                    self._moving_since_s = ti
                if ti - self._moving_since_s >= s.rest_break_s:
                    self._rest_since_s = math.inf
                    self._next_ripple_s = math.inf
                continue
            self._moving_since_s = math.inf
            if self._rest_since_s == math.inf:
                self._rest_since_s = ti
                self._next_ripple_s = ti + s.rest_settle_s + self._rng.exponential(1 / s.ripple_rate_hz)
            if ti >= self._next_ripple_s:
                duration = self._rng.uniform(*s.ripple_duration_s)
                sd = duration / (2 * _ENVELOPE_HALF_WIDTH_SD)
                start = ti
                peak = start + _ENVELOPE_HALF_WIDTH_SD * sd
                self.ripples.append(Ripple(start, peak, start + duration, self._rng.uniform(*s.ripple_hz),
                                           self._rng.uniform(*s.ripple_uv)))
                self._next_ripple_s = start + duration + s.ripple_gap_s + self._rng.exponential(1 / s.ripple_rate_hz)

    def _ripples_within(self, t0: float, t1: float) -> list[Ripple]:
        out = []
        for r in reversed(self.ripples):
            if r.end_s < t0 - 1.0:
                break
            if r.start_s <= t1 and r.end_s >= t0:
                out.append(r)
        return out
