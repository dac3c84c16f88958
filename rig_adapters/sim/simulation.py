"""A simulated session: spikes, tracker frames and sync pulses from a generative model.

:class:`SimulatedSession` plays an invented animal in an environment from
``decoder.space.environments`` and yields the typed messages of ``decoder.messages``
that a real rig would send, in data-time order, one short chunk at a time so
that an hour-long session never holds whole-session arrays. It is pure: no
sockets, files or wall clock; everything random comes from one seeded
``numpy.random.Generator``, so a seed gives the same session every time.
``rig_adapters.sim.simulated_rig`` is the process that publishes it.

What the rig looks like
-----------------------
Three sources, each announced once at the start, each with its own sequence
numbers:

``"ephys"`` (kind ``spikes``, clock ``"acquisition"``, 30 kHz)
    Spike batches with times quantised to the sample clock, sync pulses, and
    heartbeats at the end of every chunk. Its clock is data time.
``"tracker"`` (kind ``tracker``, clock ``"camera"``)
    Noisy frames at ``tracker_rate_hz`` with lost frames and short dropouts,
    and the same sync pulses; all its times run on the camera's clock, which
    is offset and drifts against the acquisition clock, so the receiver must
    align the two from the sync pulses. Like a real camera it sends no
    heartbeats (its frames tell its progress, and the protocol asks
    heartbeats of spike sources only) unless ``position_heartbeats`` is set.
``"truth"`` (kind ``tracker``, clock ``"acquisition"``)
    The noise-free position, for scoring decoding errors and false triggers;
    never for decoding.

The animal forages in an open field (a velocity Ornstein-Uhlenbeck process
that slides along walls, with pauses) or runs laps on a linear track (pausing
at each end, where the reward is). The cells are place cells (Gaussian
fields), grid cells (the cosine model) and non-spatial cells, firing as
inhomogeneous Poisson processes with a dead time.
"""

from __future__ import annotations

import dataclasses
import heapq
import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from decoder.space.environments import Arena, Environment, LinearTrack
from decoder.messages import Heartbeat, InputMessage, SourceAnnounce, SpikeBatch, SyncPulse, TrackerFrames

SPIKE_SOURCE = "ephys"
TRACKER_SOURCE = "tracker"
TRUTH_SOURCE = "truth"
ACQUISITION_CLOCK = "acquisition"
TRACKER_CLOCK = "camera"

#: Quality of every frame the tracker did not lose, on the 0..255 scale.
FRAME_QUALITY = 200

#: Gain ``a`` and threshold ``b`` of the exponential transfer function of the
#: grid-cell cosine model (Solstad, Moser & Einevoll 2006; values from memory).
_GRID_GAIN = 0.3
_GRID_THRESHOLD = -1.5

#: Time constant with which the animal comes to a halt at the start of a pause (s).
_STOP_TAU_S = 0.15

#: Time constant of turning away from a wall when touching it (s); farther
#: inside the wall margin the turn is proportionally slower.
_TURN_TAU_S = 0.2

#: Longest step of the motion integrator (s); chunks are cut into steps this short or shorter.
_MOTION_STEP_S = 0.01

CELL_TYPES = ("place", "grid", "nonspatial")


def _fwhm_to_sigma(fwhm: float) -> float:
    return fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))


@dataclass(frozen=True)
class SimulationSettings:
    """Everything the simulated rig draws from, read from a ``[simulation]`` table.

    Ranges are ``(low, high)`` pairs; each cell, pause or lap draws its value
    uniformly from its range. Defaults follow common practice for a mouse or
    rat in a standard recording; where a figure is recalled from memory the
    comment says so.
    """

    #: Length of one generated chunk, and the interval between heartbeats (s).
    tick_s: float = 0.02
    #: Whether the tracker and the truth stream also send a heartbeat at the end of every chunk.
    #: The protocol asks heartbeats of spike sources only and placeloop ignores the others, so a
    #: real tracker sends none; they are here to measure a rig that sends them anyway.
    position_heartbeats: bool = False
    #: Mean running speed (cm/s); 15-25 cm/s for a foraging mouse or rat (common practice).
    mean_speed_cm_s: float = 20.0
    #: Correlation time of the running velocity in an open field (s).
    velocity_tau_s: float = 1.0
    #: Distance from a wall within which the animal turns to run along it (cm).
    wall_margin_cm: float = 8.0
    #: Closest the tracked point comes to a wall (cm): about half a body width.
    min_wall_distance_cm: float = 2.0
    #: Mean time between pauses while foraging in an open field (s).
    pause_interval_s: float = 20.0
    #: Duration of a pause in an open field (s), a range.
    pause_duration_s: tuple[float, float] = (1.0, 4.0)
    #: Duration of the stop at each end of a linear track, where the reward is (s), a range.
    end_pause_s: tuple[float, float] = (2.0, 5.0)
    #: Distance from each end of a linear track at which the animal stops (cm).
    end_stop_cm: float = 5.0
    #: Lap-to-lap coefficient of variation of the running speed on a linear track.
    lap_speed_cv: float = 0.15
    #: Standard deviation of the sideways wander across a linear track (cm).
    track_lateral_sd_cm: float = 0.5
    #: Number of place cells.
    n_place_cells: int = 60
    #: Full width at half maximum of a place field (cm), a range; 15-35 cm is common practice.
    place_field_fwhm_cm: tuple[float, float] = (15.0, 35.0)
    #: In-field peak rate of a place cell (Hz), a range; 5-20 Hz is common practice.
    place_peak_hz: tuple[float, float] = (5.0, 20.0)
    #: Out-of-field rate of a place cell (Hz); about 0.1 Hz is common practice.
    place_baseline_hz: float = 0.1
    #: Number of grid cells.
    n_grid_cells: int = 10
    #: Distance between neighbouring grid vertices (cm), a range; 30-70 cm in dorsal entorhinal cortex (from memory).
    grid_spacing_cm: tuple[float, float] = (35.0, 70.0)
    #: Peak rate of a grid cell on a vertex (Hz), a range.
    grid_peak_hz: tuple[float, float] = (5.0, 15.0)
    #: Number of cells whose rate does not depend on position.
    n_nonspatial_cells: int = 10
    #: Constant rate of a non-spatial cell (Hz), a range.
    nonspatial_rate_hz: tuple[float, float] = (0.5, 5.0)
    #: Absolute refractory period (s); about 2 ms is common practice.
    refractory_s: float = 0.002
    #: Units sorted from one tetrode; unit ids are ``100 * tetrode + k``, k = 1, 2, ...
    units_per_tetrode: int = 5
    #: Sample rate of the acquisition clock (Hz); spike times are whole samples.
    acquisition_rate_hz: float = 30000.0
    #: Frame rate of the tracker (Hz), on the tracker's own clock.
    tracker_rate_hz: float = 50.0
    #: Reading of the tracker's clock when the acquisition clock reads 0 (s).
    tracker_offset_s: float = 0.25
    #: How much faster the tracker's clock runs than the acquisition clock (parts per million).
    tracker_drift_ppm: float = 30.0
    #: Standard deviation of the tracker's position noise on each axis (cm).
    tracker_noise_cm: float = 0.5
    #: Probability that the tracker loses any one frame.
    lost_frame_prob: float = 0.01
    #: Mean time between tracker dropouts, runs of lost frames (s).
    dropout_interval_s: float = 60.0
    #: Duration of a tracker dropout (s), a range.
    dropout_duration_s: tuple[float, float] = (0.1, 0.5)
    #: Interval between sync pulses (s), a range; drawn afresh for each pulse.
    sync_interval_s: tuple[float, float] = (0.8, 1.2)
    #: Standard deviation of the tracker's timestamp of a sync pulse on its TTL input (s).
    sync_jitter_s: float = 0.0001

    _RANGES: ClassVar[tuple[str, ...]] = (
        "pause_duration_s", "end_pause_s", "place_field_fwhm_cm", "place_peak_hz", "grid_spacing_cm",
        "grid_peak_hz", "nonspatial_rate_hz", "dropout_duration_s", "sync_interval_s",
    )
    _COUNTS: ClassVar[tuple[str, ...]] = ("n_place_cells", "n_grid_cells", "n_nonspatial_cells", "units_per_tetrode")
    _FLAGS: ClassVar[tuple[str, ...]] = ("position_heartbeats",)

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name in self._FLAGS:
                if not isinstance(value, bool):
                    raise ValueError(f"{f.name} must be true or false, got {value!r}")
            elif f.name in self._RANGES:
                object.__setattr__(self, f.name, self._read_range(f.name, value))
            elif f.name in self._COUNTS:
                if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
                    raise ValueError(f"{f.name} must be a whole number >= 0, got {value!r}")
                object.__setattr__(self, f.name, int(value))
            else:
                number = isinstance(value, (int, float, np.number)) and not isinstance(value, bool)
                if not number or not math.isfinite(value):
                    raise ValueError(f"{f.name} must be a finite number, got {value!r}")
                object.__setattr__(self, f.name, float(value))
        positive = ("tick_s", "mean_speed_cm_s", "velocity_tau_s", "wall_margin_cm", "pause_interval_s",
                    "acquisition_rate_hz", "tracker_rate_hz", "dropout_interval_s", "place_field_fwhm_cm",
                    "grid_spacing_cm", "sync_interval_s")
        for name in positive:
            low = getattr(self, name)[0] if name in self._RANGES else getattr(self, name)
            if not low > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)!r}")
        for name in ("min_wall_distance_cm", "end_stop_cm", "lap_speed_cv", "track_lateral_sd_cm",
                     "place_baseline_hz", "refractory_s", "tracker_offset_s", "tracker_noise_cm", "sync_jitter_s"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        if self.units_per_tetrode < 1 or self.units_per_tetrode > 99:
            raise ValueError(
                f"units_per_tetrode must be 1..99 (ids are 100 * tetrode + k), got {self.units_per_tetrode}"
            )
        if self.n_place_cells + self.n_grid_cells + self.n_nonspatial_cells == 0:
            raise ValueError(
                "the simulation needs at least one cell; set n_place_cells, n_grid_cells or n_nonspatial_cells"
            )
        if not 0.001 <= self.tick_s <= 1.0:
            raise ValueError(f"tick_s must lie between 0.001 and 1 s, got {self.tick_s}")
        if self.sync_interval_s[0] <= self.tick_s:
            raise ValueError(
                f"sync_interval_s must be longer than tick_s ({self.tick_s} s), got {self.sync_interval_s}"
            )
        if self.min_wall_distance_cm >= self.wall_margin_cm:
            raise ValueError(
                f"min_wall_distance_cm ({self.min_wall_distance_cm}) must be less than "
                f"wall_margin_cm ({self.wall_margin_cm})"
            )
        if not 0 <= self.lost_frame_prob < 1:
            raise ValueError(f"lost_frame_prob must lie in [0, 1), got {self.lost_frame_prob}")
        if abs(self.tracker_drift_ppm) >= 1000:
            raise ValueError(f"tracker_drift_ppm must be within +-1000 ppm, got {self.tracker_drift_ppm}")
        if self.refractory_s >= 0.1:
            raise ValueError(f"refractory_s must be below 0.1 s, got {self.refractory_s}")
        samples = self.tick_s * self.acquisition_rate_hz
        if abs(samples - round(samples)) > 1e-6:
            raise ValueError(
                f"tick_s ({self.tick_s}) must be a whole number of acquisition samples at {self.acquisition_rate_hz} Hz"
            )

    @staticmethod
    def _read_range(name: str, value: Any) -> tuple[float, float]:
        try:
            low, high = (float(v) for v in value)
        except (TypeError, ValueError):
            raise ValueError(f"{name} must be a pair [low, high] of numbers, got {value!r}") from None
        if not (math.isfinite(low) and math.isfinite(high)) or low < 0 or low > high:
            raise ValueError(f"{name} must be a pair [low, high] with 0 <= low <= high, got {value!r}")
        return (low, high)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> SimulationSettings:
        """Build settings from a ``[simulation]`` table; missing keys take their defaults.

        Raises
        ------
        ValueError
            For an unknown key (most often a typo) or a bad value, naming it.
        """
        d = dict(d or {})
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise ValueError(f"[simulation] has unknown key(s) {unknown}; known keys are {sorted(names)}")
        try:
            return cls(**d)
        except ValueError as exc:
            raise ValueError(f"[simulation] {exc}") from None

    @property
    def samples_per_tick(self) -> int:
        """Acquisition samples in one tick."""
        return int(round(self.tick_s * self.acquisition_rate_hz))


def _frozen(arr: np.ndarray) -> np.ndarray:
    arr = np.ascontiguousarray(arr)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class GroundTruth:
    """The simulated cells and clocks, for tests and scoring.

    Attributes
    ----------
    unit_ids : ndarray of int64, shape (n_units,)
        Ids on the wire, in the order of every per-unit array here.
    cell_type : tuple of str, length n_units
        ``"place"``, ``"grid"`` or ``"nonspatial"``.
    field_center_cm : ndarray of float64, shape (n_units, 2)
        Place-field centre; NaN for other cells.
    field_sigma_cm : ndarray of float64, shape (n_units,)
        Standard deviation of the Gaussian place field; NaN for other cells.
    peak_rate_hz : ndarray of float64, shape (n_units,)
        Place cell: in-field peak above baseline; grid cell: rate on a vertex;
        non-spatial cell: its constant rate.
    baseline_rate_hz : ndarray of float64, shape (n_units,)
        Rate far from a place field; 0 for other cells.
    grid_spacing_cm, grid_orientation_rad : ndarray of float64, shape (n_units,)
        Vertex spacing and lattice orientation of a grid cell; NaN for others.
    grid_phase_cm : ndarray of float64, shape (n_units, 2)
        Position of one vertex of a grid cell; NaN for others.
    tracker_offset_s, tracker_drift_ppm : float
        ``t_tracker = tracker_offset_s + t_acquisition * (1 + tracker_drift_ppm * 1e-6)``.
    """

    unit_ids: np.ndarray
    cell_type: tuple[str, ...]
    field_center_cm: np.ndarray
    field_sigma_cm: np.ndarray
    peak_rate_hz: np.ndarray
    baseline_rate_hz: np.ndarray
    grid_spacing_cm: np.ndarray
    grid_orientation_rad: np.ndarray
    grid_phase_cm: np.ndarray
    tracker_offset_s: float
    tracker_drift_ppm: float
    _type_code: np.ndarray = dataclasses.field(init=False, repr=False)

    def __post_init__(self) -> None:
        codes = np.array([CELL_TYPES.index(t) for t in self.cell_type], np.int64)
        object.__setattr__(self, "_type_code", _frozen(codes))

    @property
    def n_units(self) -> int:
        return int(self.unit_ids.size)

    def rate_hz(self, xy_cm: np.ndarray) -> np.ndarray:
        """Firing rate of every cell at each position.

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of float64, shape (n_units, n)

        Examples
        --------
        Rate maps on an environment's bins: ``truth.rate_hz(env.bin_centers_cm)``.
        """
        xy = np.asarray(xy_cm, dtype=np.float64)
        if xy.ndim != 2 or xy.shape[1] != 2:
            raise ValueError(f"xy_cm must have shape (n, 2), got {xy.shape}")
        rows = np.repeat(np.arange(self.n_units), len(xy))
        return _rate_of_pairs(self, rows, np.tile(xy, (self.n_units, 1))).reshape(self.n_units, len(xy))

    def tracker_time_s(self, t_acquisition_s: np.ndarray | float) -> np.ndarray:
        """The tracker clock's reading at acquisition time(s) ``t_acquisition_s``."""
        return self.tracker_offset_s + np.asarray(t_acquisition_s, np.float64) * (1.0 + self.tracker_drift_ppm * 1e-6)


def _grid_wave_vectors(spacing_cm: np.ndarray, orientation_rad: np.ndarray) -> np.ndarray:
    """Wave vectors of the three plane waves of the cosine model, shape (n, 3, 2).

    Directions -30°, 30° and 90° from the lattice orientation, magnitude
    4π / (√3 λ), so that the vertices lie ``λ`` apart along the orientation
    and at 60° and 120° from it.

    References
    ----------
    Solstad T, Moser EI, Einevoll GT (2006) From grid cells to place cells:
    a mathematical model. Hippocampus 16:1026-1031.
    """
    angles = orientation_rad[:, None] + np.deg2rad([-30.0, 30.0, 90.0])[None, :]
    magnitude = 4.0 * np.pi / (np.sqrt(3.0) * spacing_cm)
    return np.stack([np.cos(angles), np.sin(angles)], axis=-1) * magnitude[:, None, None]


def _rate_of_pairs(truth: GroundTruth, rows: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Rate (Hz) of cell ``rows[i]`` at position ``xy[i]``, shape (k,).

    Place cell: ``baseline + peak · exp(-|x - c|² / 2σ²)``. Grid cell: the
    cosine model, ``peak · (exp(a (s - b)) - 1) / (exp(a (3 - b)) - 1)`` with
    ``s`` the sum of the three cosines, which is 3 on a vertex and never below
    -3/2, where the rate is 0 (Solstad, Moser & Einevoll 2006, Hippocampus
    16:1026). Non-spatial cell: ``peak``.
    """
    rate = np.zeros(rows.size)
    kinds = truth._type_code[rows]
    place = kinds == 0
    if np.any(place):
        r = rows[place]
        d2 = np.sum((xy[place] - truth.field_center_cm[r]) ** 2, axis=1)
        bump = np.exp(-0.5 * d2 / truth.field_sigma_cm[r] ** 2)
        rate[place] = truth.baseline_rate_hz[r] + truth.peak_rate_hz[r] * bump
    grid = kinds == 1
    if np.any(grid):
        r = rows[grid]
        k = _grid_wave_vectors(truth.grid_spacing_cm[r], truth.grid_orientation_rad[r])
        rel = xy[grid] - truth.grid_phase_cm[r]
        s = np.cos(np.einsum("nkd,nd->nk", k, rel)).sum(axis=1)
        gain = (np.exp(_GRID_GAIN * (s - _GRID_THRESHOLD)) - 1.0) / (np.exp(_GRID_GAIN * (3.0 - _GRID_THRESHOLD)) - 1.0)
        rate[grid] = truth.peak_rate_hz[r] * np.maximum(gain, 0.0)
    flat = kinds == 2
    rate[flat] = truth.peak_rate_hz[rows[flat]]
    return rate


class _OpenField:
    """Foraging in an arena: a velocity Ornstein-Uhlenbeck process with pauses.

    Each velocity component relaxes with time constant ``velocity_tau_s``
    towards 0 under white noise scaled so that the stationary speed is
    Rayleigh-distributed with mean ``mean_speed_cm_s`` (mean = s·√(π/2) for
    component s.d. s). Within ``wall_margin_cm`` of a wall the velocity's
    component into the wall decays, the faster the closer the wall, so the
    animal turns to run along it as rodents do in an open field; a step that
    would still come closer than ``min_wall_distance_cm`` is put back onto
    that line.
    """

    def __init__(self, arena: Arena, settings: SimulationSettings, rng: np.random.Generator) -> None:
        ring = np.asarray(arena.outline_cm(), dtype=np.float64)
        self._arena = arena
        self._a = ring[:-1]
        self._ab = ring[1:] - ring[:-1]
        self._ab2 = np.sum(self._ab**2, axis=1)
        self._s = settings
        self._rng = rng
        self._sd = settings.mean_speed_cm_s / math.sqrt(math.pi / 2.0)
        self._pause_left_s = 0.0
        lo, hi = ring.min(axis=0), ring.max(axis=0)
        for _ in range(10_000):
            p = lo + (hi - lo) * rng.random(2)
            if self._inside(p) and self._nearest(p)[1] >= settings.wall_margin_cm:
                break
        else:
            raise ValueError(
                f"the arena has no point {settings.wall_margin_cm} cm from every wall; lower wall_margin_cm"
            )
        self.xy = p
        self._v = rng.normal(0.0, self._sd, 2)

    def _inside(self, p: np.ndarray) -> bool:
        return bool(self._arena.contains(p[None, :])[0])

    def _nearest(self, p: np.ndarray) -> tuple[np.ndarray, float, int]:
        """Nearest point on the outline, its distance (cm) and the index of its side."""
        t = np.clip(np.sum((p - self._a) * self._ab, axis=1) / self._ab2, 0.0, 1.0)
        q = self._a + t[:, None] * self._ab
        d2 = np.sum((q - p) ** 2, axis=1)
        i = int(np.argmin(d2))
        return q[i], math.sqrt(d2[i]), i

    def _inward(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """Nearest wall point, unit normal pointing into the arena, signed distance (cm)."""
        q, d, side = self._nearest(p)
        if d == 0.0:
            # On the wall itself there is no direction from it: use the side's normal.
            n = np.array([-self._ab[side, 1], self._ab[side, 0]]) / math.sqrt(self._ab2[side])
            return q, (n if self._inside(q + 1e-6 * n) else -n), 0.0
        n = (p - q) / d
        if self._inside(p):
            return q, n, d
        return q, -n, -d

    def step(self, dt: float) -> np.ndarray:
        s, rng = self._s, self._rng
        if self._pause_left_s > 0:
            self._pause_left_s -= dt
            self._v = self._v * math.exp(-dt / _STOP_TAU_S)
        elif rng.random() < dt / s.pause_interval_s:
            self._pause_left_s = rng.uniform(*s.pause_duration_s)
        else:
            decay = math.exp(-dt / s.velocity_tau_s)
            self._v = self._v * decay + self._sd * math.sqrt(1.0 - decay * decay) * rng.normal(0.0, 1.0, 2)
        _, n, d = self._inward(self.xy)
        into_wall = float(self._v @ n)
        if d < s.wall_margin_cm and into_wall < 0:
            closeness = 1.0 - max(d - s.min_wall_distance_cm, 0.0) / (s.wall_margin_cm - s.min_wall_distance_cm)
            self._v = self._v - (1.0 - math.exp(-dt * closeness / _TURN_TAU_S)) * into_wall * n
        new = self.xy + self._v * dt
        q, n, d = self._inward(new)
        if d < s.min_wall_distance_cm:
            new = q + n * s.min_wall_distance_cm
            self._v = self._v - min(float(self._v @ n), 0.0) * n
        self.xy = new
        return new


class _LinearLaps:
    """Laps on a linear track: run end to end, stop at each end for the reward.

    A run covers the track between the two stopping points with a half-sine
    speed profile (smooth start and stop) whose mean is the lap's speed,
    drawn around ``mean_speed_cm_s``; a small Ornstein-Uhlenbeck wander moves
    the animal across the track.
    """

    def __init__(self, track: LinearTrack, settings: SimulationSettings, rng: np.random.Generator) -> None:
        start, end = np.asarray(track.start_cm, np.float64), np.asarray(track.end_cm, np.float64)
        length = float(np.linalg.norm(end - start))
        if length <= 2 * settings.end_stop_cm + 1.0:
            raise ValueError(
                f"the track is {length:.1f} cm long, too short to run between stops "
                f"{settings.end_stop_cm} cm from each end"
            )
        self._start = start
        self._dir = (end - start) / length
        self._perp = np.array([-self._dir[1], self._dir[0]])
        self._stops = (settings.end_stop_cm, length - settings.end_stop_cm)
        self._s = settings
        self._rng = rng
        self._end = 0
        self._along = self._stops[0]
        self._lateral = 0.0
        self._pause_left_s = rng.uniform(*settings.end_pause_s)
        self._run_s = 0.0
        self._run_len_s = 0.0
        self.xy = self._position()

    def _position(self) -> np.ndarray:
        return self._start + self._along * self._dir + self._lateral * self._perp

    def step(self, dt: float) -> np.ndarray:
        s, rng = self._s, self._rng
        if self._pause_left_s > 0:
            self._pause_left_s -= dt
            if self._pause_left_s <= 0:
                speed = s.mean_speed_cm_s * max(0.3, 1.0 + s.lap_speed_cv * rng.normal())
                self._run_len_s = (self._stops[1] - self._stops[0]) / speed
                self._run_s = 0.0
        else:
            self._run_s = min(self._run_s + dt, self._run_len_s)
            u = self._run_s / self._run_len_s
            frm, to = self._stops[self._end], self._stops[1 - self._end]
            self._along = frm + (to - frm) * 0.5 * (1.0 - math.cos(math.pi * u))
            if u >= 1.0:
                self._end = 1 - self._end
                self._pause_left_s = rng.uniform(*s.end_pause_s)
        decay = math.exp(-dt / s.velocity_tau_s)
        self._lateral = self._lateral * decay + s.track_lateral_sd_cm * math.sqrt(1 - decay * decay) * rng.normal()
        self.xy = self._position()
        return self.xy


@dataclass(frozen=True)
class Chunk:
    """The messages of one tick, to be sent once acquisition time reaches ``t_end_s``."""

    t_end_s: float
    messages: tuple[InputMessage, ...]


class SimulatedSession:
    """A simulated recording session, generated chunk by chunk.

    Parameters
    ----------
    environment : decoder.space.environments.Arena or decoder.space.environments.LinearTrack
        Where the animal runs: it forages in an arena and runs laps on a track.
    settings : SimulationSettings
    seed : int
        Seed of the one random generator behind everything; a seed gives the
        same session every time.

    Examples
    --------
    >>> from decoder.space.environments import Arena
    >>> session = SimulatedSession(Arena.circle((45, 45), 45, bin_cm=3), SimulationSettings(), seed=1)
    >>> kinds = {type(m).__name__ for m in session.messages(until_s=2.0)}
    >>> sorted(kinds)
    ['Heartbeat', 'SourceAnnounce', 'SpikeBatch', 'SyncPulse', 'TrackerFrames']
    """

    def __init__(self, environment: Environment, settings: SimulationSettings, seed: int) -> None:
        if not isinstance(settings, SimulationSettings):
            raise ValueError(f"settings must be a SimulationSettings, got {type(settings).__name__}")
        self.environment = environment
        self.settings = settings
        self._rng = np.random.default_rng(seed)
        rng = self._rng
        if isinstance(environment, Arena):
            self._motion: _OpenField | _LinearLaps = _OpenField(environment, settings, rng)
        elif isinstance(environment, LinearTrack):
            self._motion = _LinearLaps(environment, settings, rng)
        else:
            raise ValueError(
                f"the simulator runs in an Arena or on a LinearTrack, not a {type(environment).__name__}"
            )
        self._truth = self._draw_cells(environment, settings, rng)
        self._drift = 1.0 + settings.tracker_drift_ppm * 1e-6
        self._rate_max = self._truth.peak_rate_hz + self._truth.baseline_rate_hz
        self._ref_samples = int(math.ceil(settings.refractory_s * settings.acquisition_rate_hz - 1e-9))
        self._last_spike = np.full(self._truth.n_units, np.iinfo(np.int64).min // 2, np.int64)
        self._seq = {SPIKE_SOURCE: 0, TRACKER_SOURCE: 0, TRUTH_SOURCE: 0}
        self._announced = False
        self._tick = 0
        self._next_frame = 0
        self._next_truth = 0
        self._pulse_id = 1
        self._next_pulse_s = rng.uniform(*settings.sync_interval_s)
        self._dropout = self._next_dropout(0.0)

    # -- cells -------------------------------------------------------------------

    @staticmethod
    def _draw_cells(env: Environment, s: SimulationSettings, rng: np.random.Generator) -> GroundTruth:
        n_place, n_grid, n_flat = s.n_place_cells, s.n_grid_cells, s.n_nonspatial_cells
        n = n_place + n_grid + n_flat
        types = ["place"] * n_place + ["grid"] * n_grid + ["nonspatial"] * n_flat
        order = rng.permutation(n)
        types = [types[i] for i in order]
        is_place = np.array([t == "place" for t in types])
        is_grid = np.array([t == "grid" for t in types])
        is_flat = ~is_place & ~is_grid
        nan2 = np.full((n, 2), np.nan)
        centers, phases = nan2.copy(), nan2.copy()
        centers[is_place] = SimulatedSession._points_in(env, n_place, rng)
        sigma = np.full(n, np.nan)
        sigma[is_place] = [_fwhm_to_sigma(w) for w in rng.uniform(*s.place_field_fwhm_cm, n_place)]
        peak = np.zeros(n)
        peak[is_place] = rng.uniform(*s.place_peak_hz, n_place)
        peak[is_grid] = rng.uniform(*s.grid_peak_hz, n_grid)
        peak[is_flat] = rng.uniform(*s.nonspatial_rate_hz, n_flat)
        baseline = np.where(is_place, s.place_baseline_hz, 0.0)
        spacing, orientation = np.full(n, np.nan), np.full(n, np.nan)
        spacing[is_grid] = rng.uniform(*s.grid_spacing_cm, n_grid)
        orientation[is_grid] = rng.uniform(0.0, np.pi / 3.0, n_grid)
        phases[is_grid] = SimulatedSession._points_in(env, n_grid, rng)
        k = np.arange(n)
        unit_ids = (100 * (k // s.units_per_tetrode + 1) + k % s.units_per_tetrode + 1).astype(np.int64)
        return GroundTruth(
            unit_ids=_frozen(unit_ids),
            cell_type=tuple(types),
            field_center_cm=_frozen(centers),
            field_sigma_cm=_frozen(sigma),
            peak_rate_hz=_frozen(peak),
            baseline_rate_hz=_frozen(baseline),
            grid_spacing_cm=_frozen(spacing),
            grid_orientation_rad=_frozen(orientation),
            grid_phase_cm=_frozen(phases),
            tracker_offset_s=s.tracker_offset_s,
            tracker_drift_ppm=s.tracker_drift_ppm,
        )

    @staticmethod
    def _points_in(env: Environment, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` points uniformly inside the shape (an arena) or along the centre line (a track)."""
        if isinstance(env, LinearTrack):
            start, end = np.asarray(env.start_cm), np.asarray(env.end_cm)
            return start + rng.random(n)[:, None] * (end - start)
        ring = np.asarray(env.outline_cm())
        lo, hi = ring.min(axis=0), ring.max(axis=0)
        out = np.empty((0, 2))
        while len(out) < n:
            p = lo + (hi - lo) * rng.random((2 * n + 8, 2))
            out = np.vstack([out, p[env.contains(p)]])
        return out[:n]

    def ground_truth(self) -> GroundTruth:
        """The cells' fields and the tracker's clock, as drawn for this session."""
        return self._truth

    # -- messages ------------------------------------------------------------------

    def _message(self, cls: type, source: str, **fields: Any) -> InputMessage:
        msg = cls(source=source, seq=self._seq[source], **fields)
        self._seq[source] += 1
        return msg

    def _announcements(self) -> tuple[InputMessage, ...]:
        s = self.settings
        return (
            self._message(SourceAnnounce, SPIKE_SOURCE, kind="spikes", clock=ACQUISITION_CLOCK,
                          sample_rate_hz=s.acquisition_rate_hz, unit_ids=self._truth.unit_ids),
            self._message(SourceAnnounce, TRACKER_SOURCE, kind="tracker", clock=TRACKER_CLOCK,
                          sample_rate_hz=s.tracker_rate_hz),
            self._message(SourceAnnounce, TRUTH_SOURCE, kind="tracker", clock=ACQUISITION_CLOCK,
                          sample_rate_hz=s.tracker_rate_hz),
        )

    def chunks(self, until_s: float | None = None) -> Iterator[Chunk]:
        """Yield the session chunk by chunk, continuing where the last call stopped.

        The first chunk holds the three source announcements (``t_end_s`` 0);
        each later one covers one tick of acquisition time and ends with a
        heartbeat from the spike source (and from the tracker and the truth
        stream with ``position_heartbeats``).

        Parameters
        ----------
        until_s : float or None
            Stop once the chunks cover acquisition time up to ``until_s``
            (the last chunk may reach up to one tick past it); None runs on
            for as long as the caller keeps asking.
        """
        if until_s is not None and not (isinstance(until_s, (int, float)) and math.isfinite(until_s)):
            raise ValueError(f"until_s must be a finite number of seconds or None, got {until_s!r}")
        if not self._announced:
            self._announced = True
            yield Chunk(0.0, self._announcements())
        spt = self.settings.samples_per_tick
        fs = self.settings.acquisition_rate_hz
        while until_s is None or self._tick * spt / fs < until_s - 1e-12:
            yield self._next_chunk()

    def messages(self, until_s: float | None = None) -> Iterator[InputMessage]:
        """The messages of :meth:`chunks`, one by one, in data-time order."""
        for chunk in self.chunks(until_s):
            yield from chunk.messages

    def _next_chunk(self) -> Chunk:
        s = self.settings
        fs = s.acquisition_rate_hz
        spt = s.samples_per_tick
        s0, s1 = self._tick * spt, (self._tick + 1) * spt
        t0, t1 = s0 / fs, s1 / fs
        self._tick += 1

        n_steps = max(1, int(math.ceil(s.tick_s / _MOTION_STEP_S - 1e-9)))
        path_t = np.linspace(t0, t1, n_steps + 1)
        path_xy = np.empty((n_steps + 1, 2))
        path_xy[0] = self._motion.xy
        for i in range(n_steps):
            path_xy[i + 1] = self._motion.step(s.tick_s / n_steps)

        def position(t: np.ndarray) -> np.ndarray:
            return np.column_stack([np.interp(t, path_t, path_xy[:, 0]), np.interp(t, path_t, path_xy[:, 1])])

        pulse_t = None
        if self._next_pulse_s < t1:
            pulse_t = self._next_pulse_s
            pulse_id = self._pulse_id
            self._pulse_id += 1
            self._next_pulse_s += self._rng.uniform(*s.sync_interval_s)

        ephys: list[tuple[float, InputMessage]] = []
        spike_samples, spike_units = self._spikes(s0, s1, position)
        spike_t = spike_samples / fs
        pulse_ephys_t = math.floor(pulse_t * fs) / fs if pulse_t is not None else math.inf
        before = int(np.searchsorted(spike_t, pulse_ephys_t, side="left"))
        if before > 0:
            msg = self._message(SpikeBatch, SPIKE_SOURCE, t_s=spike_t[:before], unit_id=spike_units[:before])
            ephys.append((float(spike_t[0]), msg))
        if pulse_t is not None:
            ephys.append((pulse_ephys_t, self._message(SyncPulse, SPIKE_SOURCE, t_s=pulse_ephys_t, pulse_id=pulse_id)))
        if before < spike_t.size:
            msg = self._message(SpikeBatch, SPIKE_SOURCE, t_s=spike_t[before:], unit_id=spike_units[before:])
            ephys.append((float(spike_t[before]), msg))
        ephys.append((t1, self._message(Heartbeat, SPIKE_SOURCE, t_s=t1)))

        tracker: list[tuple[float, InputMessage]] = []
        frame_t_acq, frame_t_trk, frame_xy, frame_q = self._tracker_frames(t0, t1, position)
        if pulse_t is not None:
            pulse_trk_t = float(self._truth.tracker_time_s(pulse_t)) + self._rng.normal(0.0, s.sync_jitter_s)
            # Jitter must not carry the pulse past the chunk's end, where a
            # heartbeat (if sent) promises that everything before it has been sent.
            lo, hi = self._truth.tracker_time_s(np.array([t0, t1]))
            pulse_trk_t = min(max(pulse_trk_t, float(lo)), float(np.nextafter(hi, -np.inf)))
        else:
            pulse_trk_t = math.inf
        before = int(np.searchsorted(frame_t_trk, pulse_trk_t, side="left"))
        if before > 0:
            msg = self._message(TrackerFrames, TRACKER_SOURCE, t_s=frame_t_trk[:before], xy_cm=frame_xy[:before],
                                quality=frame_q[:before])
            tracker.append((float(frame_t_acq[0]), msg))
        if pulse_t is not None:
            msg = self._message(SyncPulse, TRACKER_SOURCE, t_s=pulse_trk_t, pulse_id=pulse_id)
            tracker.append(((pulse_trk_t - s.tracker_offset_s) / self._drift, msg))
        if before < frame_t_trk.size:
            msg = self._message(TrackerFrames, TRACKER_SOURCE, t_s=frame_t_trk[before:], xy_cm=frame_xy[before:],
                                quality=frame_q[before:])
            tracker.append((float(frame_t_acq[before]), msg))
        if s.position_heartbeats:
            tracker.append((t1, self._message(Heartbeat, TRACKER_SOURCE, t_s=float(self._truth.tracker_time_s(t1)))))

        truth: list[tuple[float, InputMessage]] = []
        j0, j1 = self._next_truth, int(math.ceil(t1 * s.tracker_rate_hz - 1e-9))
        if j1 > j0:
            t = np.arange(j0, j1) / s.tracker_rate_hz
            xy = position(t)
            msg = self._message(TrackerFrames, TRUTH_SOURCE, t_s=t, xy_cm=xy, quality=np.full(t.size, 255))
            truth.append((float(t[0]), msg))
        self._next_truth = max(j1, j0)
        if s.position_heartbeats:
            truth.append((t1, self._message(Heartbeat, TRUTH_SOURCE, t_s=t1)))

        merged = heapq.merge(ephys, tracker, truth, key=lambda item: item[0])
        return Chunk(t1, tuple(msg for _, msg in merged))

    def _spikes(self, s0: int, s1: int, position: Any) -> tuple[np.ndarray, np.ndarray]:
        """Spikes in acquisition samples ``[s0, s1)``: sample numbers and unit ids, in time order.

        Thinning: candidates from a homogeneous Poisson process at each cell's
        peak rate are kept with probability rate(x(t)) / peak, which gives an
        inhomogeneous Poisson process (Lewis & Shedler 1979, Naval Research
        Logistics Quarterly 26:403). A candidate within ``refractory_s`` of
        the cell's previous spike is dropped, which makes the hazard zero
        during the dead time and the process a dead-time-modified Poisson
        process.
        """
        s = self.settings
        rng = self._rng
        counts = rng.poisson(self._rate_max * (s1 - s0) / s.acquisition_rate_hz)
        rows = np.repeat(np.arange(self._truth.n_units), counts)
        if rows.size == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        samples = rng.integers(s0, s1, rows.size)
        rate = _rate_of_pairs(self._truth, rows, position(samples / s.acquisition_rate_hz))
        keep = rng.random(rows.size) * self._rate_max[rows] < rate
        rows, samples = rows[keep], samples[keep]
        order = np.lexsort((samples, rows))
        rows, samples = rows[order], samples[order]
        alive = np.ones(rows.size, bool)
        for i in range(rows.size):
            r = rows[i]
            if samples[i] - self._last_spike[r] < self._ref_samples:
                alive[i] = False
            else:
                self._last_spike[r] = samples[i]
        rows, samples = rows[alive], samples[alive]
        order = np.lexsort((rows, samples))
        return samples[order], self._truth.unit_ids[rows[order]]

    def _next_dropout(self, after_s: float) -> tuple[float, float]:
        start = after_s + self._rng.exponential(self.settings.dropout_interval_s)
        return start, start + self._rng.uniform(*self.settings.dropout_duration_s)

    def _tracker_frames(self, t0: float, t1: float, position: Any) -> tuple[np.ndarray, ...]:
        """Frames captured in acquisition time ``[t0, t1)``.

        Frame k is captured when the tracker's clock reads
        ``tracker_offset_s + k / tracker_rate_hz``.

        Returns
        -------
        t_acq, t_tracker : ndarray of float64, shape (n,)
        xy_cm : ndarray of float64, shape (n, 2)
            NaN for a lost frame.
        quality : ndarray of int64, shape (n,)
            0 for a lost frame.
        """
        s = self.settings
        per_acq_s = s.tracker_rate_hz * self._drift
        k0, k1 = self._next_frame, int(math.ceil(t1 * per_acq_s - 1e-9))
        self._next_frame = max(k1, k0)
        k = np.arange(k0, k1)
        t_acq = k / per_acq_s
        t_trk = s.tracker_offset_s + k / s.tracker_rate_hz
        xy = position(t_acq) + self._rng.normal(0.0, s.tracker_noise_cm, (k.size, 2))
        lost = self._rng.random(k.size) < s.lost_frame_prob
        for i, t in enumerate(t_acq):
            while t >= self._dropout[1]:
                self._dropout = self._next_dropout(self._dropout[1])
            lost[i] |= t >= self._dropout[0]
        xy[lost] = np.nan
        quality = np.where(lost, 0, FRAME_QUALITY)
        return t_acq, t_trk, xy, quality
