"""Waveform marks for the simulated rig: each unit on a tetrode, with its own amplitudes.

The simulated units already carry their tetrode in their id (``100 *
tetrode + k``, :mod:`rig_adapters.sim.cells`). Here every unit gets a mean
peak amplitude on each of its tetrode's channels (largest on one channel,
smaller on the others, as a cell closer to one wire), and every spike that
mean, scaled by an optional slow drift, plus independent Gaussian noise per
channel. A fraction of the units is small: amplitudes just above the
detection threshold, where their clusters overlap each other and the noise,
so that a sorter would discard them, though they are place cells like the
rest. Each tetrode also picks up multi-unit activity from cells further
away: low-amplitude spikes at a constant rate. A spike is detected when its
largest amplitude crosses the threshold; the others are never sent.

The ``[simulation.marks]`` table (all invented settings of our own) turns
this on; its random generator is its own, seeded from the session's seed, so
that a session without marks is unchanged by this module.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from rig_adapters.sim.table_keys import known_keys

#: Unit id of a multi-unit spike of tetrode ``g`` on the ground-truth side: ``MUA_ID - g`` (never on the wire).
MUA_ID = -1


@dataclass(frozen=True)
class MarkSimulation:
    """The ``[simulation.marks]`` table: how the simulated tetrodes see their units."""

    #: What the spike source sends: "marks" (marked spikes only) or "both" (also the
    #: sorted units a sorter would keep, as spike batches).
    send: str = "marks"
    #: Channels of every tetrode.
    channels: int = 4
    #: Largest mean amplitude of a well-isolated unit, on its best channel (uV), a range.
    amplitude_uv: tuple[float, float] = (90.0, 260.0)
    #: Fraction of each other channel's amplitude relative to the best one, a range.
    other_channel_fraction: tuple[float, float] = (0.2, 0.8)
    #: Fraction of the units that are small, near the threshold (sorting discards them).
    small_fraction: float = 0.35
    #: Best-channel mean amplitude of a small unit (uV), a range.
    small_amplitude_uv: tuple[float, float] = (45.0, 75.0)
    #: S.d. of the per-spike, per-channel amplitude noise (uV).
    noise_uv: float = 10.0
    #: Detection threshold on the largest channel (uV).
    threshold_uv: float = 40.0
    #: Rate of low-amplitude multi-unit spikes per tetrode (Hz).
    mua_rate_hz: float = 30.0
    #: Best-channel amplitude of the multi-unit spikes (uV), a range.
    mua_amplitude_uv: tuple[float, float] = (40.0, 60.0)
    #: Relative change of every unit's amplitudes per hour (0 = none); e.g. -0.1 shrinks them by 10% an hour.
    drift_per_hour: float = 0.0

    def __post_init__(self) -> None:
        if self.send not in ("marks", "both"):
            raise ValueError(f"marks.send must be 'marks' or 'both', got {self.send!r}")
        if not isinstance(self.channels, int) or not 1 <= self.channels <= 64:
            raise ValueError(f"marks.channels must be an integer from 1 to 64, got {self.channels!r}")
        for name in ("amplitude_uv", "other_channel_fraction", "small_amplitude_uv", "mua_amplitude_uv"):
            low, high = (float(v) for v in getattr(self, name))
            if not (0 <= low <= high and math.isfinite(high)):
                raise ValueError(f"marks.{name} must be a pair [low, high] with 0 <= low <= high")
            object.__setattr__(self, name, (low, high))
        for name in ("small_fraction", "noise_uv", "threshold_uv", "mua_rate_hz"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
                raise ValueError(f"marks.{name} must be a finite number >= 0, got {value!r}")
        if not self.small_fraction <= 1:
            raise ValueError(f"marks.small_fraction must be within 0..1, got {self.small_fraction}")

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> MarkSimulation | None:
        """The table's settings, or None for an empty or missing table; ValueError names a bad key."""
        if not d:
            return None
        return cls(**known_keys(cls, d, "simulation.marks"))


class Tetrodes:
    """The marks of the simulated units' spikes, chunk after chunk.

    Parameters
    ----------
    settings : MarkSimulation
    unit_ids : ndarray of int64, shape (n_units,)
        The simulated units; the tetrode of unit ``u`` is ``u // 100``.
    seed : int
        The session's seed; the marks draw from a generator of their own.
    """

    def __init__(self, settings: MarkSimulation, unit_ids: np.ndarray, seed: int) -> None:
        self.settings = s = settings
        self._rng = rng = np.random.default_rng((seed, 13))
        self.unit_ids = np.asarray(unit_ids, np.int64)
        self.unit_group = self.unit_ids // 100
        self.group_ids = np.unique(self.unit_group)
        n, c = self.unit_ids.size, s.channels
        self.small = rng.random(n) < s.small_fraction
        best = np.where(self.small, rng.uniform(*s.small_amplitude_uv, n), rng.uniform(*s.amplitude_uv, n))
        fraction = rng.uniform(*s.other_channel_fraction, (n, c))
        fraction[np.arange(n), rng.integers(0, c, n)] = 1.0
        self.mean_uv = best[:, None] * fraction
        self._row = {int(u): i for i, u in enumerate(self.unit_ids.tolist())}

    @property
    def sorted_unit_ids(self) -> np.ndarray:
        """The units a sorter would keep: every unit but the small ones."""
        return self.unit_ids[~self.small]

    def with_multi_unit(self, t_s: np.ndarray, unit_ids: np.ndarray, t0_s: float, t1_s: float) -> tuple[np.ndarray, np.ndarray]:
        """The chunk's spikes with each tetrode's multi-unit spikes in ``[t0_s, t1_s)`` merged in, in time order.

        Multi-unit spikes of tetrode ``g`` get the id ``MUA_ID - g`` (negative: no unit).
        """
        s, rng = self.settings, self._rng
        if s.mua_rate_hz == 0 or t1_s <= t0_s:
            return t_s, unit_ids
        counts = rng.poisson(s.mua_rate_hz * (t1_s - t0_s), self.group_ids.size)
        extra_t = rng.uniform(t0_s, t1_s, counts.sum())
        extra_u = np.repeat(MUA_ID - self.group_ids, counts)
        t = np.concatenate([t_s, extra_t])
        u = np.concatenate([unit_ids, extra_u])
        order = np.argsort(t, kind="stable")
        return t[order], u[order]

    def marks(self, t_s: np.ndarray, unit_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Detected spikes of a batch: times, tetrodes, marks (float32 uV, shape (n, channels)) and true unit ids."""
        s, rng = self.settings, self._rng
        n, c = unit_ids.size, s.channels
        mua = unit_ids < 0
        rows = np.array([self._row.get(u, 0) for u in unit_ids.tolist()], np.int64)
        mean = self.mean_uv[rows]
        if mua.any():
            k = int(mua.sum())
            best = rng.uniform(*s.mua_amplitude_uv, k)
            fraction = rng.uniform(*s.other_channel_fraction, (k, c))
            fraction[np.arange(k), rng.integers(0, c, k)] = 1.0
            mean[mua] = best[:, None] * fraction
        drift = 1.0 + s.drift_per_hour * (t_s / 3600.0)
        marks = mean * np.where(mua, 1.0, drift)[:, None] + rng.normal(0.0, s.noise_uv, (n, c))
        groups = np.where(mua, MUA_ID - unit_ids, unit_ids // 100)
        seen = marks.max(axis=1, initial=-np.inf) >= s.threshold_uv if n else np.zeros(0, bool)
        return t_s[seen], groups[seen], marks[seen].astype(np.float32), unit_ids[seen]
