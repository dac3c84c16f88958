"""The encoding model: place-cell rate maps learned online from a live session.

A :class:`PlaceModel` is fed tracker frames and spikes as a session delivers
them (the online counting is :class:`decoder.encoding.online_counts.OnlineCounts`'s)
and fits smoothed rate maps and per-unit figures from the counts whenever
asked, as often as asked. Beside it: :mod:`decoder.encoding.rate_maps` (the
visited bins and smoothed maps from totals), :mod:`decoder.encoding.readiness` (how
far a session has come), :mod:`decoder.encoding.cross_validation` (blocked
folds and the held-out decoding error) and :mod:`decoder.encoding.model_file`
(the versioned ``.npz`` file, which needs no pickle to load).
"""

from __future__ import annotations

import logging
import math
import os
from typing import Any

import numpy as np

from decoder.encoding.calibration import TemperatureFit, fit_drift, fit_temperature
from decoder.encoding.cross_validation import CrossValidatedError, cv_block, held_out_error
from decoder.encoding.heading_metrics import HeadingTuning, heading_tuning
from decoder.encoding.heading_motion import choose_heading_velocity, tracked_heading_noise_deg
from decoder.encoding.held_out import HeldOutSpikes
from decoder.encoding.mark_model import MarkModel
from decoder.encoding.model_file import (
    FORMAT_NAME,
    FORMAT_VERSION,
    ModelFileError,
    read_model_file,
    write_model_file,
)
from decoder.encoding.movement import MovementModel, default_uniform_weight
from decoder.encoding.online_counts import OnlineCounts
from decoder.encoding.rate_maps import smoothed_rate_maps, visited_bins
from decoder.encoding.readiness import Readiness, coarse_counts, coarse_tuning_grid, count_tuned, count_tuned_units
from decoder.encoding.spatial_metrics import field_size, skaggs_information, sparsity
from decoder.encoding.tracked_steps import tracked_at
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Environment, HeadingRing

logger = logging.getLogger(__name__)

#: Most held-out steps the temperature is fitted on: the newest minute at 20 ms
#: steps. Each of the fit's passes decodes them all: about nine for the
#: temperature, four for the drift and five to refit the temperature with it
#: (bench/decoder.py times the whole fit).
MAX_CALIBRATION_STEPS = 3_000

#: Names of the mark model's arrays in a model file that holds one.
_MARKS_PREFIX = "marks__"

__all__ = ["PlaceModel", "Readiness", "CrossValidatedError", "ModelFileError", "FORMAT_NAME", "FORMAT_VERSION"]


class PlaceModel(OnlineCounts):
    """Place-cell rate maps learned online, with blocked cross-validation.

    Parameters
    ----------
    environment : decoder.space.environments.Environment
        Where the animal runs; gives the bins, the smoothing and distances.
    min_speed_cm_s : float, default 3.0
        Frames slower than this are left out of occupancy and spikes; 2-5
        cm/s excludes immobility and the sharp-wave ripple states that come
        with it (common practice).
    speed_window_s : float, default 0.25
        Length of the window over which running speed is fitted, s.
    smooth_cm : float, default 5.0
        Standard deviation of the Gaussian that smooths spike counts and
        occupancy before they are divided, cm; 0 turns smoothing off.
    min_occupancy_s : float, default 0.1
        Bins with less running time are left out of the maps, s.
    rate_floor_hz : float, default 0.01
        Smallest rate in a visited bin, so that no log-likelihood is -inf.
    max_frame_gap_s : float, default 0.5
        Longer intervals between valid frames are tracking gaps: neither
        occupancy nor spikes are counted in them.
    max_spike_delay_s : float, default 5.0
        How far behind the newest frame a spike may arrive and still be
        placed; frames are kept this long.
    cv_folds : int, default 5
        Number of cross-validation folds.
    cv_block_s : float, default 60.0
        Data time is cut into blocks this long; block ``b`` belongs to fold
        ``b mod cv_folds``, so folds are contiguous stretches, never random frames.
    cv_window_s : float, default 0.5
        Spike-count window around each evaluation sample, s.
    unit_ids : sequence of int, optional
        The units to learn, in the order of the model's rows. Spikes from
        other units are dropped and counted. By default every unit seen is
        learned and rows are in ascending unit id.

    Attributes
    ----------
    unit_ids_ : ndarray of int64, shape (n_units,)
        Unit id of each row.
    rate_maps_hz_ : ndarray of float64, shape (n_units, n_bins)
        Smoothed rate maps; at least ``rate_floor_hz`` inside
        ``visited_mask_``, 0 outside it.
    occupancy_s_ : ndarray of float64, shape (n_bins,)
        Running time per bin (unsmoothed).
    visited_mask_ : ndarray of bool, shape (n_bins,)
        Valid bins with at least ``min_occupancy_s`` of running.
    info_bits_per_spike_, info_bits_per_s_ : ndarray, shape (n_units,)
        Skaggs information of each map.
    sparsity_ : ndarray, shape (n_units,)
    peak_rate_hz_ : ndarray, shape (n_units,)
    mean_rate_hz_ : ndarray, shape (n_units,)
        Occupancy-weighted mean of each map, Hz.
    field_size_ : ndarray, shape (n_units,)
        Size of the field around each peak (20% of peak), cm² in an arena, cm on a track.
    walk_variance_cm2_per_s_ : float
        Variance of the movement model's random walk per second of data,
        cm² (``MovementModel.from_tracking`` on the newest half hour of
        tracked frames; its variance per step is linear in the step). NaN
        when the frames could not tell (too few, or no movement).
    temperature_fits_ : dict of float to TemperatureFit
        The likelihood temperature fitted for each decoding step (s) asked
        of :meth:`likelihood_temperature` since the last :meth:`fit`, with
        the point estimate chosen beside it (:meth:`point_estimate`), and
        saved with the model.
    counters_ : dict of str to int
        What was received and what was dropped, and why.
    mark_model_ : MarkModel or None
        The mark model the session fitted beside it (clusterless decoding),
        saved in the same file and fitted again on loading; None by default.
    heading_tuning_ : HeadingTuning or None
        On a heading ring, each unit's preferred direction, mean vector
        length, tuning width and Rayleigh p (``decoder.encoding.heading_metrics``);
        None elsewhere. Recomputed by :meth:`fit` and on loading, not stored in the model file.

    Examples
    --------
    >>> from decoder.space.environments import Arena
    >>> box = Arena.rectangle(width_cm=40, height_cm=40, bin_cm=10)
    >>> model = PlaceModel(box, smooth_cm=0.0, min_occupancy_s=0.0)
    >>> t = np.arange(0, 4.0, 0.02)
    >>> model.update_frames(t, np.column_stack([5 + 7.5 * t, np.full(t.size, 5.0)]))
    >>> model.update_spikes(np.array([1.01, 1.51]), np.array([7, 7]))
    >>> model.fit().unit_ids_.tolist()
    [7]
    >>> model.counters_["spikes_placed"]
    2
    """

    def __init__(self, environment: Environment, **settings: Any) -> None:
        super().__init__(environment, **settings)
        self._held_out = HeldOutSpikes()
        self.temperature_fits_: dict[float, TemperatureFit] = {}
        self.mark_model_: MarkModel | None = None

    def update_spikes(self, t_s: Any, unit_ids: Any) -> None:
        """Add spikes; see :meth:`OnlineCounts.update_spikes`. The newest are also kept for calibration."""
        super().update_spikes(t_s, unit_ids)
        self._held_out.add(t_s, unit_ids)

    # ------------------------------------------------------------------
    # Estimation
    # ------------------------------------------------------------------

    def _rate_maps(
        self, counts: np.ndarray, occupancy: np.ndarray, env: Environment | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Smoothed rate maps (n_units, n_bins) and the visited mask from totals, on ``env`` (the model's)."""
        return smoothed_rate_maps(
            self.environment if env is None else env, counts, occupancy, smooth_cm=self.smooth_cm,
            min_occupancy_s=self.min_occupancy_s, rate_floor_hz=self.rate_floor_hz, min_speed_cm_s=self.min_speed_cm_s,
        )

    def fit(self) -> PlaceModel:
        """Compute rate maps and per-unit figures from everything settled so far.

        Can be called any number of times during a session; updates may
        continue afterwards.

        Returns
        -------
        self
        """
        self._flush()
        counts, occupancy = self._totals()
        rates, visited = self._rate_maps(counts, occupancy)
        occ_visited = np.where(visited, occupancy, 0.0)
        self.unit_ids_ = np.asarray(self._unit_list, dtype=np.int64)[self._output_order()]
        self.rate_maps_hz_ = rates
        self.occupancy_s_ = occupancy
        self.visited_mask_ = visited
        self.info_bits_per_spike_, self.info_bits_per_s_ = skaggs_information(rates, occ_visited)
        self.sparsity_ = sparsity(rates, occ_visited)
        self.peak_rate_hz_ = rates.max(axis=1, initial=0.0)
        self.mean_rate_hz_ = rates @ (occ_visited / occ_visited.sum())
        self.field_size_ = field_size(rates, self.environment, visited)
        self.walk_variance_cm2_per_s_ = self._learn_walk_variance()
        self.heading_tuning_ = self._heading_tuning(counts)
        self.temperature_fits_ = {}
        # The totals these figures came from, for readiness() to reuse them while nothing new is counted.
        self._fitted_revision = self._revision
        logger.info(
            "fitted %d units on %d visited bins from %.1f s of running",
            len(self.unit_ids_), int(visited.sum()), occupancy.sum(),
        )
        return self

    def _heading_tuning(self, counts: np.ndarray) -> HeadingTuning | None:
        """Head-direction figures of the fitted maps on a heading ring; None elsewhere."""
        if not isinstance(self.environment, HeadingRing):
            return None
        return heading_tuning(self.rate_maps_hz_, self.environment, self.visited_mask_, counts.sum(axis=1))

    def _learn_walk_variance(self) -> float:
        t, xy = self.movement_frames()
        try:
            # Over a step of 1 s the walk's s.d. squared is its variance per second.
            return MovementModel.from_tracking(t, xy, 1.0, environment=self.environment).sd_cm ** 2
        except ValueError as exc:
            logger.warning("no movement model learned: %s", exc)
            return math.nan

    def movement_model(self, step_s: float) -> MovementModel:
        """The learned movement model for decoding steps of ``step_s``.

        Parameters
        ----------
        step_s : float

        Returns
        -------
        MovementModel
            S.d. ``sqrt(walk_variance_cm2_per_s_ * step_s)`` and the default
            uniform jump, ``movement.default_uniform_weight(step_s)``.

        Raises
        ------
        ValueError
            When the model is not fitted or learned no movement model.
        """
        variance = getattr(self, "walk_variance_cm2_per_s_", math.nan)
        if not variance > 0:
            raise ValueError(
                "the place model has no learned movement model (not fitted, too few tracked frames, or saved "
                "without one); fit it again on a session with tracking"
            )
        return MovementModel(math.sqrt(variance * step_s), default_uniform_weight(step_s), step_s)

    def fold_of(self, t_s: np.ndarray) -> np.ndarray:
        """The cross-validation fold (int64, shape (n,)) of each data time: ``cv_block`` mod ``cv_folds``; 0 before any frame."""
        t = np.asarray(t_s, np.float64)
        if self._t0 is None:
            return np.zeros(t.shape, np.int64)
        return (cv_block(t, self._t0, self.cv_block_s).astype(np.int64) % self.cv_folds).astype(np.int64)

    def calibrate(self, step_s: float, marks: MarkModel | None = None, max_marks: int | None = None) -> TemperatureFit:
        """Fit (again) the temperature, drift and point estimate of :meth:`likelihood_temperature`, with marks if given.

        With ``marks`` (a fitted ``MarkModel`` learned beside this model, its
        spikes in the folds of :meth:`fold_of`) each held-out step is decoded
        with its waveform marks too (at most ``max_marks`` of them, as a live
        step), weighed by ``marks.without_fold`` of the step's fold, on the
        steps both hold (``marks.held_out`` alone if this model holds no spike).
        Kept in :attr:`temperature_fits_`; ValueError as :meth:`likelihood_temperature`.
        """
        step_s = float(step_s)
        self.temperature_fits_[step_s] = self._fit_temperature(step_s, marks, max_marks)
        return self.temperature_fits_[step_s]

    def likelihood_temperature(self, step_s: float) -> float:
        """The likelihood temperature for decoding steps of ``step_s``, fitted on first asking.

        The fit (:mod:`decoder.encoding.calibration`) decodes the newest
        held-out steps of the learning period, at most
        ``MAX_CALIBRATION_STEPS`` of them, each block of ``cv_block_s`` with
        the maps of the folds that did not see it, with this model's
        movement model, and chooses the temperature whose 95 % HPD regions
        hold the tracked position as often as their mass says. It is kept in
        :attr:`temperature_fits_` (and in the model file).

        Parameters
        ----------
        step_s : float

        Returns
        -------
        float
            The fitted temperature (>= 1).

        Raises
        ------
        ValueError
            When the model is not fitted, has no movement model, or holds no
            held-out steps with a tracked position (a model loaded from a
            file keeps only the temperatures fitted before it was saved).
        """
        step_s = float(step_s)
        if step_s not in self.temperature_fits_:
            self.temperature_fits_[step_s] = self._fit_temperature(step_s)
        return self.temperature_fits_[step_s].temperature

    def point_estimate(self, step_s: float) -> str:
        """The decoded position for steps of ``step_s``: ``"map"`` or ``"mean"``, chosen with the temperature.

        :meth:`likelihood_temperature`'s fit scores both on the same
        held-out steps (``decoder.encoding.calibration``); a model file
        written before that choice was made says ``"map"``. ValueError as
        :meth:`likelihood_temperature`.
        """
        self.likelihood_temperature(step_s)
        return self.temperature_fits_[float(step_s)].point_estimate

    def drift(self, step_s: float) -> tuple[float, float]:
        """The filter's drift for steps of ``step_s``: gain and velocity time constant (s), fitted with the temperature.

        :meth:`likelihood_temperature`'s fit chooses them on the same
        held-out steps (``decoder.encoding.calibration.fit_drift``); a model
        file written before the drift was fitted says gain 0, the plain
        walk. ValueError as :meth:`likelihood_temperature`.
        """
        self.likelihood_temperature(step_s)
        fit = self.temperature_fits_[float(step_s)]
        return fit.drift_gain, fit.velocity_time_constant_s

    def _fit_temperature(self, step_s: float, marks: MarkModel | None = None, max_marks: int | None = None) -> TemperatureFit:
        if not hasattr(self, "rate_maps_hz_"):
            raise ValueError("the place model is not fitted; fit it before asking for its likelihood temperature")
        movement = self.movement_model(step_s)
        env, rates, visited = self.environment, self.rate_maps_hz_, self.visited_mask_
        first, last = self._held_out.step_range(step_s)
        # No unit fired while learning: a session of marks alone, its units announced or not.
        units_held = last >= first
        if marks is not None:
            # The steps whose every spike is held, of units and marks alike.
            mark_first, mark_last = marks.held_out.step_range(step_s)
            first, last = (max(first, mark_first), min(last, mark_last)) if units_held else (mark_first, mark_last)
        steps = (max(first, last - MAX_CALIBRATION_STEPS + 1), last)
        ends = np.arange(steps[0], steps[1] + 1) * step_s
        counts = np.zeros((ends.size, self.unit_ids_.size), np.int64)
        if units_held:
            ends, counts = self._held_out.step_counts(step_s, self.unit_ids_, steps)
        true_bins, true_xy = self._tracked_at(ends)
        if ends.size < 2 or not np.any(true_bins >= 0):
            raise ValueError(
                "no held-out learning steps with a tracked position to fit the likelihood temperature on "
                "(a loaded model keeps only the temperatures fitted before it was saved); learn again"
            )
        block = cv_block(ends, self._t0, self.cv_block_s).astype(np.int64)
        # Contiguous runs of one block, each with the maps of the folds that did not see it;
        # a single run is cut in two, since the fit wants two sequences at least.
        cuts = np.flatnonzero(np.diff(block)) + 1
        if cuts.size == 0:
            cuts = np.array([ends.size // 2])
        fold_maps, fold_counts, fold_bins, fold_xy, maps_of_fold = [], [], [], [], {}
        fold_terms, marks_of_fold = [], {}
        if marks is not None:
            _, step_index, group_ids, marks_uv = marks.held_out.step_spikes(step_s, steps)
        for run in np.split(np.arange(ends.size), cuts):
            fold = int(block[run[0]] % self.cv_folds)
            if fold not in maps_of_fold:
                unit_counts, fold_occupancy = self._totals(exclude_fold=fold)
                fold_rates, fold_visited = self._rate_maps(unit_counts, fold_occupancy)
                # Bins the other folds never reached keep the full maps, rather
                # than a floor rate that would draw the posterior there.
                maps_of_fold[fold] = np.where(fold_visited, fold_rates, rates)
                if marks is not None:
                    # Likewise the marks: the full occupancy where the other folds never ran.
                    marks_of_fold[fold] = marks.without_fold(
                        fold, np.where(fold_visited, fold_occupancy, self.occupancy_s_), visited, fold_visited)
            fold_maps.append(maps_of_fold[fold])
            fold_counts.append(counts[run])
            fold_bins.append(true_bins[run])
            fold_xy.append(true_xy[run])
            if marks is not None:
                a, b = np.searchsorted(step_index, [run[0], run[-1] + 1])
                fold_terms.append(marks_of_fold[fold].step_terms(step_index[a:b] - run[0], group_ids[a:b],
                                                                 marks_uv[a:b], run.size, step_s, max_marks))
        walk = RandomWalk(env, visited, movement.walk_sd_cm(env.bin_cm))
        common = dict(uniform_weight=movement.uniform_weight, rate_floor_hz=self.rate_floor_hz,
                      fold_mark_terms=fold_terms if marks is not None else None)
        # A heading ring's held-out steps are scored against the tracked heading's predictive distribution.
        frame_t, frame_xy = self.movement_frames()
        noise = tracked_heading_noise_deg(env, frame_t, frame_xy, ends, self.max_frame_gap_s)
        fit = fit_temperature(fold_maps, fold_counts, fold_bins, step_s, walk, fold_true_xy_cm=fold_xy,
                              tracked_noise_sd=noise, **common)
        # The drift is chosen at the plain walk's temperature, then the temperature refitted for it.
        drift = fit_drift(fold_maps, fold_counts, fold_xy, step_s, walk, temperature=fit.temperature,
                          median_without_cm=min(fit.map_median_cm, fit.mean_median_cm), **common)
        if drift.gain > 0:
            fit = fit_temperature(fold_maps, fold_counts, fold_bins, step_s, walk, fold_true_xy_cm=fold_xy,
                                  drift=drift, near=fit, tracked_noise_sd=noise, **common)
        fit = choose_heading_velocity(fit, fold_maps, fold_counts, fold_xy, step_s, walk, frame_t, frame_xy,
                                      tracked_noise_sd=noise, **common)
        logger.info(
            "likelihood temperature %.2f for %g s steps%s: held-out 95%% HPD coverage %.3f (%.3f at 1) over %d steps; "
            "decoded position the %s (held-out median %.2f cm; MAP %.2f, mean %.2f); drift gain %.2f on the decoded "
            "velocity over %.2f s (held-out median %.2f cm, %.2f without)",
            fit.temperature, step_s, " with waveform marks" if fit.with_marks else "", fit.coverage,
            fit.coverage_at_1, fit.n_steps, fit.point_estimate,
            min(fit.map_median_cm, fit.mean_median_cm), fit.map_median_cm, fit.mean_median_cm, drift.gain,
            drift.velocity_time_constant_s, drift.median_cm, drift.median_without_cm,
        )
        return fit

    def _tracked_at(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tracked bin (n,) and position (n, 2) at each time (``tracked_steps.tracked_at``): -1 and NaN in a gap."""
        return tracked_at(self.environment, *self.movement_frames(), t_s, self.max_frame_gap_s)

    def readiness(self, *, with_cv_error: bool = False) -> Readiness:
        """Summarise coverage, running time and tuning so far, without changing the fit.

        Parameters
        ----------
        with_cv_error : bool, default False
            Also run :meth:`cross_validated_error_cm` (decodes every sample
            once); NaN while there is too little data to cross-validate.

        Returns
        -------
        Readiness

        See Also
        --------
        n_tuned_units_so_far : a cheaper count of tuned units while learning.
        """
        self._flush()
        counts, occupancy = self._totals()
        valid = self.environment.valid_mask
        if getattr(self, "_fitted_revision", None) == self._revision:
            # Nothing counted since fit(): its maps are what the totals give, bit for bit.
            visited = self.visited_mask_
            n_tuned = count_tuned(self.info_bits_per_spike_, self.peak_rate_hz_)
        else:
            visited = visited_bins(self.environment, occupancy, self.smooth_cm, self.min_occupancy_s)
            n_tuned = self._count_tuned(counts, occupancy, self.environment)
        cv = None
        if with_cv_error:
            try:
                cv = self.cross_validated_error_cm().median_cm
            except ValueError as exc:
                logger.info("no cross-validated error yet: %s", exc)
                cv = math.nan
        return Readiness(
            coverage=float(visited.sum() / valid.sum()),
            running_time_s=float(occupancy.sum()),
            unit_ids=np.asarray(self._unit_list, dtype=np.int64)[self._output_order()],
            spikes_per_unit=counts.sum(axis=1),
            n_tuned_units=n_tuned,
            median_cv_error_cm=cv,
            walk_sd_cm_per_sqrt_s=math.sqrt(getattr(self, "walk_variance_cm2_per_s_", math.nan)),
        )

    def _count_tuned(self, counts: np.ndarray, occupancy: np.ndarray, env: Environment) -> int:
        """Units whose maps on ``env`` pass the tuning thresholds (0 before any bin is visited)."""
        visited = visited_bins(env, occupancy, self.smooth_cm, self.min_occupancy_s)
        if not (np.any(visited) and len(counts)):
            return 0
        rates, visited = self._rate_maps(counts, occupancy, env)
        return count_tuned_units(rates, np.where(visited, occupancy, 0.0))

    def n_tuned_units_so_far(self) -> int:
        """Spatially tuned units so far, cheaply enough to ask every few seconds while learning.

        The same test as :attr:`Readiness.n_tuned_units` (at least 0.5
        bits/spike and a peak of at least 1 Hz) on the same smoothing and
        occupancy threshold, but in an arena on a grid of ``f * bin_cm``
        bins, ``f = floor(smooth_cm / bin_cm)``: the Gaussian of
        ``smooth_cm`` already averages over such a bin, so the figures change
        little while the work falls by about ``f**3``. Where ``f < 2``, and on
        tracks and graphs, the grid is the model's own and the count equals
        ``readiness().n_tuned_units`` exactly. The counts on the coarser grid
        are kept from the first call on; it does not change the fit.

        Returns
        -------
        int
        """
        self._flush()
        env, to_grid = self._tuning_grid()
        n = len(self._unit_list)
        counts = self._tuning_counts[:n][self._output_order()]
        occupancy = self._fold_occ.sum(axis=0)
        if env is not self.environment:
            into = to_grid >= 0
            occupancy = np.bincount(to_grid[into], weights=occupancy[into], minlength=env.n_bins)
        return self._count_tuned(counts, occupancy, env)

    def _tuning_grid(self) -> tuple[Environment, np.ndarray]:
        """The grid of :meth:`n_tuned_units_so_far` and the grid bin of each model bin (-1: none).

        Made on the first call, with its spike counts so far; from then on
        :meth:`_place_spikes` keeps those counts too.
        """
        if self._tuning is None:
            grid, to_grid = coarse_tuning_grid(self.environment, self.smooth_cm)
            self._tuning = (grid, to_grid)
            n = len(self._unit_list)
            fine = self._fold_counts[:, :n].sum(axis=0, dtype=np.int64)
            self._tuning_counts = np.zeros((self._fold_counts.shape[1], grid.n_bins), dtype=np.int64)
            self._tuning_counts[:n] = coarse_counts(fine, to_grid, grid.n_bins)
        return self._tuning

    def cross_validated_error_cm(self) -> CrossValidatedError:
        """Median decoding error on held-out folds.

        For each fold, rate maps are fitted on the other folds and every
        evaluation sample of the held-out fold is decoded with a uniform
        prior from the spikes within ``cv_window_s`` around it (see
        :func:`decoder.encoding.cross_validation.held_out_error`). Samples
        whose window holds no spike carry no information and are skipped.

        Returns
        -------
        CrossValidatedError
        """
        self._flush()
        sample, row, count = self._cv_counts()

        def fit_without(fold: int) -> tuple[np.ndarray, np.ndarray] | None:
            counts, occupancy = self._totals(exclude_fold=fold)
            if not np.any(occupancy >= max(self.min_occupancy_s, np.finfo(float).tiny)):
                return None
            return self._rate_maps(counts, occupancy)

        return held_out_error(
            self.environment, sample, row, count, self._cv_fold, self._cv_xy, self.cv_folds, fit_without,
            self.cv_window_s, self.rate_floor_hz,
        )

    # ------------------------------------------------------------------
    # Model file
    # ------------------------------------------------------------------

    _LEARNED = (
        "unit_ids_", "rate_maps_hz_", "occupancy_s_", "visited_mask_", "info_bits_per_spike_",
        "info_bits_per_s_", "sparsity_", "peak_rate_hz_", "mean_rate_hz_", "field_size_",
    )

    def _settings(self) -> dict[str, Any]:
        ids = None if self.unit_ids is None else [int(u) for u in np.asarray(self.unit_ids).tolist()]
        return {
            "min_speed_cm_s": self.min_speed_cm_s,
            "speed_window_s": self.speed_window_s,
            "smooth_cm": self.smooth_cm,
            "min_occupancy_s": self.min_occupancy_s,
            "rate_floor_hz": self.rate_floor_hz,
            "max_frame_gap_s": self.max_frame_gap_s,
            "max_spike_delay_s": self.max_spike_delay_s,
            "cv_folds": self.cv_folds,
            "cv_block_s": self.cv_block_s,
            "cv_window_s": self.cv_window_s,
            "unit_ids": ids,
        }

    def save(self, path: str | os.PathLike) -> None:
        """Write the model to one ``.npz`` file, replacing it atomically.

        The file holds the settings, the environment, the accumulated
        occupancy and counts per fold, the evaluation samples and, if
        :meth:`fit` was called, the learned maps and figures. Frames and
        spikes still waiting to be settled are not saved. The container is
        :mod:`decoder.encoding.model_file`'s.

        Parameters
        ----------
        path : str or path-like
            Written exactly as given (no suffix is added).
        """
        self._flush()
        fitted = hasattr(self, "rate_maps_hz_")
        header = {
            "environment": self.environment.to_dict(),
            "settings": self._settings(),
            "unit_list": self._unit_list,
            "counters": self._counters,
            "t0_s": self._t0,
            "running_s": self._running_s,
            "fitted": fitted,
            "walk_variance_cm2_per_s": getattr(self, "walk_variance_cm2_per_s_", math.nan) if fitted else math.nan,
            "temperature_fits": [{"step_s": step_s, **vars(fit)} for step_s, fit in self.temperature_fits_.items()],
        }
        if self._cv_pairs:
            sample, row = (np.concatenate(parts) for parts in zip(*self._cv_pairs))
        else:
            sample = row = np.zeros(0, dtype=np.int64)
        arrays = {
            "fold_occupancy_s": self._fold_occ,
            "fold_spike_counts": self._fold_counts[:, : self.n_units],
            "cv_t_s": self._cv_t,
            "cv_xy_cm": self._cv_xy,
            "cv_fold": self._cv_fold,
            "cv_pair_sample": sample,
            "cv_pair_row": row,
        }
        if fitted:
            arrays.update({name.rstrip("_"): getattr(self, name) for name in self._LEARNED})
        if self.mark_model_ is not None:
            header["marks"], mark_arrays = self.mark_model_.file_parts()
            arrays.update({_MARKS_PREFIX + name: a for name, a in mark_arrays.items()})
        path = write_model_file(path, header, arrays)
        logger.info("saved place model (%d units) to %s", self.n_units, path)

    @classmethod
    def load(cls, path: str | os.PathLike) -> PlaceModel:
        """Read a model written by :meth:`save`.

        Parameters
        ----------
        path : str or path-like

        Returns
        -------
        PlaceModel
            Ready to decode (if it was fitted when saved) and to take more
            updates; its frame history starts empty.

        Raises
        ------
        ModelFileError
            If the file is not a place-model file, was written in another
            format version, or is truncated or damaged.
        """
        return read_model_file(path, cls._from_parts)

    @classmethod
    def _from_parts(cls, header: dict[str, Any], arrays: dict[str, np.ndarray]) -> PlaceModel:
        model = cls(Environment.from_dict(header["environment"]), **header["settings"])
        for uid in header["unit_list"]:
            if int(uid) not in model._unit_row:
                model._add_unit(int(uid))
        n_units, n_bins, folds = model.n_units, model.environment.n_bins, model.cv_folds
        counts = arrays["fold_spike_counts"]
        occ = arrays["fold_occupancy_s"]
        if counts.shape != (folds, n_units, n_bins) or occ.shape != (folds, n_bins):
            raise ValueError("the accumulated arrays do not match the header's units, bins and folds")
        model._fold_counts = np.zeros((folds, max(n_units, 1), n_bins), np.int32)
        model._fold_counts[:, :n_units] = counts
        model._fold_occ = occ.astype(np.float64)
        model._counters.update({k: int(v) for k, v in header["counters"].items() if k in model._counters})
        model._t0 = header["t0_s"]
        model._running_s = float(header["running_s"])
        model._cv_t, model._cv_xy = arrays["cv_t_s"], arrays["cv_xy_cm"]
        model._cv_fold = arrays["cv_fold"]
        if len(arrays["cv_pair_sample"]):
            model._cv_pairs = [(arrays["cv_pair_sample"], arrays["cv_pair_row"])]
        if header["fitted"]:
            for name in cls._LEARNED:
                setattr(model, name, arrays[name.rstrip("_")])
            # Files written before the movement model was learned have none.
            model.walk_variance_cm2_per_s_ = float(header.get("walk_variance_cm2_per_s", math.nan))
            model.temperature_fits_ = {
                float(fit.pop("step_s")): TemperatureFit(**fit) for fit in header.get("temperature_fits", [])
            }
            if model.rate_maps_hz_.shape != (len(model.unit_ids_), n_bins):
                raise ValueError("the rate maps do not match the header's units and bins")
            model.heading_tuning_ = model._heading_tuning(model._totals()[0])
        if "marks" in header:
            marks = {name[len(_MARKS_PREFIX):]: a for name, a in arrays.items() if name.startswith(_MARKS_PREFIX)}
            model.mark_model_ = MarkModel.from_parts(header["marks"], marks)
            if header["fitted"]:
                model.mark_model_.fit(model.occupancy_s_, model.visited_mask_)
        return model
