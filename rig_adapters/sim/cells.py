"""The simulated cells: their fields (:class:`GroundTruth`) and their spike trains (:class:`SpikeTrains`).

Place cells (Gaussian fields, optionally elongated or with a second field),
grid cells (the cosine model), non-spatial cells and weakly spatial
fast-spiking interneurons fire as inhomogeneous Poisson processes with a dead
time; theta modulation, an overdispersed gain and complex-spike bursts are
optional nuisances (:mod:`rig_adapters.sim.settings` says which and why).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from decoder.space.environments import Environment, LinearTrack, TrackGraph
from rig_adapters.sim.settings import SimulationSettings

CELL_TYPES = ("place", "grid", "nonspatial", "interneuron", "head_direction")

#: Gain ``a`` and threshold ``b`` of the exponential transfer function of the
#: grid-cell cosine model (Solstad, Moser & Einevoll 2006; values from memory).
_GRID_GAIN = 0.3
_GRID_THRESHOLD = -1.5


def _fwhm_to_sigma(fwhm: float) -> float:
    return fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))


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
        ``"place"``, ``"grid"``, ``"nonspatial"`` or ``"interneuron"``.
    field_center_cm : ndarray of float64, shape (n_units, 2)
        Centre of a place field or of an interneuron's broad bump; NaN for other cells.
    field_sigma_cm : ndarray of float64, shape (n_units,)
        Standard deviation of that Gaussian (of the round field an elongated
        one was stretched from); NaN for other cells.
    peak_rate_hz : ndarray of float64, shape (n_units,)
        Place cell: in-field peak above baseline; grid cell: rate on a vertex;
        non-spatial cell: its constant rate; interneuron: its mean rate.
    baseline_rate_hz : ndarray of float64, shape (n_units,)
        Rate far from a place field; 0 for other cells.
    grid_spacing_cm, grid_orientation_rad : ndarray of float64, shape (n_units,)
        Vertex spacing and lattice orientation of a grid cell; NaN for others.
    grid_phase_cm : ndarray of float64, shape (n_units, 2)
        Position of one vertex of a grid cell; NaN for others.
    tracker_offset_s, tracker_drift_ppm : float
        ``t_tracker = tracker_offset_s + t_acquisition * (1 + tracker_drift_ppm * 1e-6)``.
    field_aspect : ndarray of float64, shape (n_units,)
        Long over short axis of a place field: 1 for a round one, NaN for other cells.
    field_orientation_rad : ndarray of float64, shape (n_units,)
        Direction of an elongated field's long axis; NaN otherwise.
    second_center_cm : ndarray of float64, shape (n_units, 2)
        Centre of a place cell's second field (same width, round); NaN without one.
    second_peak_fraction : ndarray of float64, shape (n_units,)
        Peak of the second field over that of the first; NaN without one.
    spatial_depth : ndarray of float64, shape (n_units,)
        Depth of an interneuron's spatial modulation; NaN for other cells.
    preferred_heading_rad, heading_kappa : ndarray of float64, shape (n_units,) or None
        A head-direction cell's preferred direction and von Mises
        concentration (``rig_adapters.sim.heading``); NaN for other cells,
        None in a session without head-direction cells.
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
    field_aspect: np.ndarray
    field_orientation_rad: np.ndarray
    second_center_cm: np.ndarray
    second_peak_fraction: np.ndarray
    spatial_depth: np.ndarray
    preferred_heading_rad: np.ndarray | None = None
    heading_kappa: np.ndarray | None = None
    _type_code: np.ndarray = dataclasses.field(init=False, repr=False)

    def __post_init__(self) -> None:
        codes = np.array([CELL_TYPES.index(t) for t in self.cell_type], np.int64)
        object.__setattr__(self, "_type_code", _frozen(codes))

    @property
    def n_units(self) -> int:
        return int(self.unit_ids.size)

    @property
    def max_rate_hz(self) -> np.ndarray:
        """Highest rate each cell reaches anywhere (Hz), before theta and gain; shape (n_units,)."""
        top = self.peak_rate_hz + self.baseline_rate_hz
        inter = self._type_code == 3
        if np.any(inter):
            top = top.copy()
            top[inter] = self.peak_rate_hz[inter] * (1.0 + self.spatial_depth[inter])
        return top

    def rate_hz(self, xy_cm: np.ndarray) -> np.ndarray:
        """Firing rate of every cell at each position, without theta or gain.

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
        return rate_of_pairs(self, rows, np.tile(xy, (self.n_units, 1))).reshape(self.n_units, len(xy))

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


def rate_of_pairs(truth: GroundTruth, rows: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Rate (Hz) of cell ``rows[i]`` at position ``xy[i]``, shape (k,).

    Place cell: ``baseline + peak · bump``, with ``bump = exp(-|x - c|² / 2σ²)``;
    an elongated field measures ``|x - c|`` in the ellipse's axes, scaled by
    ``σ·√aspect`` along the long one and ``σ/√aspect`` across it, and a
    second field makes ``bump`` the larger of the two fields' bumps. Grid
    cell: the cosine model, ``peak · (exp(a (s - b)) - 1) / (exp(a (3 - b)) - 1)``
    with ``s`` the sum of the three cosines, which is 3 on a vertex and never
    below -3/2, where the rate is 0 (Solstad, Moser & Einevoll 2006,
    Hippocampus 16:1026). Non-spatial cell: ``peak``. Interneuron:
    ``peak · (1 + depth · (2 bump - 1))``. Head-direction cell, at a point
    of the heading ring: ``baseline + peak · exp(κ (cos(θ - μ) - 1))``, a
    von Mises tuning curve of the heading ``θ``.
    """
    rate = np.zeros(rows.size)
    kinds = truth._type_code[rows]
    place = kinds == 0
    if np.any(place):
        r = rows[place]
        d2 = np.sum((xy[place] - truth.field_center_cm[r]) ** 2, axis=1)
        bump = np.exp(-0.5 * d2 / truth.field_sigma_cm[r] ** 2)
        stretched = truth.field_aspect[r] != 1.0
        if np.any(stretched):
            rs = r[stretched]
            rel = xy[place][stretched] - truth.field_center_cm[rs]
            cos, sin = np.cos(truth.field_orientation_rad[rs]), np.sin(truth.field_orientation_rad[rs])
            along = rel[:, 0] * cos + rel[:, 1] * sin
            across = -rel[:, 0] * sin + rel[:, 1] * cos
            aspect = truth.field_aspect[rs]
            sigma = truth.field_sigma_cm[rs]
            bump[stretched] = np.exp(-0.5 * ((along / (sigma * np.sqrt(aspect))) ** 2
                                             + (across * np.sqrt(aspect) / sigma) ** 2))
        double = np.isfinite(truth.second_peak_fraction[r])
        if np.any(double):
            rd = r[double]
            d2 = np.sum((xy[place][double] - truth.second_center_cm[rd]) ** 2, axis=1)
            second = truth.second_peak_fraction[rd] * np.exp(-0.5 * d2 / truth.field_sigma_cm[rd] ** 2)
            bump[double] = np.maximum(bump[double], second)
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
    inter = kinds == 3
    if np.any(inter):
        r = rows[inter]
        d2 = np.sum((xy[inter] - truth.field_center_cm[r]) ** 2, axis=1)
        bump = np.exp(-0.5 * d2 / truth.field_sigma_cm[r] ** 2)
        rate[inter] = truth.peak_rate_hz[r] * (1.0 + truth.spatial_depth[r] * (2.0 * bump - 1.0))
    heading = kinds == 4
    if np.any(heading):
        # xy is a point on the heading ring (decoder.space.headings); its direction is the heading.
        r = rows[heading]
        theta = np.arctan2(xy[heading, 1], xy[heading, 0])
        tuning = np.exp(truth.heading_kappa[r] * (np.cos(theta - truth.preferred_heading_rad[r]) - 1.0))
        rate[heading] = truth.baseline_rate_hz[r] + truth.peak_rate_hz[r] * tuning
    return rate


def points_in(env: Environment, n: int, rng: np.random.Generator) -> np.ndarray:
    """``n`` points uniformly inside the shape (an arena) or along the centre lines (a track or maze)."""
    if isinstance(env, LinearTrack):
        start, end = np.asarray(env.start_cm), np.asarray(env.end_cm)
        return start + rng.random(n)[:, None] * (end - start)
    if isinstance(env, TrackGraph):
        lengths = np.asarray(env.edge_lengths_cm)
        edge = rng.choice(lengths.size, size=n, p=lengths / lengths.sum())
        ends = np.array(env.edges, dtype=np.int64)[edge]
        a, b = env.nodes_cm[ends[:, 0]], env.nodes_cm[ends[:, 1]]
        return a + rng.random(n)[:, None] * (b - a)
    ring = np.asarray(env.outline_cm())
    lo, hi = ring.min(axis=0), ring.max(axis=0)
    out = np.empty((0, 2))
    while len(out) < n:
        p = lo + (hi - lo) * rng.random((2 * n + 8, 2))
        out = np.vstack([out, p[env.contains(p)]])
    return out[:n]


def draw_cells(env: Environment, s: SimulationSettings, rng: np.random.Generator) -> GroundTruth:
    """Draw every cell's type, field and rates; the order of draws is fixed, so a seed gives the same cells.

    The nuisances draw only when they are on, after everything else, so that
    turning them off gives exactly the cells of a scenario without them.
    """
    n_place, n_grid, n_flat, n_inter = s.n_place_cells, s.n_grid_cells, s.n_nonspatial_cells, s.n_interneurons
    n = n_place + n_grid + n_flat + n_inter
    types = ["place"] * n_place + ["grid"] * n_grid + ["nonspatial"] * n_flat + ["interneuron"] * n_inter
    order = rng.permutation(n)
    types = [types[i] for i in order]
    kind = np.array([CELL_TYPES.index(t) for t in types], np.int64)
    is_place, is_grid, is_flat, is_inter = (kind == 0), (kind == 1), (kind == 2), (kind == 3)
    nan2 = np.full((n, 2), np.nan)
    centers, phases, second = nan2.copy(), nan2.copy(), nan2.copy()
    centers[is_place] = points_in(env, n_place, rng)
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
    phases[is_grid] = points_in(env, n_grid, rng)

    aspect = np.where(is_place, 1.0, np.nan)
    field_angle = np.full(n, np.nan)
    second_peak = np.full(n, np.nan)
    depth = np.full(n, np.nan)
    if n_inter:
        centers[is_inter] = points_in(env, n_inter, rng)
        sigma[is_inter] = _fwhm_to_sigma(s.interneuron_field_fwhm_cm)
        peak[is_inter] = rng.uniform(*s.interneuron_rate_hz, n_inter)
        depth[is_inter] = rng.uniform(*s.interneuron_spatial_depth, n_inter)
    place_rows = np.flatnonzero(is_place)
    if n_place and s.elongated_fraction > 0:
        chosen = rng.random(n_place) < s.elongated_fraction
        ratio = rng.uniform(*s.elongation_aspect, n_place)
        angle = rng.uniform(0.0, np.pi, n_place)
        aspect[place_rows[chosen]] = ratio[chosen]
        field_angle[place_rows[chosen]] = angle[chosen]
    if n_place and s.double_field_fraction > 0:
        chosen = rng.random(n_place) < s.double_field_fraction
        where = points_in(env, n_place, rng)
        fraction = rng.uniform(*s.second_field_peak_fraction, n_place)
        second[place_rows[chosen]] = where[chosen]
        second_peak[place_rows[chosen]] = fraction[chosen]

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
        field_aspect=_frozen(aspect),
        field_orientation_rad=_frozen(field_angle),
        second_center_cm=_frozen(second),
        second_peak_fraction=_frozen(second_peak),
        spatial_depth=_frozen(depth),
    )


class SpikeTrains:
    """The cells' spikes, tick after tick, from the shared random generator.

    Thinning: candidates from a homogeneous Poisson process at each cell's
    highest possible rate are kept with probability rate(x(t), t) / highest,
    which gives an inhomogeneous Poisson process (Lewis & Shedler 1979,
    Naval Research Logistics Quarterly 26:403). The rate is the field's,
    times the cell's current gain and the theta factor when those are on.
    A kept place-cell spike may open a burst, whose later spikes may fall in
    later ticks and wait for them. A spike within ``refractory_s`` of the
    cell's previous spike is dropped, which makes the hazard zero during the
    dead time and the process a dead-time-modified Poisson process.
    """

    def __init__(self, truth: GroundTruth, settings: SimulationSettings, rng: np.random.Generator) -> None:
        self._truth = truth
        self._s = settings
        self._rng = rng
        self._rate_max = truth.max_rate_hz
        self._gain = np.ones(truth.n_units)
        self._ref_samples = int(math.ceil(settings.refractory_s * settings.acquisition_rate_hz - 1e-9))
        self._last_spike = np.full(truth.n_units, np.iinfo(np.int64).min // 2, np.int64)
        self._is_place = np.array([t == "place" for t in truth.cell_type])
        self._waiting_samples = np.zeros(0, np.int64)
        self._waiting_rows = np.zeros(0, np.int64)

    def spikes(self, tick: int, s0: int, s1: int,
               position: Callable[[np.ndarray], np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        """Spikes in acquisition samples ``[s0, s1)`` of tick ``tick``: sample numbers and unit ids, in time order."""
        s, rng = self._s, self._rng
        fs = s.acquisition_rate_hz
        bound = self._rate_max
        if s.gain_cv > 0:
            if tick % s.gain_interval_ticks == 0:
                shape = 1.0 / s.gain_cv**2
                self._gain = rng.gamma(shape, 1.0 / shape, self._truth.n_units)
            bound = bound * self._gain
        if s.theta_depth > 0:
            bound = bound * (1.0 + s.theta_depth)
        counts = rng.poisson(bound * (s1 - s0) / fs)
        rows = np.repeat(np.arange(self._truth.n_units), counts)
        samples = np.zeros(0, np.int64)
        if rows.size:
            samples = rng.integers(s0, s1, rows.size)
            t = samples / fs
            rate = rate_of_pairs(self._truth, rows, position(t))
            if s.gain_cv > 0:
                rate = rate * self._gain[rows]
            if s.theta_depth > 0:
                rate = rate * (1.0 + s.theta_depth * np.cos(2.0 * np.pi * s.theta_hz * t))
            keep = rng.random(rows.size) * bound[rows] < rate
            rows, samples = rows[keep], samples[keep]
        if s.burst_prob > 0:
            rows, samples = self._with_bursts(rows, samples, s1)
        if rows.size == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
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

    def _with_bursts(self, rows: np.ndarray, samples: np.ndarray, s1: int) -> tuple[np.ndarray, np.ndarray]:
        """Add the bursts opened by these spikes and the earlier bursts' spikes due before ``s1``."""
        s, rng = self._s, self._rng
        opens = self._is_place[rows] & (rng.random(rows.size) < s.burst_prob)
        low, high = (round(v) for v in s.burst_spikes)
        n_open = int(np.count_nonzero(opens))
        if n_open and high > 1:
            extra = rng.integers(low, high + 1, n_open) - 1
            isi = rng.uniform(*s.burst_isi_s, (n_open, high - 1))
            offsets = np.rint(np.cumsum(isi, axis=1) * s.acquisition_rate_hz).astype(np.int64)
            used = np.arange(high - 1)[None, :] < extra[:, None]
            child_samples = (samples[opens][:, None] + offsets)[used]
            child_rows = np.broadcast_to(rows[opens][:, None], offsets.shape)[used]
            self._waiting_samples = np.concatenate([self._waiting_samples, child_samples])
            self._waiting_rows = np.concatenate([self._waiting_rows, child_rows])
        due = self._waiting_samples < s1
        rows = np.concatenate([rows, self._waiting_rows[due]])
        samples = np.concatenate([samples, self._waiting_samples[due]])
        self._waiting_samples, self._waiting_rows = self._waiting_samples[~due], self._waiting_rows[~due]
        return rows, samples
