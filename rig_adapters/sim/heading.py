"""The simulated head: its turning, head-direction cells, and the tracker's view of its direction.

On a heading ring (``decoder.space.headings``) the simulated session moves the
head's direction instead of a position: the "position" the session carries
is the heading as a point on the ring, so the cells' rates and the truth
stream follow it like any other trajectory. What differs is here:

* :class:`HeadTurning`: the angular head velocity is an Ornstein-Uhlenbeck
  process (s.d. ``angular_velocity_sd_deg_s``, correlation time
  ``angular_velocity_tau_s``), the heading its integral;
* :func:`draw_heading_cells`: head-direction cells with von Mises tuning
  (preferred directions uniform around the circle, peak rates and widths
  from ``[simulation]``), beside the optional non-spatial cells;
* :func:`tracked_heading` and :func:`true_heading`: what the tracker and the
  truth stream send, a heading ``hd`` in radians with the tracker's noise,
  lost frames and frames without a heading, and an ``(x, y)`` that stays at
  the arena's centre (the animal turns in place; the heading decoder does
  not read the position).
"""

from __future__ import annotations

import math

import numpy as np

from decoder.space.headings import RING_RADIUS_CM, HeadingRing
from rig_adapters.sim.cells import CELL_TYPES, GroundTruth
from rig_adapters.sim.settings import SimulationSettings


def von_mises_kappa(fwhm_deg: np.ndarray) -> np.ndarray:
    """Concentration ``κ`` of ``exp(κ (cos(θ - μ) - 1))`` whose full width at half maximum is ``fwhm_deg``.

    Half the maximum at ``θ - μ = ± fwhm / 2`` gives ``κ = ln 2 / (1 - cos(fwhm / 2))``.
    """
    half = np.radians(np.asarray(fwhm_deg, dtype=np.float64)) / 2.0
    return math.log(2.0) / (1.0 - np.cos(half))


class HeadTurning:
    """The head's direction turning at an Ornstein-Uhlenbeck angular velocity.

    ``xy`` is the heading as a point on the heading ring; :meth:`step` moves it
    like the other trajectories of ``rig_adapters.sim.trajectories`` do.
    The velocity relaxes to 0 with time constant ``tau`` under white noise
    scaled so that its stationary s.d. is ``angular_velocity_sd_deg_s``
    (exact discretisation of the process).
    """

    def __init__(self, ring: HeadingRing, settings: SimulationSettings, rng: np.random.Generator) -> None:
        self._s = settings
        self._rng = rng
        self.heading_rad = rng.uniform(0.0, 2.0 * math.pi)
        self.velocity_rad_s = math.radians(rng.normal(0.0, settings.angular_velocity_sd_deg_s))
        self.xy = self._point()

    def _point(self) -> np.ndarray:
        return RING_RADIUS_CM * np.array([math.cos(self.heading_rad), math.sin(self.heading_rad)])

    def step(self, dt: float) -> np.ndarray:
        s = self._s
        decay = math.exp(-dt / s.angular_velocity_tau_s)
        sd = math.radians(s.angular_velocity_sd_deg_s)
        new_velocity = self.velocity_rad_s * decay + sd * math.sqrt(1.0 - decay * decay) * self._rng.normal()
        self.heading_rad = (self.heading_rad + 0.5 * (self.velocity_rad_s + new_velocity) * dt) % (2.0 * math.pi)
        self.velocity_rad_s = new_velocity
        self.xy = self._point()
        return self.xy


def draw_heading_cells(s: SimulationSettings, rng: np.random.Generator) -> GroundTruth:
    """Head-direction cells (and ``n_nonspatial_cells`` untuned ones), in a shuffled order of unit ids.

    Raises
    ------
    ValueError
        When ``n_head_direction_cells`` is 0: a heading ring needs cells tuned to it.
    """
    n_hd, n_flat = s.n_head_direction_cells, s.n_nonspatial_cells
    if n_hd == 0:
        raise ValueError("a heading ring needs head-direction cells; set [simulation] n_head_direction_cells")
    n = n_hd + n_flat
    types = ["head_direction"] * n_hd + ["nonspatial"] * n_flat
    order = rng.permutation(n)
    types = [types[i] for i in order]
    kind = np.array([CELL_TYPES.index(t) for t in types], np.int64)
    is_hd, is_flat = kind == 4, kind == 2
    preferred, kappa = np.full(n, np.nan), np.full(n, np.nan)
    preferred[is_hd] = rng.uniform(0.0, 2.0 * math.pi, n_hd)
    kappa[is_hd] = von_mises_kappa(rng.uniform(*s.hd_tuning_fwhm_deg, n_hd))
    peak = np.zeros(n)
    peak[is_hd] = rng.uniform(*s.hd_peak_hz, n_hd)
    peak[is_flat] = rng.uniform(*s.nonspatial_rate_hz, n_flat)
    baseline = np.where(is_hd, s.hd_baseline_hz, 0.0)
    k = np.arange(n)
    unit_ids = (100 * (k // s.units_per_tetrode + 1) + k % s.units_per_tetrode + 1).astype(np.int64)
    nan1, nan2 = np.full(n, np.nan), np.full((n, 2), np.nan)

    def frozen(a: np.ndarray) -> np.ndarray:
        a = np.ascontiguousarray(a)
        a.setflags(write=False)
        return a

    return GroundTruth(
        unit_ids=frozen(unit_ids), cell_type=tuple(types), field_center_cm=frozen(nan2),
        field_sigma_cm=frozen(nan1), peak_rate_hz=frozen(peak), baseline_rate_hz=frozen(baseline),
        grid_spacing_cm=frozen(nan1), grid_orientation_rad=frozen(nan1), grid_phase_cm=frozen(nan2),
        tracker_offset_s=s.tracker_offset_s, tracker_drift_ppm=s.tracker_drift_ppm,
        field_aspect=frozen(nan1), field_orientation_rad=frozen(nan1), second_center_cm=frozen(nan2),
        second_peak_fraction=frozen(nan1), spatial_depth=frozen(nan1),
        preferred_heading_rad=frozen(preferred), heading_kappa=frozen(kappa),
    )


def true_heading(ring_xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The truth stream's frames: ``(xy_cm (n, 2), hd_rad (n,))``, the position at the centre."""
    return np.zeros_like(ring_xy), np.arctan2(ring_xy[:, 1], ring_xy[:, 0])


def tracked_heading(ring_xy: np.ndarray, lost: np.ndarray, s: SimulationSettings,
                    rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """The tracker's frames: ``(xy_cm (n, 2), hd_rad (n,))``.

    The heading gets Gaussian noise of ``heading_noise_deg``; a lost frame
    has neither position nor heading, and a seen one lacks its heading with
    probability ``heading_unknown_prob`` (NaN, as PROTOCOL.md asks). The
    position is the arena's centre with the tracker's position noise.
    """
    n = len(ring_xy)
    hd = np.arctan2(ring_xy[:, 1], ring_xy[:, 0]) + np.radians(rng.normal(0.0, s.heading_noise_deg, n))
    hd = np.mod(hd, 2.0 * math.pi)
    hd[lost | (rng.random(n) < s.heading_unknown_prob)] = np.nan
    xy = rng.normal(0.0, s.tracker_noise_cm, (n, 2))
    xy[lost] = np.nan
    return xy, hd
