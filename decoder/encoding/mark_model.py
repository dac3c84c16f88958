"""The mark encoding model: clusterless decoding from spike waveform features.

:class:`MarkModel` learns, during the same learning part of a session as the
place model, each electrode group's spikes with their marks (amplitudes in uV
on the group's channels) and the position where they occurred, and from them
the marked point-process intensity ``lambda_g(x, m)`` and the ground-process
rate ``Lambda_g(x)`` of every group (Kloosterman et al. 2014; Deng et al.
2015; the arithmetic is in ``decoder.inference._mark_kernels``). No spike is
ever assigned to a unit.

Memory is bounded: each group keeps at most ``max_spikes_per_group`` spikes,
a uniform sample of all its placed spikes drawn by reservoir sampling
(Vitter 1985) with a generator seeded from ``seed`` and the group id, so a
replay of the same messages keeps the same spikes. The intensity is scaled
by placed over kept spikes, and the ground process counts every placed
spike, so a capped group is not rarer for the decoder. Occupancy comes from
the place model learned alongside (the same frames, speed filter and
smoothing), so the two likelihoods share their denominator.

Calibration: each spike is learned with the place model's cross-validation
fold of its time, kept with the kept spikes and counted by fold in the
ground process, so :meth:`MarkModel.without_fold` fits the model that has
not seen a fold; the newest marked spikes, running or not, are kept in
:attr:`MarkModel.held_out` (``decoder.encoding.held_out``) for the held-out
steps the likelihood temperature is fitted on
(``PlaceModel.calibrate``).

References
----------
Kloosterman F, Layton SP, Chen Z, Wilson MA (2014). Bayesian decoding using
unsorted spikes in the rat hippocampus. J Neurophysiol 111:217-227.

Deng X, Liu DF, Kay K, Frank LM, Eden UT (2015). Clusterless decoding of
position from multiunit activity using a marked point process filter.
Neural Comput 27:1438-1460.

Vitter JS (1985). Random sampling with a reservoir. ACM Trans Math Softw
11:37-57.
"""

from __future__ import annotations

import logging
import math
import os
from typing import Any

import numpy as np

from decoder.encoding.held_out import HeldOutSpikes
from decoder.encoding.model_file import read_model_file, write_model_file
from decoder.encoding.spatial_metrics import skaggs_information
from decoder.inference import _mark_kernels
from decoder.inference.checks import positive_finite
from decoder.messages import MAX_MARK_CHANNELS
from decoder.space.environments import Environment

logger = logging.getLogger(__name__)

#: Name written into a mark model file's header.
FILE_FORMAT = "placeloop.mark_model"

#: A group is spatially informative above this many bits per spike (Skaggs
#: information of its ground process). The ground process mixes every cell
#: of the tetrode, whose fields average out, so it carries far less than any
#: one place cell (0.2-0.5 bits/spike is common for single units); the
#: figure here is our own choice, from simulated tetrodes of five place cells.
INFORMATIVE_BITS_PER_SPIKE = 0.01

#: Rows of the identity smoothed at once while building the operator.
_SPREAD_CHUNK = 256


class MarkModel:
    """Marked point-process encoding model of every electrode group, learned online.

    Parameters
    ----------
    environment : Environment
    bandwidth_uv : float, default 20.0
        S.d. of the Gaussian product kernel in mark space, uV, on every channel.
    smooth_cm : float, default 4.0
        S.d. of the Gaussian smoothing over position, cm (the place model's).
    min_speed_cm_s : float, default 3.0
        Spikes while the animal runs slower than this are not learned.
    max_spikes_per_group : int, default 20000
        Spikes kept per group (reservoir sampling).
    cutoff_sd : float, default 4.0
        Encoding spikes further than this many kernel s.d. on any channel weigh 0.
    rate_floor_hz : float, default 0.01
        Floor of each group's ground-process rate, and of each spike's
        intensity as ``rate_floor_hz`` times the kernel's peak density.
    seed : int, default 13
        Seed of the reservoir sampling.
    merge_sd : float, default 0.0
        Kernel density compression at fit time: encoding marks of one
        position bin within this many kernel s.d. of each other become one
        weighted kernel (Sodkomkham et al. 2016), which cuts the work per
        decoded spike several-fold at a small bias; 0 keeps every mark.

    Attributes
    ----------
    group_ids_ : ndarray of int64, shape (n_groups,)
        Groups in model-row order (after :meth:`fit`).
    ground_rate_hz_ : ndarray of float64, shape (n_groups, n_bins)
        Occupancy-normalised rate of all spikes of each group.
    valid_mask_ : ndarray of bool, shape (n_bins,)
    info_bits_per_spike_ : ndarray of float64, shape (n_groups,)
    held_out : HeldOutSpikes
        The newest marked spikes given a time in :meth:`update`, by group
        id, with their marks: the held-out steps of calibration.

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (100, 0), bin_cm=10)
    >>> model = MarkModel(track, bandwidth_uv=10.0)
    >>> model.add_group(3, 4)
    >>> model.update(np.array([3, 3]), np.full((2, 4), 80.0, np.float32), np.array([[15.0, 0], [55, 0]]),
    ...              np.array([10.0, 10.0]))
    2
    >>> model.fit(np.full(10, 2.0), track.valid_mask).group_ids_.tolist()
    [3]
    """

    def __init__(self, environment: Environment, *, bandwidth_uv: float = 20.0, smooth_cm: float = 4.0,
                 min_speed_cm_s: float = 3.0, max_spikes_per_group: int = 20_000, cutoff_sd: float = 4.0,
                 rate_floor_hz: float = 0.01, seed: int = 13, merge_sd: float = 0.0) -> None:
        self.environment = environment
        self.bandwidth_uv = positive_finite("bandwidth_uv", bandwidth_uv)
        self.smooth_cm = positive_finite("smooth_cm", smooth_cm)
        self.cutoff_sd = positive_finite("cutoff_sd", cutoff_sd)
        self.rate_floor_hz = positive_finite("rate_floor_hz", rate_floor_hz)
        if not (isinstance(min_speed_cm_s, (int, float)) and math.isfinite(min_speed_cm_s) and min_speed_cm_s >= 0):
            raise ValueError(f"min_speed_cm_s must be a finite number >= 0, got {min_speed_cm_s!r}")
        self.min_speed_cm_s = float(min_speed_cm_s)
        if isinstance(max_spikes_per_group, bool) or not isinstance(max_spikes_per_group, int) or max_spikes_per_group < 1:
            raise ValueError(f"max_spikes_per_group must be a positive integer, got {max_spikes_per_group!r}")
        self.max_spikes_per_group = max_spikes_per_group
        self.seed = int(seed)
        if not (isinstance(merge_sd, (int, float)) and math.isfinite(merge_sd) and merge_sd >= 0):
            raise ValueError(f"merge_sd must be a finite number >= 0, got {merge_sd!r}")
        self.merge_sd = float(merge_sd)
        self._row: dict[int, int] = {}
        self._ids: list[int] = []
        self._channels: list[int] = []
        self._marks: list[np.ndarray] = []
        self._bins: list[np.ndarray] = []
        self._kept: list[int] = []
        # Each kept spike's cross-validation fold, and the placed spikes counted by fold (n_folds_seen, n_bins).
        self._folds: list[np.ndarray] = []
        self._placed_counts: list[np.ndarray] = []
        self._rngs: list[np.random.Generator] = []
        self.counters_ = {"spikes_received": 0, "spikes_placed": 0, "spikes_not_running": 0,
                          "spikes_outside_environment": 0}
        self.held_out = HeldOutSpikes()

    # -- learning ------------------------------------------------------------

    @property
    def n_groups(self) -> int:
        return len(self._ids)

    def channels_of(self, group_id: int) -> int | None:
        """Channels of a known group, or None."""
        row = self._row.get(int(group_id))
        return None if row is None else self._channels[row]

    def add_group(self, group_id: int, n_channels: int) -> None:
        """Learn a group of ``n_channels`` channels (known groups keep theirs: ValueError if it differs)."""
        group_id, n_channels = int(group_id), int(n_channels)
        if not 1 <= n_channels <= MAX_MARK_CHANNELS:
            raise ValueError(f"group {group_id}: a group has 1 to {MAX_MARK_CHANNELS} channels, got {n_channels}")
        row = self._row.get(group_id)
        if row is not None:
            if self._channels[row] != n_channels:
                raise ValueError(f"group {group_id} has {self._channels[row]} channels, not {n_channels}; "
                                 "a group keeps its channel count for the session")
            return
        self._row[group_id] = len(self._ids)
        self._ids.append(group_id)
        self._channels.append(n_channels)
        self._marks.append(np.zeros((0, n_channels), np.float32))
        self._bins.append(np.zeros(0, np.int64))
        self._folds.append(np.zeros(0, np.int64))
        self._kept.append(0)
        self._placed_counts.append(np.zeros((1, self.environment.n_bins), np.int64))
        self._rngs.append(np.random.default_rng((self.seed, group_id % 2**63)))

    def update(self, group_ids: np.ndarray, marks_uv: np.ndarray, xy_cm: np.ndarray, speed_cm_s: np.ndarray, *,
               t_s: np.ndarray | None = None, folds: np.ndarray | None = None) -> int:
        """Learn marked spikes at the positions where they occurred.

        Parameters
        ----------
        group_ids : ndarray of int64, shape (n,)
            Known groups (:meth:`add_group`).
        marks_uv : ndarray of float32, shape (n, n_channels)
            All of one width, that of every group in ``group_ids``.
        xy_cm : ndarray of float64, shape (n, 2)
            Position at each spike; NaN where unknown.
        speed_cm_s : ndarray of float64, shape (n,)
            Running speed at each spike.
        t_s : ndarray of float64, shape (n,), optional
            Each spike's data time: with it every spike given, placed or
            not, is also kept in :attr:`held_out`.
        folds : ndarray of int, shape (n,), optional
            Each spike's cross-validation fold (>= 0; the place model's
            ``fold_of``); all fold 0 by default.

        Returns
        -------
        int
            Spikes placed (running, inside the environment).
        """
        group_ids = np.asarray(group_ids, np.int64)
        marks_uv = np.asarray(marks_uv, np.float32)
        n = group_ids.size
        folds = np.zeros(n, np.int64) if folds is None else np.asarray(folds, np.int64)
        if folds.shape != (n,) or (n and folds.min() < 0):
            raise ValueError(f"folds must hold one fold >= 0 per spike ({n}), got shape {folds.shape}")
        if t_s is not None:
            self.held_out.add(t_s, group_ids, marks_uv)
        self.counters_["spikes_received"] += n
        running = np.asarray(speed_cm_s, np.float64) >= self.min_speed_cm_s
        bins = self.environment.bin_index(np.asarray(xy_cm, np.float64).reshape(n, 2))
        self.counters_["spikes_not_running"] += int(np.count_nonzero(~running))
        inside = bins >= 0
        self.counters_["spikes_outside_environment"] += int(np.count_nonzero(running & ~inside))
        placed = running & inside
        for gid in np.unique(group_ids[placed]).tolist():
            row = self._row[gid]
            if marks_uv.shape[1] != self._channels[row]:
                raise ValueError(f"group {gid} has {self._channels[row]} channels, the marks {marks_uv.shape[1]}")
            take = placed & (group_ids == gid)
            self._reservoir(row, marks_uv[take], bins[take], folds[take])
        n_placed = int(np.count_nonzero(placed))
        self.counters_["spikes_placed"] += n_placed
        return n_placed

    def _reservoir(self, row: int, marks: np.ndarray, bins: np.ndarray, folds: np.ndarray) -> None:
        """Algorithm R (Vitter 1985) over a batch: the first ``cap`` fill, each later one replaces with probability cap/seen."""
        counts = self._placed_counts[row]
        seen = int(counts.sum())
        if len(folds) and folds.max() >= len(counts):
            counts = np.concatenate([counts, np.zeros((folds.max() + 1 - len(counts), counts.shape[1]), np.int64)])
            self._placed_counts[row] = counts
        np.add.at(counts, (folds, bins), 1)
        cap = self.max_spikes_per_group
        kept_marks, kept_bins, kept_folds = self._marks[row], self._bins[row], self._folds[row]
        fill = max(0, min(cap - seen, len(bins)))
        if fill:
            kept_marks = np.concatenate([kept_marks, marks[:fill]])
            kept_bins = np.concatenate([kept_bins, bins[:fill]])
            kept_folds = np.concatenate([kept_folds, folds[:fill]])
        rest = len(bins) - fill
        if rest:
            slot = self._rngs[row].integers(0, np.arange(seen + fill + 1, seen + fill + rest + 1))
            hit = slot < cap
            # Repeated slots: the later spike wins, as one at a time.
            kept_marks[slot[hit]] = marks[fill:][hit]
            kept_bins[slot[hit]] = bins[fill:][hit]
            kept_folds[slot[hit]] = folds[fill:][hit]
        self._marks[row], self._bins[row], self._folds[row] = kept_marks, kept_bins, kept_folds
        self._kept[row] = len(kept_bins)

    # -- fitting -------------------------------------------------------------

    def _spread_operator(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The position smoothing as a sparse operator by source bin (CSR: start, target bins, weights).

        Row ``b`` is the environment's own unnormalised Gaussian smoothing of
        a unit at bin ``b``, the same that smooths the place model's counts.
        """
        env = self.environment
        n = env.n_bins
        starts, targets, weights = [0], [], []
        ones = np.ones(n)
        for lo in range(0, n, _SPREAD_CHUNK):
            hi = min(n, lo + _SPREAD_CHUNK)
            impulses = np.zeros((hi - lo, n))
            impulses[np.arange(hi - lo), np.arange(lo, hi)] = 1.0
            smoothed, _ = env._smooth_masked(impulses, ones, self.smooth_cm)
            for row in smoothed:
                keep = np.flatnonzero(row)
                targets.append(keep)
                weights.append(row[keep])
                starts.append(starts[-1] + keep.size)
        return (np.asarray(starts, np.int64), np.concatenate(targets).astype(np.int64),
                np.concatenate(weights).astype(np.float64))

    def _grid_kernel(self) -> tuple[int, np.ndarray]:
        """``(nx, kernel_1d)`` of a grid arena's separable smoothing, read off its own response to one bin; ``(0, [])`` otherwise.

        The response of a grid arena to a unit at a bin far enough from the
        edges is ``outer(k, k)``, so ``k`` is its central row over the square
        root of its centre.
        """
        env = self.environment
        if env.grid_shape is None:
            return 0, np.zeros(0, np.float32)
        ny, nx = env.grid_shape
        r = int(4.0 * self.smooth_cm / env.bin_cm + 0.5)  # scipy's gaussian_filter1d reach at truncate=4
        if 2 * r + 1 > min(ny, nx):
            return 0, np.zeros(0, np.float32)
        size = 2 * r + 1
        impulse = np.zeros(size * size)
        impulse[r * size + r] = 1.0
        probe = type(env).rectangle(size * env.bin_cm, size * env.bin_cm, bin_cm=env.bin_cm)
        response, _ = probe._smooth_masked(impulse[np.newaxis], np.ones(size * size), self.smooth_cm)
        centre_row = response[0].reshape(size, size)[r]
        return nx, (centre_row / math.sqrt(centre_row[r])).astype(np.float32)

    def _norm(self, n_channels: int) -> float:
        """Peak density of the product kernel, 1 / ((2 pi)^(c/2) bandwidth^c), in uV^-c."""
        return (2.0 * math.pi) ** (-0.5 * n_channels) * self.bandwidth_uv ** (-n_channels)

    def fit(self, occupancy_s: np.ndarray, valid_mask: np.ndarray) -> MarkModel:
        """Build what decoding needs from the spikes kept so far; updates may continue.

        Parameters
        ----------
        occupancy_s : ndarray of float64, shape (n_bins,)
            Running time in each bin (the place model's ``occupancy_s_``).
        valid_mask : ndarray of bool, shape (n_bins,)
            Bins decoded over (the place model's ``visited_mask_``).

        Returns
        -------
        self
        """
        env = self.environment
        occupancy_s = np.asarray(occupancy_s, np.float64)
        valid = np.asarray(valid_mask, bool) & env.valid_mask
        if occupancy_s.shape != (env.n_bins,) or not valid.any():
            raise ValueError(f"occupancy_s must have shape ({env.n_bins},) and valid_mask hold a visited bin")
        if self.n_groups == 0:
            raise ValueError("no electrode group has been announced; a marks source announces its groups first")
        if not hasattr(self, "spread_"):
            # The smoothing depends on the environment and smooth_cm alone: made once, shared by the fold models.
            self.spread_ = self._spread_operator()
            self.grid_nx_, self.kernel_1d_ = self._grid_kernel()
        start, targets, weights = self.spread_
        source_of = np.repeat(np.arange(env.n_bins), np.diff(start))

        def smooth(values: np.ndarray) -> np.ndarray:
            return np.bincount(targets, weights=values[source_of] * weights, minlength=env.n_bins)

        occ = smooth(np.where(env.valid_mask, occupancy_s, 0.0))
        usable = valid & (occ > 0)
        self.bin_scale_ = np.zeros(env.n_bins)
        self.bin_scale_[usable] = 1.0 / occ[usable]
        self.valid_mask_ = usable
        ground = np.zeros((self.n_groups, env.n_bins))
        for g, counts in enumerate(self._placed_counts):
            ground[g] = np.maximum(smooth(counts.sum(axis=0).astype(np.float64)) * self.bin_scale_, self.rate_floor_hz)
        ground[:, ~usable] = 0.0
        self.ground_rate_hz_ = ground
        self.ground_total_hz_ = ground.sum(axis=0)
        self.group_ids_ = np.asarray(self._ids, np.int64)
        self.group_channels_ = np.asarray(self._channels, np.int64)
        width = int(self.group_channels_.max())
        kept_marks, kept_bins, kept_weights = [], [], []
        for g in range(self.n_groups):
            marks, bins, weights = self._marks[g], self._bins[g], np.ones(len(self._bins[g]))
            if self.merge_sd > 0 and len(bins):
                order = np.argsort(bins, kind="stable")
                marks, bins = marks[order], bins[order]
                centres, centre_bins, weights = np.empty_like(marks), np.empty_like(bins), np.empty(len(bins))
                m = _mark_kernels.merge_marks(marks, bins, 1.0 / self.bandwidth_uv, self.merge_sd, centres, centre_bins,
                                              weights)
                marks, bins, weights = centres[:m], centre_bins[:m], weights[:m]
            kept_marks.append(marks)
            kept_bins.append(bins)
            kept_weights.append(weights)
        self.group_start_ = np.concatenate([[0], np.cumsum([len(b) for b in kept_bins])]).astype(np.int64)
        # Rows to a multiple of four: the kernel reads channels four at a time (the padding is 0).
        self.enc_marks_ = np.zeros((-(-width // 4) * 4, int(self.group_start_[-1])), np.float32)
        # Bins and weights in 4 bytes each: a decoding step streams ~10 MB of encoding spikes.
        self.enc_bins_ = np.zeros(int(self.group_start_[-1]), np.int32)
        self.enc_weights_ = np.zeros(int(self.group_start_[-1]), np.float32)
        # Buckets of channel 0, a fraction of the cutoff wide, sorted on channel 1 within (the kernel's index).
        self.bucket_uv_ = self.cutoff_sd * self.bandwidth_uv / _mark_kernels.BUCKETS_PER_CUTOFF
        self.group_min0_uv_ = np.zeros(self.n_groups)
        counts, group_bucket = [], [0]
        for g in range(self.n_groups):
            marks = kept_marks[g]
            min0 = float(marks[:, 0].min()) if len(marks) else 0.0
            bucket = np.floor((marks[:, 0].astype(np.float64) - min0) / self.bucket_uv_).astype(np.int64)
            order = np.lexsort((marks[:, 1 if self._channels[g] > 1 else 0], bucket))
            lo, hi = self.group_start_[g], self.group_start_[g + 1]
            self.enc_marks_[: self._channels[g], lo:hi] = marks[order].T
            self.enc_bins_[lo:hi] = kept_bins[g][order]
            self.enc_weights_[lo:hi] = kept_weights[g][order]
            self.group_min0_uv_[g] = min0
            counts.append(np.bincount(bucket, minlength=1))
            group_bucket.append(group_bucket[-1] + counts[-1].size)
        self.group_bucket_ = np.asarray(group_bucket, np.int64)
        self.bucket_start_ = np.concatenate([[0], np.cumsum(np.concatenate(counts))]).astype(np.int64)
        placed = np.array([c.sum() for c in self._placed_counts], np.float64)
        kept = np.maximum(np.asarray(self._kept, np.float64), 1.0)
        norms = np.array([self._norm(c) for c in self._channels])
        self.group_scale_ = placed / kept * norms
        self.group_log_floor_ = np.log(self.rate_floor_hz * norms)
        occ_visited = np.where(usable, occupancy_s, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            self.info_bits_per_spike_ = np.atleast_1d(skaggs_information(ground, occ_visited)[0])
        logger.info("fitted marks of %d groups (%d spikes kept, %d kernels) on %d bins",
                    self.n_groups, sum(self._kept), int(self.group_start_[-1]), int(usable.sum()))
        return self

    def without_fold(self, fold: int, occupancy_s: np.ndarray, valid_mask: np.ndarray,
                     learned_mask: np.ndarray | None = None) -> MarkModel:
        """A fitted model of the kept spikes of every fold but ``fold``: what weighs that fold's held-out steps.

        The kept spikes of the other folds are a uniform sample of their
        placed spikes (the reservoir samples all alike), so scaling by those
        folds' placed over kept spikes keeps the intensity unbiased, and
        their placed spikes alone make the ground process.

        Parameters
        ----------
        fold : int
        occupancy_s : ndarray of float64, shape (n_bins,)
            Running time per bin without ``fold`` (the place model's totals
            without it), and with it outside ``learned_mask``.
        valid_mask : ndarray of bool, shape (n_bins,)
            Bins decoded over.
        learned_mask : ndarray of bool, shape (n_bins,), optional
            The bins the other folds learned (all by default). Outside them
            the fold's own spikes are kept, as the place model keeps its
            full maps there: a bin no other fold reached would otherwise
            have the floor intensity and repel the held-out posterior.

        Returns
        -------
        MarkModel
            Fitted; its group rows are this model's.
        """
        model = MarkModel(self.environment, **self._settings())
        learned = np.ones(self.environment.n_bins, bool) if learned_mask is None else np.asarray(learned_mask, bool)
        for g, (gid, n_channels) in enumerate(zip(self._ids, self._channels)):
            model.add_group(gid, n_channels)
            keep = (self._folds[g] != fold) | ~learned[self._bins[g]]
            model._marks[g], model._bins[g], model._folds[g] = self._marks[g][keep], self._bins[g][keep], \
                self._folds[g][keep]
            model._kept[g] = int(np.count_nonzero(keep))
            counts = self._placed_counts[g].copy()
            if fold < len(counts):
                counts[fold, learned] = 0
            model._placed_counts[g] = counts
        if hasattr(self, "spread_"):
            model.spread_, model.grid_nx_, model.kernel_1d_ = self.spread_, self.grid_nx_, self.kernel_1d_
        return model.fit(occupancy_s, valid_mask)

    # -- decoding ------------------------------------------------------------

    def rows_of(self, group_ids: np.ndarray) -> np.ndarray:
        """Model row of each group id; -1 for a group the model does not know."""
        return np.array([self._row.get(g, -1) for g in np.asarray(group_ids, np.int64).tolist()], np.int64)

    def scratch(self) -> tuple[np.ndarray, ...]:
        """The scratch buffers :meth:`log_intensity_sum` needs, zeroed (after :meth:`fit`)."""
        return _mark_kernels.make_scratch(self.environment.n_bins, self.grid_nx_, self.kernel_1d_)

    def expected_count(self, window_s: float) -> np.ndarray:
        """Marked spikes expected in a window of ``window_s`` at each bin: the marks' term beside the log-likelihood.

        Returns
        -------
        ndarray of float64, shape (n_bins,)
            ``window_s`` times the ground-process rate summed over the groups (Hz).
        """
        return window_s * self.ground_total_hz_

    def log_intensity_sum(self, rows: np.ndarray, marks_uv: np.ndarray, out: np.ndarray,
                          scratch: tuple[np.ndarray, ...], backend: str = "numba") -> int:
        """``sum_k log lambda(x, m_k)`` over a window's marked spikes, into ``out`` (n_bins,).

        Parameters
        ----------
        rows : ndarray of int64, shape (k,)
            Model rows of the spikes' groups (:meth:`rows_of`, none -1).
        marks_uv : ndarray of float32, shape (k, n_channels_max)
        out : ndarray of float64, shape (n_bins,)
        scratch : from :meth:`scratch`
        backend : {"numba", "numpy"}

        Returns
        -------
        int
            Encoding spikes weighed.
        """
        kernel = (_mark_kernels.mark_log_intensity_sum if backend == "numba"
                  else _mark_kernels.mark_log_intensity_sum_numpy)
        start, targets, weights = self.spread_
        return kernel(rows, marks_uv, self.group_start_, self.group_channels_, self.enc_marks_, self.enc_bins_,
                      self.enc_weights_, self.bucket_start_, self.group_bucket_, self.group_min0_uv_, self.bucket_uv_,
                      1.0 / self.bandwidth_uv, self.cutoff_sd, start, targets, weights, self.grid_nx_,
                      self.kernel_1d_, self.bin_scale_, self.group_scale_, self.group_log_floor_, self.valid_mask_,
                      scratch, out)

    def window_log_intensity(self, rows: np.ndarray, marks_uv: np.ndarray, out: np.ndarray,
                             scratch: tuple[np.ndarray, ...], max_spikes: int) -> int:
        """A decoding window's ``sum_k log lambda(x, m_k)`` into ``out``, over its first ``max_spikes`` spikes.

        The one rule of a window, for live steps (``decoder.session.marks``)
        and held-out steps (:meth:`step_terms`) alike: the work per step is
        bounded, so beyond ``max_spikes`` (``[marks] max_spikes_per_step``)
        the later spikes are left out.

        Parameters
        ----------
        rows : ndarray of int64, shape (k,)
            Model rows, in time order.
        marks_uv : ndarray of float32, shape (k, n_channels_max)
        out : ndarray of float64, shape (n_bins,)
        scratch : from :meth:`scratch`
        max_spikes : int

        Returns
        -------
        int
            Spikes left out.
        """
        over = max(rows.size - max_spikes, 0)
        if over:
            rows, marks_uv = rows[:max_spikes], marks_uv[:max_spikes]
        self.log_intensity_sum(rows, np.ascontiguousarray(marks_uv), out, scratch)
        return over

    def step_terms(self, step_index: np.ndarray, group_ids: np.ndarray, marks_uv: np.ndarray, n_steps: int,
                   window_s: float, max_spikes_per_step: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """The marks' terms of ``n_steps`` windows, as a live step gives them to the decoder (after :meth:`fit`).

        Parameters
        ----------
        step_index : ndarray of int64, shape (k,)
            The window of each marked spike, ascending, in ``0..n_steps-1``.
        group_ids : ndarray of int64, shape (k,)
            Spikes of groups this model does not know are left out.
        marks_uv : ndarray of float32, shape (k, n_channels)
            Narrower marks are padded with zeros, as groups of fewer channels are.
        n_steps : int
        window_s : float
        max_spikes_per_step : int, optional
            Spikes weighed per window at most, the live steps' bound
            (:meth:`window_log_intensity`); all by default.

        Returns
        -------
        log_like : ndarray of float64, shape (n_steps, n_bins)
            ``sum_k log lambda(x, m_k)`` over each window's spikes.
        expected : ndarray of float64, shape (n_bins,)
            ``window_s`` times the summed ground-process rate.
        """
        rows = self.rows_of(group_ids)
        known = rows >= 0
        step_index, rows = np.asarray(step_index, np.int64)[known], rows[known]
        width = int(self.group_channels_.max())
        marks = np.zeros((rows.size, width), np.float32)
        given = np.asarray(marks_uv, np.float32)[known][:, :width]
        marks[:, : given.shape[1]] = given
        bounds = np.searchsorted(step_index, np.arange(n_steps + 1))
        log_like = np.empty((n_steps, self.environment.n_bins))
        scratch = self.scratch()
        cap = rows.size if max_spikes_per_step is None else max_spikes_per_step
        for i in range(n_steps):
            a, b = bounds[i], bounds[i + 1]
            self.window_log_intensity(rows[a:b], marks[a:b], log_like[i], scratch, cap)
        return log_like, self.expected_count(window_s)

    # -- readiness -----------------------------------------------------------

    def readiness(self) -> dict[str, Any]:
        """What the learned marks can do: spikes kept per group and which groups carry spatial information."""
        groups = []
        for g, gid in enumerate(self._ids):
            info = float(self.info_bits_per_spike_[g]) if hasattr(self, "info_bits_per_spike_") else math.nan
            groups.append({"group": gid, "channels": self._channels[g], "placed": int(self._placed_counts[g].sum()),
                           "kept": self._kept[g], "info_bits_per_spike": info})
        informative = [d["group"] for d in groups if d["info_bits_per_spike"] >= INFORMATIVE_BITS_PER_SPIKE]
        return {"groups": groups, "informative_groups": informative, "counters": dict(self.counters_)}

    # -- file ----------------------------------------------------------------

    def _settings(self) -> dict[str, Any]:
        return {"bandwidth_uv": self.bandwidth_uv, "smooth_cm": self.smooth_cm, "min_speed_cm_s": self.min_speed_cm_s,
                "max_spikes_per_group": self.max_spikes_per_group, "cutoff_sd": self.cutoff_sd,
                "rate_floor_hz": self.rate_floor_hz, "seed": self.seed, "merge_sd": self.merge_sd}

    def save(self, path: str | os.PathLike) -> None:
        """Write the learned spikes (not the fit: :meth:`fit` rebuilds it) to one ``.npz`` file, atomically.

        The reservoir's generators are saved with them, so a model loaded
        and then updated keeps the very sample the uninterrupted session
        would have kept.
        """
        write_model_file(path, *self.file_parts(), format_name=FILE_FORMAT)

    def file_parts(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """The header and arrays of :meth:`save`, for a file that holds this model beside another (:meth:`from_parts`)."""
        header = {"environment": self.environment.to_dict(), "settings": self._settings(), "groups": self._ids,
                  "channels": self._channels, "counters": self.counters_,
                  "reservoir_states": [rng.bit_generator.state for rng in self._rngs]}
        arrays = {}
        for g in range(self.n_groups):
            arrays[f"marks_{g}"] = self._marks[g]
            arrays[f"bins_{g}"] = self._bins[g]
            arrays[f"folds_{g}"] = self._folds[g]
            arrays[f"placed_{g}"] = self._placed_counts[g]
        return header, arrays

    @classmethod
    def load(cls, path: str | os.PathLike) -> MarkModel:
        """Read a model written by :meth:`save` (fit it before decoding); ModelFileError if it is not one."""
        return read_model_file(path, cls.from_parts, format_name=FILE_FORMAT)

    @classmethod
    def from_parts(cls, header: dict[str, Any], arrays: dict[str, np.ndarray]) -> MarkModel:
        """The model :meth:`file_parts` described (unfitted); ValueError where the parts do not fit together."""
        model = cls(Environment.from_dict(header["environment"]), **header["settings"])
        for g, (gid, nch) in enumerate(zip(header["groups"], header["channels"])):
            model.add_group(gid, nch)
            marks, bins = arrays[f"marks_{g}"].astype(np.float32), arrays[f"bins_{g}"].astype(np.int64)
            # Files written before the folds were kept hold every spike in fold 0.
            folds = arrays[f"folds_{g}"].astype(np.int64) if f"folds_{g}" in arrays else np.zeros(bins.size, np.int64)
            placed = np.atleast_2d(arrays[f"placed_{g}"].astype(np.int64))
            if marks.shape != (bins.size, nch) or folds.shape != bins.shape or placed.ndim != 2 \
                    or placed.shape[1] != model.environment.n_bins or (folds.size and folds.min() < 0):
                raise ValueError(f"the arrays of group {gid} do not match its channels and the bins")
            model._marks[g], model._bins[g], model._folds[g], model._kept[g] = marks, bins, folds, bins.size
            model._placed_counts[g] = placed
        # A file without them (written before they were saved) starts each generator afresh from the seed.
        for rng, state in zip(model._rngs, header.get("reservoir_states", [])):
            rng.bit_generator.state = state
        model.counters_.update({k: int(v) for k, v in header["counters"].items() if k in model.counters_})
        return model
