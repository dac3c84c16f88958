"""What the simulated rig draws from: :class:`SimulationSettings`, the ``[simulation]`` table.

Every field is documented beside it with its unit and where its typical value
comes from. The nuisances of real recordings (theta modulation, overdispersed
rates, bursts, elongated and double fields, fast-spiking interneurons, tracker
outliers) all default to off, so that a scenario without them makes exactly
the messages it always made; a scenario's TOML turns them on.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from rig_adapters.sim.lfp import LfpSettings
from rig_adapters.sim.marks import MarkSimulation
from rig_adapters.sim.table_keys import known_keys


@dataclass(frozen=True)
class ReplaySettings:
    """The ``[simulation.replay]`` table: what the place cells replay during ripples (needs ``[simulation.lfp]``)."""

    #: Speed of the replayed path (cm/s), a range; 10-20 times a rat's running speed of
    #: 20-40 cm/s (common practice).
    speed_cm_s: tuple[float, float] = (300.0, 600.0)
    #: Share of the ripples whose path ends at the goal; the others run between random points.
    goal_fraction: float = 0.5
    #: The goal (x_cm, y_cm), for instance a reward well; it must lie on the track.
    goal_cm: tuple[float, float] = (0.0, 80.0)
    #: Factor on a place cell's field rate during a replay: cells fire densely in ripples.
    rate_gain: float = 3.0

    def __post_init__(self) -> None:
        try:
            low, high = (float(v) for v in self.speed_cm_s)
            gx, gy = (float(v) for v in self.goal_cm)
        except (TypeError, ValueError):
            raise ValueError(f"replay.speed_cm_s and replay.goal_cm must be pairs of numbers, got "
                             f"{self.speed_cm_s!r} and {self.goal_cm!r}") from None
        if not 0 < low <= high < math.inf:
            raise ValueError(f"replay.speed_cm_s must be a pair 0 < low <= high, got {self.speed_cm_s!r}")
        if not (math.isfinite(gx) and math.isfinite(gy)):
            raise ValueError(f"replay.goal_cm must be a finite point, got {self.goal_cm!r}")
        if not 0 <= self.goal_fraction <= 1:
            raise ValueError(f"replay.goal_fraction must lie in [0, 1], got {self.goal_fraction!r}")
        if not (isinstance(self.rate_gain, (int, float)) and 0 < self.rate_gain < math.inf):
            raise ValueError(f"replay.rate_gain must be a positive number, got {self.rate_gain!r}")
        object.__setattr__(self, "speed_cm_s", (low, high))
        object.__setattr__(self, "goal_cm", (gx, gy))
        object.__setattr__(self, "goal_fraction", float(self.goal_fraction))
        object.__setattr__(self, "rate_gain", float(self.rate_gain))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> ReplaySettings:
        """Settings from a ``[simulation.replay]`` table; missing keys take their defaults."""
        return cls(**known_keys(cls, d, "simulation.replay"))



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

    # -- nuisances of real recordings; every one is off by default -----------------
    #: Depth of the theta modulation of every cell's rate, 0..1 (0: off). The rate is
    #: multiplied by ``1 + theta_depth * cos(2 pi theta_hz t)``: pyramidal cells and
    #: interneurons fire locked to the hippocampal theta rhythm (common practice;
    #: O'Keefe & Recce 1993, Hippocampus 3:317, for its relation to place fields).
    #: Phase precession is not modelled: all cells share one preferred phase.
    theta_depth: float = 0.0
    #: Frequency of the theta rhythm (Hz); 6-10 Hz in a running rodent, about 8 Hz (common practice).
    theta_hz: float = 8.0
    #: Coefficient of variation of a gamma-distributed gain (mean 1) on each cell's rate,
    #: drawn afresh every ``gain_interval_s`` (0: off). Place-cell counts are overdispersed
    #: against Poisson from pass to pass (Fenton & Muller 1998, PNAS 95:3182); a CV of about
    #: 0.3 over 100 ms is the figure of issue 12 (from memory, not from a table).
    gain_cv: float = 0.0
    #: How long one draw of the gain holds (s); rounded to whole ticks, at least one.
    gain_interval_s: float = 0.1
    #: Probability that a place cell's spike opens a complex-spike burst (0: off).
    #: CA1 pyramidal cells fire a good part of their spikes in bursts (common practice).
    burst_prob: float = 0.0
    #: Spikes in one burst, counting the first (a range, rounded to whole spikes);
    #: 2-6 is common practice for complex spikes.
    burst_spikes: tuple[float, float] = (2.0, 6.0)
    #: Interval between the spikes of a burst (s), a range; about 3-6 ms (common practice).
    burst_isi_s: tuple[float, float] = (0.003, 0.006)
    #: Fraction of place cells whose field is an ellipse rather than a circle (0: off);
    #: fields stretched along walls and tracks are common practice (from memory).
    elongated_fraction: float = 0.0
    #: Ratio of the long to the short axis of an elongated field, a range; the area
    #: (the product of the two widths) stays that of the round field.
    elongation_aspect: tuple[float, float] = (1.5, 3.0)
    #: Fraction of place cells with a second field somewhere else (0: off); in a larger
    #: space more cells have several fields (Fenton et al. 2008, J Neurosci 28:11250).
    double_field_fraction: float = 0.0
    #: Peak of the second field as a fraction of the first, a range.
    second_field_peak_fraction: tuple[float, float] = (0.5, 1.0)
    #: Number of fast-spiking interneurons: high rates, weakly spatial (common practice).
    n_interneurons: int = 0
    #: Mean rate of an interneuron (Hz), a range; 10-30 Hz is common practice.
    interneuron_rate_hz: tuple[float, float] = (10.0, 30.0)
    #: Depth of an interneuron's spatial modulation, 0..1, a range: its rate is
    #: ``mean * (1 + depth * (2 bump - 1))`` with ``bump`` a broad Gaussian of
    #: ``interneuron_field_fwhm_cm``; weakly spatial, 0-0.3 (common practice, from memory).
    interneuron_spatial_depth: tuple[float, float] = (0.0, 0.3)
    #: Width (full width at half maximum) of an interneuron's broad spatial bump (cm).
    interneuron_field_fwhm_cm: float = 60.0
    #: Probability that the tracker reports a frame far from the animal (a reflection,
    #: the cable, a second light), beside the Gaussian jitter of ``tracker_noise_cm`` (0: off).
    tracker_outlier_prob: float = 0.0
    #: Standard deviation of such an outlier's displacement on each axis (cm).
    tracker_outlier_cm: float = 15.0
    #: The simulated LFP (``rig_adapters.sim.lfp``), the ``[simulation.lfp]`` table; none without it.
    #: It is sent by the source ``"lfp"`` on the acquisition clock.
    lfp: LfpSettings | None = None
    #: Replay content during the simulated ripples (``rig_adapters.sim.replay_content``), the
    #: ``[simulation.replay]`` table; none without it. Needs ``[simulation.lfp]`` and a track or maze.
    replay: ReplaySettings | None = None

    # -- head direction (rig_adapters.sim.heading): used when the environment is a heading ring --
    #: Number of head-direction cells (von Mises tuning to the head's direction).
    n_head_direction_cells: int = 0
    #: Peak rate of a head-direction cell at its preferred direction (Hz), a range drawn uniformly;
    #: about 5-115 Hz, mean about 35, in rat postsubiculum (Taube, Muller & Ranck 1990, J Neurosci
    #: 10:420) and a little higher in anterior thalamus (Taube 1995, J Neurosci 15:70), both from
    #: memory. The default's mean (32.5 Hz) and top (50 Hz) are conservative.
    hd_peak_hz: tuple[float, float] = (15.0, 50.0)
    #: Background rate of a head-direction cell away from its preferred direction (Hz); below
    #: about 1 Hz (same papers, from memory).
    hd_baseline_hz: float = 0.5
    #: Full width at half maximum of the tuning curve (degrees), a range drawn uniformly. The papers
    #: give a triangular fit's base ("directional firing range"), twice the FWHM: about 60-150
    #: degrees, mean about 90 (postsubiculum) to 110 (anterior thalamus), so FWHM 30-75, mean
    #: 45-55 (from memory). The default (mean 67.5) is broader than the record: conservative.
    hd_tuning_fwhm_deg: tuple[float, float] = (45.0, 90.0)
    #: Standard deviation of the angular head velocity (deg/s): a foraging rat turns its head at
    #: 0-400 deg/s, most of the time below 100 deg/s, s.d. about 70-120 deg/s (Blair & Sharp 1995;
    #: Stackman & Taube 1998; both J Neurosci, from memory). The recorded velocity is peaked at 0
    #: with heavy tails; this process is Gaussian.
    angular_velocity_sd_deg_s: float = 90.0
    #: Correlation time of the angular head velocity (s), an Ornstein-Uhlenbeck process (from memory).
    angular_velocity_tau_s: float = 0.3
    #: Standard deviation of the tracker's heading noise (degrees); a two-LED or pose tracker
    #: jitters by a few degrees (from memory).
    heading_noise_deg: float = 3.0
    #: Probability that a seen frame carries no heading (one of the two markers hidden), sent as NaN.
    heading_unknown_prob: float = 0.02

    # -- waveform marks (rig_adapters.sim.marks) --
    #: The ``[simulation.marks]`` table: tetrodes that send marked spikes
    #: (:class:`rig_adapters.sim.marks.MarkSimulation`); empty for sorted spikes only.
    marks: MarkSimulation | None = None

    _RANGES: ClassVar[tuple[str, ...]] = (
        "pause_duration_s", "end_pause_s", "place_field_fwhm_cm", "place_peak_hz", "grid_spacing_cm",
        "grid_peak_hz", "nonspatial_rate_hz", "dropout_duration_s", "sync_interval_s", "burst_spikes",
        "burst_isi_s", "elongation_aspect", "second_field_peak_fraction", "interneuron_rate_hz",
        "interneuron_spatial_depth", "hd_peak_hz", "hd_tuning_fwhm_deg",
    )
    _COUNTS: ClassVar[tuple[str, ...]] = (
        "n_place_cells", "n_grid_cells", "n_nonspatial_cells", "units_per_tetrode", "n_interneurons",
        "n_head_direction_cells",
    )
    _FLAGS: ClassVar[tuple[str, ...]] = ("position_heartbeats",)

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name == "lfp":
                self._take_lfp(value)
                continue
            if f.name == "replay":
                if value is not None and self.lfp is None:
                    raise ValueError("replay content fills the simulated ripples; add a [simulation.lfp] table")
                if value is not None and not isinstance(value, ReplaySettings):
                    object.__setattr__(self, "replay", ReplaySettings.from_dict(value))
                continue
            if f.name == "marks":
                if not isinstance(value, MarkSimulation):
                    object.__setattr__(self, "marks", MarkSimulation.from_dict(value))
            elif f.name in self._FLAGS:
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
                    "grid_spacing_cm", "sync_interval_s", "theta_hz", "gain_interval_s",
                    "interneuron_field_fwhm_cm", "hd_tuning_fwhm_deg", "angular_velocity_tau_s")
        for name in positive:
            low = getattr(self, name)[0] if name in self._RANGES else getattr(self, name)
            if not low > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)!r}")
        for name in ("min_wall_distance_cm", "end_stop_cm", "lap_speed_cv", "track_lateral_sd_cm",
                     "place_baseline_hz", "refractory_s", "tracker_offset_s", "tracker_noise_cm", "sync_jitter_s",
                     "gain_cv", "tracker_outlier_cm", "hd_baseline_hz", "angular_velocity_sd_deg_s",
                     "heading_noise_deg"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        if self.units_per_tetrode < 1 or self.units_per_tetrode > 99:
            raise ValueError(
                f"units_per_tetrode must be 1..99 (ids are 100 * tetrode + k), got {self.units_per_tetrode}"
            )
        if (self.n_place_cells + self.n_grid_cells + self.n_nonspatial_cells + self.n_interneurons
                + self.n_head_direction_cells == 0):
            raise ValueError(
                "the simulation needs at least one cell; set n_place_cells, n_grid_cells, "
                "n_nonspatial_cells, n_interneurons or n_head_direction_cells"
            )
        if not 0 <= self.heading_unknown_prob < 1:
            raise ValueError(f"heading_unknown_prob must lie in [0, 1), got {self.heading_unknown_prob}")
        if self.hd_tuning_fwhm_deg[1] >= 360.0:
            raise ValueError(f"hd_tuning_fwhm_deg must stay below 360 degrees, got {self.hd_tuning_fwhm_deg}")
        for name in ("theta_depth", "burst_prob", "elongated_fraction", "double_field_fraction"):
            if not 0 <= getattr(self, name) <= 1:
                raise ValueError(f"{name} must lie in [0, 1], got {getattr(self, name)}")
        if not 0 <= self.tracker_outlier_prob < 1:
            raise ValueError(f"tracker_outlier_prob must lie in [0, 1), got {self.tracker_outlier_prob}")
        if self.interneuron_spatial_depth[1] > 1 or self.second_field_peak_fraction[1] > 1:
            raise ValueError(
                "interneuron_spatial_depth and second_field_peak_fraction must lie within [0, 1], got "
                f"{self.interneuron_spatial_depth} and {self.second_field_peak_fraction}"
            )
        if self.burst_spikes[0] < 1 or self.elongation_aspect[0] < 1:
            raise ValueError(
                f"burst_spikes and elongation_aspect start at 1, got {self.burst_spikes} and {self.elongation_aspect}"
            )
        if self.burst_isi_s[0] <= self.refractory_s and self.burst_prob > 0:
            raise ValueError(
                f"burst_isi_s {self.burst_isi_s} must be longer than refractory_s ({self.refractory_s} s)"
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

    def _take_lfp(self, value: Any) -> None:
        if value is None or isinstance(value, LfpSettings):
            lfp = value
        elif isinstance(value, Mapping):
            lfp = LfpSettings.from_dict(value)
        else:
            raise ValueError(f"lfp must be a table of LFP settings, got {value!r}")
        if lfp is not None:
            per_tick = self.tick_s / lfp.chunk_s
            if abs(per_tick - round(per_tick)) > 1e-6:
                raise ValueError(f"lfp.chunk_s ({lfp.chunk_s}) must divide tick_s ({self.tick_s}) into whole chunks")
        object.__setattr__(self, "lfp", lfp)

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
        d = known_keys(cls, d, "simulation")
        try:
            return cls(**d)
        except ValueError as exc:
            raise ValueError(f"[simulation] {exc}") from None

    @property
    def samples_per_tick(self) -> int:
        """Acquisition samples in one tick."""
        return int(round(self.tick_s * self.acquisition_rate_hz))

    @property
    def gain_interval_ticks(self) -> int:
        """Ticks over which one draw of the rate gain holds (``gain_interval_s``, at least one tick)."""
        return max(1, int(round(self.gain_interval_s / self.tick_s)))
