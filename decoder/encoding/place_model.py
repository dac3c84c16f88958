"""The encoding model: place-cell rate maps learned online from a live session.

A :class:`PlaceModel` takes tracker frames and spikes as a session delivers
them, in any interleaving, and keeps only what the rate maps need: running
occupancy and spike counts per bin, per unit and per cross-validation fold,
plus a sparse set of evaluation samples. Memory is bounded by
``bins x units x folds``; no whole-session array is kept.

Occupancy comes from the intervals between consecutive valid frames: each
interval of at most ``max_frame_gap_s`` adds its length to the bin of its
first frame when the animal runs at least ``min_speed_cm_s`` there. A spike
is placed at the position interpolated between the two frames around it and
counted only if that interval counted for occupancy.

Running speed at a frame is the least-squares slope of position against
time over the frames within ``speed_window_s / 2`` of it (and at least its
two neighbours): a fit over a quarter second, not frame-to-frame
differences, because tracker jitter of a few mm at 30-50 Hz alone reads as
several cm/s between frames (common practice). An interval is settled only
once the frames that complete its speed window have arrived, so the last
half window of a session waits for more frames and is not yet in the maps.

Arrivals are held briefly and worked in together (up to 64 frames or spike
batches, and always before anything reads the model): a tracker sends one
frame per message, and settling each alone would cost far more than the
frame's share of a batch. The result is the same, to the bit, as working in
each arrival on the spot, whatever the chunking (see ``PlaceModel._flush``).

Spikes wait in a bounded buffer until the frames around them are settled
(and half an evaluation window beyond, so that every evaluation sample that
could hold them exists). Frames are kept for ``max_spike_delay_s``, so a
spike delivered late is still placed; one later than that is dropped and
counted, as are spikes of unknown units and spikes outside the environment.

The model file is one ``.npz`` archive holding a JSON header (format name,
version, the environment's dict, the settings) and the arrays; nothing in it
needs pickle to load.
"""

from __future__ import annotations

import json
import logging
import math
import os
import zipfile
import zlib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numba
import numpy as np

from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Environment
from decoder.encoding.spatial_metrics import field_size, skaggs_information, sparsity

logger = logging.getLogger(__name__)

__all__ = [
    "PlaceModel",
    "Readiness",
    "CrossValidatedError",
    "ModelFileError",
    "FORMAT_NAME",
    "FORMAT_VERSION",
]

#: Name written into every model file's header.
FORMAT_NAME = "placeloop.place_model"

#: Version of the model file layout this module writes and reads.
FORMAT_VERSION = 1

#: Running time between two evaluation samples, s. Half a second keeps the
#: samples' decoding windows apart at the default ``cv_window_s``.
_CV_SAMPLE_EVERY_S = 0.5

#: Most evaluation samples kept: 20,000 is close to three hours of running.
_MAX_CV_SAMPLES = 20_000

#: Most spikes waiting for the frames that cover them; a million is more
#: than a minute of a 500-unit recording with the tracker stalled.
_MAX_PENDING_SPIKES = 1_000_000

#: Frames (and spike batches) held back before they are worked in together.
#: A tracker sends one frame per message; settling each alone costs far more
#: than its share of a batch, and any batching gives the same sums (see
#: ``PlaceModel._flush``).
_FRAME_BATCH = 64

#: Unit ids below this are looked up in a table rather than a dict.
_MAX_UNIT_TABLE = 1 << 20

#: Thresholds for a spatially tuned unit (common practice).
_TUNED_BITS_PER_SPIKE = 0.5
_TUNED_PEAK_HZ = 1.0

# Fate of each interval between consecutive valid frames.
_COUNTED, _SLOW, _GAP, _OUTSIDE = 0, 1, 2, 3

_COUNTER_KEYS = (
    "frames_received",
    "frames_lost",
    "frames_out_of_order",
    "frames_bad_time",
    "frames_outside_environment",
    "spikes_received",
    "spikes_placed",
    "spikes_not_running",
    "spikes_in_tracking_gap",
    "spikes_outside_environment",
    "spikes_too_late",
    "spikes_unknown_unit",
    "spikes_bad_time",
    "spikes_buffer_full",
    "cv_samples_dropped",
)


class ModelFileError(ValueError):
    """A model file that cannot be read: not a model, another version, or damaged."""


@dataclass(frozen=True, eq=False)
class Readiness(Mapping):
    """How far a session has come towards a usable model.

    A read-only mapping as well as a dataclass, so ``dict(readiness)`` gives
    its fields by name.

    Attributes
    ----------
    coverage : float
        Fraction of the environment's valid bins visited for at least
        ``min_occupancy_s`` of running.
    running_time_s : float
        Running time that counted for occupancy, s.
    unit_ids : ndarray of int64, shape (n_units,)
    spikes_per_unit : ndarray of int64, shape (n_units,)
        Spikes placed in the maps, per unit.
    n_tuned_units : int
        Units with at least 0.5 bits/spike and a peak rate of at least 1 Hz
        (common practice for calling a unit spatially tuned).
    median_cv_error_cm : float or None
        Cross-validated median decoding error, cm, when asked for; NaN
        while there is too little data.
    """

    coverage: float
    running_time_s: float
    unit_ids: np.ndarray
    spikes_per_unit: np.ndarray
    n_tuned_units: int
    median_cv_error_cm: float | None = None

    def __getitem__(self, key: str) -> Any:
        if key not in self.__dataclass_fields__:
            raise KeyError(key)
        return getattr(self, key)

    def __iter__(self) -> Iterator[str]:
        return iter(self.__dataclass_fields__)

    def __len__(self) -> int:
        return len(self.__dataclass_fields__)


@dataclass(frozen=True)
class CrossValidatedError:
    """Decoding error on held-out folds; ``float()`` of it is the median.

    Attributes
    ----------
    median_cm : float
        Median distance between decoded (MAP) and true position over all
        held-out samples, cm (along the track on a track or graph).
    fold_median_cm : ndarray, shape (cv_folds,)
        The same per fold; NaN for a fold without samples.
    fold_n_samples : ndarray of int64, shape (cv_folds,)
    errors_cm : ndarray, shape (n_samples,)
        Every sample's error.
    fold_of_sample : ndarray of int64, shape (n_samples,)
    """

    median_cm: float
    fold_median_cm: np.ndarray
    fold_n_samples: np.ndarray
    errors_cm: np.ndarray
    fold_of_sample: np.ndarray

    def __float__(self) -> float:
        return self.median_cm


@numba.njit(cache=True)
def _window_speed(t_s, xy_cm, start, stop, half_window_s, max_gap_s):
    """Running speed at frames ``start..stop-1`` from a least-squares fit of position on time.

    The fit uses the frames within ``half_window_s`` of the frame, and at
    least its neighbours when they are no more than ``max_gap_s`` away.

    Parameters
    ----------
    t_s : ndarray of float64, shape (m,)
        Frame times, strictly increasing.
    xy_cm : ndarray of float64, shape (m, 2)
        Positions, all finite.
    start, stop : int
    half_window_s, max_gap_s : float

    Returns
    -------
    ndarray of float64, shape (stop - start,)
        cm/s; NaN where the window holds a single frame.
    """
    m = t_s.shape[0]
    out = np.empty(stop - start)
    for k in range(start, stop):
        tk = t_s[k]
        lo = k
        while lo > 0 and t_s[lo - 1] >= tk - half_window_s:
            lo -= 1
        if lo == k and k > 0 and tk - t_s[k - 1] <= max_gap_s:
            lo = k - 1
        hi = k
        while hi < m - 1 and t_s[hi + 1] <= tk + half_window_s:
            hi += 1
        if hi == k and k < m - 1 and t_s[k + 1] - tk <= max_gap_s:
            hi = k + 1
        n = hi - lo + 1
        st = 0.0
        stt = 0.0
        sx = 0.0
        sy = 0.0
        stx = 0.0
        sty = 0.0
        for j in range(lo, hi + 1):
            d = t_s[j] - tk
            dx = xy_cm[j, 0] - xy_cm[k, 0]
            dy = xy_cm[j, 1] - xy_cm[k, 1]
            st += d
            stt += d * d
            sx += dx
            sy += dy
            stx += d * dx
            sty += d * dy
        den = n * stt - st * st
        if n < 2 or den <= 0.0:
            out[k - start] = np.nan
        else:
            vx = (n * stx - st * sx) / den
            vy = (n * sty - st * sy) / den
            out[k - start] = math.sqrt(vx * vx + vy * vy)
    return out


def _window_speed_numpy(t_s, xy_cm, start, stop, half_window_s, max_gap_s):
    """Numpy twin of :func:`_window_speed`: same arguments, same result."""
    m = len(t_s)
    k = np.arange(start, stop)
    if k.size == 0:
        return np.zeros(0)
    tk = t_s[k]
    lo = np.searchsorted(t_s, tk - half_window_s, side="left")
    hi = np.searchsorted(t_s, tk + half_window_s, side="right") - 1
    prev_ok = (k > 0) & (tk - t_s[np.maximum(k - 1, 0)] <= max_gap_s)
    next_ok = (k < m - 1) & (t_s[np.minimum(k + 1, m - 1)] - tk <= max_gap_s)
    lo = np.where((lo == k) & prev_ok, k - 1, lo)
    hi = np.where((hi == k) & next_ok, k + 1, hi)
    width = int((hi - lo).max()) + 1
    idx = lo[:, None] + np.arange(width)[None, :]
    inside = idx <= hi[:, None]
    idx = np.minimum(idx, m - 1)
    d = np.where(inside, t_s[idx] - tk[:, None], 0.0)
    dx = np.where(inside, xy_cm[idx, 0] - xy_cm[k, 0][:, None], 0.0)
    dy = np.where(inside, xy_cm[idx, 1] - xy_cm[k, 1][:, None], 0.0)
    n = inside.sum(axis=1)
    st, stt = d.sum(axis=1), (d * d).sum(axis=1)
    den = n * stt - st * st
    with np.errstate(divide="ignore", invalid="ignore"):
        vx = (n * (d * dx).sum(axis=1) - st * dx.sum(axis=1)) / den
        vy = (n * (d * dy).sum(axis=1) - st * dy.sum(axis=1)) / den
    return np.where((n >= 2) & (den > 0), np.hypot(vx, vy), np.nan)


def _add_ones(counts: np.ndarray, index: np.ndarray) -> None:
    """Add 1 to ``counts[i]`` for every ``i`` in ``index``, repeats included (``np.add.at(counts, index, 1)``).

    Unique cells and their multiplicities give the same integers as
    ``np.add.at``, in half its time for a few hundred spikes.
    """
    cells, times = np.unique(index, return_counts=True)
    counts[cells] += times.astype(counts.dtype)


def _positive(name: str, value: Any, *, allow_zero: bool = False) -> None:
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    if ok:
        ok = math.isfinite(value) and (value >= 0 if allow_zero else value > 0)
    if not ok:
        need = "zero or a positive" if allow_zero else "a positive"
        raise ValueError(f"{name} must be {need} finite number, got {value!r}")


def _json_default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} into a model file header")


class PlaceModel:
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
    counters_ : dict of str to int
        What was received and what was dropped, and why.

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

    def __init__(
        self,
        environment: Environment,
        *,
        min_speed_cm_s: float = 3.0,
        speed_window_s: float = 0.25,
        smooth_cm: float = 5.0,
        min_occupancy_s: float = 0.1,
        rate_floor_hz: float = 0.01,
        max_frame_gap_s: float = 0.5,
        max_spike_delay_s: float = 5.0,
        cv_folds: int = 5,
        cv_block_s: float = 60.0,
        cv_window_s: float = 0.5,
        unit_ids: Any = None,
    ) -> None:
        if not isinstance(environment, Environment):
            raise ValueError(
                f"environment must be a decoder.space.environments.Environment, got {type(environment).__name__}"
            )
        _positive("min_speed_cm_s", min_speed_cm_s, allow_zero=True)
        _positive("speed_window_s", speed_window_s)
        _positive("smooth_cm", smooth_cm, allow_zero=True)
        _positive("min_occupancy_s", min_occupancy_s, allow_zero=True)
        _positive("rate_floor_hz", rate_floor_hz)
        _positive("max_frame_gap_s", max_frame_gap_s)
        _positive("max_spike_delay_s", max_spike_delay_s)
        _positive("cv_block_s", cv_block_s)
        _positive("cv_window_s", cv_window_s)
        if isinstance(cv_folds, bool) or not isinstance(cv_folds, (int, np.integer)) or cv_folds < 2:
            raise ValueError(f"cv_folds must be an integer of at least 2, got {cv_folds!r}")
        if cv_window_s >= cv_block_s:
            raise ValueError(
                f"cv_window_s={cv_window_s} must be shorter than cv_block_s={cv_block_s}, "
                "or no evaluation window fits inside a block"
            )
        self.environment = environment
        self.min_speed_cm_s = min_speed_cm_s
        self.speed_window_s = speed_window_s
        self.smooth_cm = smooth_cm
        self.min_occupancy_s = min_occupancy_s
        self.rate_floor_hz = rate_floor_hz
        self.max_frame_gap_s = max_frame_gap_s
        self.max_spike_delay_s = max_spike_delay_s
        self.cv_folds = cv_folds
        self.cv_block_s = cv_block_s
        self.cv_window_s = cv_window_s
        self.unit_ids = unit_ids

        self._unit_row: dict[int, int] = {}
        self._unit_list: list[int] = []
        # Row of each unit id in 0.._MAX_UNIT_TABLE - 1 (-1: none), to look
        # up a batch at once; larger or negative ids are only in _unit_row.
        self._row_table = np.zeros(0, dtype=np.int64)
        if unit_ids is not None:
            ids = np.asarray(unit_ids)
            if ids.ndim != 1 or ids.dtype.kind not in "iu":
                raise ValueError(f"unit_ids must be a one-dimensional sequence of integers, got {unit_ids!r}")
            if len(np.unique(ids)) != len(ids):
                raise ValueError("unit_ids holds a unit id twice; give each unit once")
            for uid in ids.tolist():
                self._add_unit(int(uid))
        n_bins = environment.n_bins
        self._fold_occ = np.zeros((cv_folds, n_bins))
        self._fold_counts = np.zeros((cv_folds, max(len(self._unit_list), 1), n_bins), dtype=np.int32)
        self._counters = dict.fromkeys(_COUNTER_KEYS, 0)
        self._t0: float | None = None
        self._first_frame_t = math.inf
        self._last_frame_t = -math.inf
        self._running_s = 0.0
        # Recent valid frames; the outgoing interval of frames [0, _n_final) is settled.
        self._ft = np.zeros(0)
        self._fxy = np.zeros((0, 2))
        self._fbin = np.zeros(0, dtype=np.int64)
        self._iv_status = np.zeros(0, dtype=np.int8)
        self._iv_fold = np.zeros(0, dtype=np.int64)
        self._n_final = 0
        self._pend_t = np.zeros(0)
        self._pend_row = np.zeros(0, dtype=np.int64)
        self._cv_t = np.zeros(0)
        self._cv_xy = np.zeros((0, 2))
        self._cv_fold = np.zeros(0, dtype=np.int64)
        self._cv_pairs: list[tuple[np.ndarray, np.ndarray]] = []
        # Arrivals not yet worked in (see _flush): seen frames, the number of
        # frames held after each update_frames call that added any, and spike
        # batches with their total size.
        self._held_t: list[float] = []
        self._held_xy: list[tuple[float, float]] = []
        self._held_calls: list[int] = []
        self._held_spikes: list[tuple[np.ndarray, np.ndarray]] = []
        self._n_held_spikes = 0
        # The grid of n_tuned_units_so_far and running spike counts on it,
        # made on its first call; None until then.
        self._tuning: tuple[Environment, np.ndarray] | None = None
        self._tuning_counts = np.zeros((0, 0), dtype=np.int64)

    # ------------------------------------------------------------------
    # Online accumulation
    # ------------------------------------------------------------------

    @property
    def counters_(self) -> dict[str, int]:
        """What was received and dropped so far, by reason (a copy)."""
        self._flush()
        return dict(self._counters)

    @property
    def n_units(self) -> int:
        """Units seen (or given) so far."""
        self._flush()
        return len(self._unit_list)

    def occupancy_so_far_s(self) -> np.ndarray:
        """Running time per bin accumulated so far, shape (n_bins,), in s (cheap: no fitting)."""
        self._flush()
        return self._fold_occ.sum(axis=0)

    def update_frames(self, t_s: Any, xy_cm: Any) -> None:
        """Add tracker frames.

        Parameters
        ----------
        t_s : array_like of float64, shape (n,)
            Acquisition times, s; mostly increasing. Frames not newer than
            the newest frame so far are dropped and counted.
        xy_cm : array_like of float64, shape (n, 2)
            Positions in the environment's frame; NaN marks a lost frame.
        """
        t = np.asarray(t_s, dtype=np.float64)
        xy = np.asarray(xy_cm, dtype=np.float64)
        if t.ndim != 1:
            raise ValueError(f"t_s must be one-dimensional, got shape {t.shape}")
        if xy.shape != (len(t), 2):
            raise ValueError(f"xy_cm must have shape ({len(t)}, 2) to match t_s, got {xy.shape}")
        c = self._counters
        c["frames_received"] += len(t)
        if len(t) == 1:
            x_cm, y_cm = xy[0].tolist()
            if self._take_one_frame(t.item(0), x_cm, y_cm):
                self._held_t.append(t.item(0))
                self._held_xy.append((x_cm, y_cm))
                self._held_calls.append(len(self._held_t))
                if len(self._held_t) >= _FRAME_BATCH:
                    self._flush()
            return
        t, xy = self._take_frames(t, xy)
        if t.size == 0:
            return
        if t.size + len(self._held_t) >= _FRAME_BATCH:
            self._flush()
            self._work_in_frames(t, xy, [t.size])
            return
        self._held_t.extend(t.tolist())
        self._held_xy.extend(map(tuple, xy.tolist()))
        self._held_calls.append(len(self._held_t))

    def _take_one_frame(self, t_s: float, x_cm: float, y_cm: float) -> bool:
        """Count one frame and say whether it is new and seen: ``_take_frames`` on scalars.

        A tracker sends one frame per message, and the general path's numpy
        calls on 1-element arrays cost more than the frame's own work.
        """
        c = self._counters
        if not math.isfinite(t_s):
            c["frames_bad_time"] += 1
            return False
        if not t_s > self._last_frame_t:
            c["frames_out_of_order"] += 1
            return False
        if self._t0 is None:
            self._t0 = t_s
        self._last_frame_t = t_s
        if not (math.isfinite(x_cm) and math.isfinite(y_cm)):
            c["frames_lost"] += 1
            return False
        return True

    def _take_frames(self, t: np.ndarray, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Count the frames and keep those with a finite time, newer than any before, and seen."""
        c = self._counters
        finite = np.isfinite(t)
        c["frames_bad_time"] += int(np.count_nonzero(~finite))
        t, xy = t[finite], xy[finite]
        if t.size == 0:
            return t, xy
        running_max = np.maximum.accumulate(np.concatenate([[self._last_frame_t], t]))[:-1]
        in_order = t > running_max
        c["frames_out_of_order"] += int(np.count_nonzero(~in_order))
        t, xy = t[in_order], xy[in_order]
        if t.size == 0:
            return t, xy
        if self._t0 is None:
            self._t0 = float(t[0])
        self._last_frame_t = float(t[-1])
        seen = np.all(np.isfinite(xy), axis=1)
        c["frames_lost"] += int(np.count_nonzero(~seen))
        return t[seen], xy[seen]

    def update_spikes(self, t_s: Any, unit_ids: Any) -> None:
        """Add spikes.

        Parameters
        ----------
        t_s : array_like of float64, shape (n,)
            Spike times, s, on the same clock as the frames, in any order.
        unit_ids : array_like of int, shape (n,)
            The rig's unit id of each spike.
        """
        t = np.asarray(t_s, dtype=np.float64)
        ids = np.asarray(unit_ids)
        if t.ndim != 1:
            raise ValueError(f"t_s must be one-dimensional, got shape {t.shape}")
        if ids.shape != t.shape:
            raise ValueError(f"unit_ids must have shape {t.shape} to match t_s, got {ids.shape}")
        if ids.size and ids.dtype.kind not in "iu":
            raise ValueError(f"unit_ids must be integers, got dtype {ids.dtype}")
        c = self._counters
        c["spikes_received"] += len(t)
        if t.size == 0:
            return
        half = 0.5 * self.cv_window_s
        # A spike can only be placed on arrival if it is older than the newest
        # frame by half an evaluation window (the settled horizon is never
        # newer than that frame); every other spike just waits, so it can be
        # held until the next flush with the same outcome.
        maybe_ready = bool((t + half < self._last_frame_t).any())
        if not maybe_ready and len(self._pend_t) + self._n_held_spikes + t.size <= _MAX_PENDING_SPIKES:
            # Copies: the caller may reuse its arrays.
            self._held_spikes.append((t.copy(), ids.astype(np.int64)))
            self._n_held_spikes += t.size
            if len(self._held_spikes) >= _FRAME_BATCH:
                self._flush()
            return
        self._flush()
        t, rows = self._known_spikes([(t, ids.astype(np.int64))])
        if t.size == 0:
            return
        self._pend_t = np.concatenate([self._pend_t, t])
        self._pend_row = np.concatenate([self._pend_row, rows])
        overflow = len(self._pend_t) - _MAX_PENDING_SPIKES
        if overflow > 0:
            # The oldest waiting spikes are the least likely ever to be covered by frames.
            order = np.argsort(self._pend_t, kind="stable")
            keep = np.sort(order[overflow:])
            self._pend_t, self._pend_row = self._pend_t[keep], self._pend_row[keep]
            c["spikes_buffer_full"] += overflow
            logger.warning("%d spikes dropped: no tracker frames cover them and the buffer is full", overflow)
        self._release_spikes()

    def _known_spikes(self, batches: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
        """Times and model rows of the spikes with a finite time and a known unit, in arrival order.

        Counts the others. New units get rows batch by batch, in ascending
        id within a batch, as if each batch had been taken on arrival.
        """
        c = self._counters
        t = np.concatenate([b[0] for b in batches])
        ids = np.concatenate([b[1] for b in batches])
        finite = np.isfinite(t)
        if not finite.all():
            c["spikes_bad_time"] += int(np.count_nonzero(~finite))
            t, ids = t[finite], ids[finite]
        if t.size == 0:
            return t, np.zeros(0, dtype=np.int64)
        table = self._row_table
        # A batch whose ids all fall in the table holds no unit missing from it.
        if ids.min() >= 0 and ids.max() < len(table):
            rows = table[ids]
        else:
            uniq, inverse = np.unique(ids, return_inverse=True)
            rows = np.array([self._unit_row.get(uid, -1) for uid in uniq.tolist()], dtype=np.int64)[inverse]
        if self.unit_ids is None and rows.min() < 0:
            # A new unit: the row order of new units depends on the batches they came in.
            rows = np.concatenate([self._rows_of(ids_b[np.isfinite(t_b)]) for t_b, ids_b in batches])
        known = rows >= 0
        if not known.all():
            c["spikes_unknown_unit"] += int(np.count_nonzero(~known))
            t, rows = t[known], rows[known]
        return t, rows

    def _flush(self) -> None:
        """Work in the held frames and spikes: settle, place, trim.

        The result is the same, to the bit, as working in every arrival at
        once: held spikes had no frame ready for them when they arrived;
        intervals are settled one by one in time order whatever the batch
        (see ``_add_cv_samples``); a spike is placed by the frames around it,
        which every history kept since its arrival holds; and the history is
        trimmed to what the newest frame alone decides. Spikes are placed in
        the order single calls would have placed them, so even the
        evaluation-window pairs come out in the same order.
        """
        if self._held_spikes:
            t, rows = self._known_spikes(self._held_spikes)
            self._held_spikes.clear()
            self._n_held_spikes = 0
            if t.size:
                self._pend_t = np.concatenate([self._pend_t, t])
                self._pend_row = np.concatenate([self._pend_row, rows])
        if self._held_t:
            t = np.array(self._held_t)
            xy = np.array(self._held_xy, dtype=np.float64).reshape(-1, 2)
            calls = self._held_calls
            self._held_t, self._held_xy, self._held_calls = [], [], []
            self._work_in_frames(t, xy, calls)

    def _work_in_frames(self, t: np.ndarray, xy: np.ndarray, calls: list[int]) -> None:
        """Add seen, in-order frames to the history, settle intervals, place spikes, trim.

        ``calls[i]`` is how many of the frames the ``i``-th update_frames
        call had delivered (cumulative); it orders the placed spikes.
        """
        c = self._counters
        self._first_frame_t = min(self._first_frame_t, float(t[0]))
        bins = self.environment.bin_index(xy)
        c["frames_outside_environment"] += int(np.count_nonzero(bins < 0))
        m0 = len(self._ft)
        n_final0 = self._n_final
        self._ft = np.concatenate([self._ft, t])
        self._fxy = np.concatenate([self._fxy, xy])
        self._fbin = np.concatenate([self._fbin, bins])
        self._iv_status = np.concatenate([self._iv_status, np.zeros(len(t), np.int8)])
        self._iv_fold = np.concatenate([self._iv_fold, np.zeros(len(t), np.int64)])
        self._settle_intervals()
        horizons = None
        if len(calls) > 1 and self._pend_t.size:
            horizons = self._horizons_after(m0 + np.asarray(calls), n_final0)
        self._release_spikes(horizons)
        self._trim_history()

    def _horizons_after(self, ends: np.ndarray, n_final0: int) -> np.ndarray:
        """Settled horizon after each of a run of calls, ``ends`` frames into the history.

        -inf where nothing was settled yet (no spike could be placed then).
        """
        ft = self._ft
        tail = ft[ends - 1]
        # Interval k is settled once a frame reaches t[k] + half (_settle_intervals).
        settled = np.searchsorted(ft + 0.5 * self.speed_window_s, tail, side="right")
        n_final = np.maximum(np.minimum(settled, ends - 1), n_final0)
        return np.where(n_final > 0, ft[n_final], -np.inf)

    def _add_unit(self, uid: int) -> int:
        row = len(self._unit_list)
        self._unit_row[uid] = row
        self._unit_list.append(uid)
        if 0 <= uid < _MAX_UNIT_TABLE:
            if uid >= len(self._row_table):
                grown = np.full(min(max(2 * len(self._row_table), uid + 1), _MAX_UNIT_TABLE), -1, dtype=np.int64)
                grown[: len(self._row_table)] = self._row_table
                self._row_table = grown
            self._row_table[uid] = row
        return row

    def _rows_of(self, ids: np.ndarray) -> np.ndarray:
        """Model row of each unit id, adding new units unless the units were fixed."""
        uniq, inverse = np.unique(ids, return_inverse=True)
        urows = np.empty(len(uniq), dtype=np.int64)
        for i, uid in enumerate(uniq.tolist()):
            row = self._unit_row.get(uid, -1)
            if row < 0 and self.unit_ids is None:
                row = self._add_unit(uid)
            urows[i] = row
        capacity = self._fold_counts.shape[1]
        if len(self._unit_list) > capacity:
            # Doubling keeps the copies few while units keep appearing.
            shape = (self.cv_folds, max(2 * capacity, len(self._unit_list)), self.environment.n_bins)
            grown = np.zeros(shape, np.int32)
            grown[:, :capacity] = self._fold_counts
            self._fold_counts = grown
            if self._tuning is not None:
                more = np.zeros((shape[1], self._tuning_counts.shape[1]), np.int64)
                more[:capacity] = self._tuning_counts
                self._tuning_counts = more
        return urows[inverse]

    def _settle_intervals(self) -> None:
        """Decide the fate of every interval whose speed window is complete."""
        t, m = self._ft, len(self._ft)
        half = 0.5 * self.speed_window_s
        start = self._n_final
        if m - 1 <= start:
            return
        complete = t[start : m - 1] + half <= t[-1]
        stop = start + int(np.count_nonzero(complete))
        if stop == start:
            return
        k = np.arange(start, stop)
        speed = _window_speed(t, self._fxy, start, stop, half, self.max_frame_gap_s)
        dt = t[k + 1] - t[k]
        status = np.full(len(k), _COUNTED, dtype=np.int8)
        status[~(speed >= self.min_speed_cm_s)] = _SLOW
        status[self._fbin[k] < 0] = _OUTSIDE
        status[dt > self.max_frame_gap_s] = _GAP
        block = np.floor((t[k] - self._t0) / self.cv_block_s).astype(np.int64)
        fold = block % self.cv_folds
        self._iv_status[k] = status
        self._iv_fold[k] = fold
        counted = status == _COUNTED
        np.add.at(self._fold_occ, (fold[counted], self._fbin[k][counted]), dt[counted])
        self._add_cv_samples(k, counted, dt)
        self._n_final = stop

    def _add_cv_samples(self, k: np.ndarray, counted: np.ndarray, dt: np.ndarray) -> None:
        """Make an evaluation sample at the first frame of every half second of running."""
        # One sequential accumulation, so that any chunking of the frames gives the same sums.
        cum = np.add.accumulate(np.concatenate([[self._running_s], np.where(counted, dt, 0.0)]))
        self._running_s = float(cum[-1])
        ticks = np.floor(cum / _CV_SAMPLE_EVERY_S)
        crossing = counted & (ticks[1:] > ticks[:-1])
        ts = self._ft[k[crossing]]
        half = 0.5 * self.cv_window_s
        # A window that straddles two blocks would leak its spikes into a training fold.
        same_block = np.floor((ts - half - self._t0) / self.cv_block_s) == np.floor(
            (ts + half - self._t0) / self.cv_block_s
        )
        pick = k[crossing][same_block]
        room = _MAX_CV_SAMPLES - len(self._cv_t)
        if len(pick) > room:
            self._counters["cv_samples_dropped"] += len(pick) - max(room, 0)
            pick = pick[: max(room, 0)]
        if len(pick):
            self._cv_t = np.concatenate([self._cv_t, self._ft[pick]])
            self._cv_xy = np.concatenate([self._cv_xy, self._fxy[pick]])
            self._cv_fold = np.concatenate([self._cv_fold, self._iv_fold[pick]])

    def _release_spikes(self, horizons: np.ndarray | None = None) -> None:
        """Place the waiting spikes whose interval and evaluation windows are settled.

        Parameters
        ----------
        horizons : ndarray of float64, shape (n_calls,), optional
            The settled horizon after each update_frames call worked in
            together; spikes are placed in the order those calls would have
            released them (and in arrival order within a call).
        """
        if self._pend_t.size == 0 or self._n_final == 0:
            return
        horizon = self._ft[self._n_final]
        reach = self._pend_t + 0.5 * self.cv_window_s
        ready = reach < horizon
        if not np.any(ready):
            return
        t, rows = self._pend_t[ready], self._pend_row[ready]
        self._pend_t, self._pend_row = self._pend_t[~ready], self._pend_row[~ready]
        if horizons is not None:
            order = np.argsort(np.searchsorted(horizons, reach[ready], side="right"), kind="stable")
            t, rows = t[order], rows[order]
        self._place_spikes(t, rows)

    def _place_spikes(self, t: np.ndarray, rows: np.ndarray) -> None:
        c = self._counters
        untracked = t < self._first_frame_t
        k = np.searchsorted(self._ft, t, side="right") - 1
        too_late = ~untracked & (k < 0)
        c["spikes_in_tracking_gap"] += int(np.count_nonzero(untracked))
        c["spikes_too_late"] += int(np.count_nonzero(too_late))
        covered = k >= 0
        t, rows, k = t[covered], rows[covered], k[covered]
        status = self._iv_status[k]
        c["spikes_not_running"] += int(np.count_nonzero(status == _SLOW))
        c["spikes_in_tracking_gap"] += int(np.count_nonzero(status == _GAP))
        c["spikes_outside_environment"] += int(np.count_nonzero(status == _OUTSIDE))
        run = status == _COUNTED
        k_run = k[run]
        frac = (t[run] - self._ft[k_run]) / (self._ft[k_run + 1] - self._ft[k_run])
        xy = self._fxy[k_run] + frac[:, None] * (self._fxy[k_run + 1] - self._fxy[k_run])
        bins = self.environment.bin_index(xy)
        inside = bins >= 0
        c["spikes_outside_environment"] += int(np.count_nonzero(~inside))
        c["spikes_placed"] += int(np.count_nonzero(inside))
        n_units_cap, n_bins = self._fold_counts.shape[1:]
        rows_in, bins_in = rows[run][inside], bins[inside]
        flat = (self._iv_fold[k_run][inside] * n_units_cap + rows_in) * n_bins + bins_in
        _add_ones(self._fold_counts.reshape(-1), flat)
        if self._tuning is not None:
            to_grid = self._tuning[1][bins_in]
            into = to_grid >= 0
            n_grid = self._tuning_counts.shape[1]
            _add_ones(self._tuning_counts.reshape(-1), rows_in[into] * n_grid + to_grid[into])
        # Evaluation windows see every spike of a known unit, running or not, as a live decoder would.
        self._count_in_cv_windows(t, rows)

    def _count_in_cv_windows(self, t: np.ndarray, rows: np.ndarray) -> None:
        if self._cv_t.size == 0 or t.size == 0:
            return
        half = 0.5 * self.cv_window_s
        # Sample s's window is [t_s - half, t_s + half).
        lo = np.searchsorted(self._cv_t, t - half, side="right")
        hi = np.searchsorted(self._cv_t, t + half, side="right")
        n = hi - lo
        if not np.any(n):
            return
        spike = np.repeat(np.arange(len(t)), n)
        offset = np.arange(spike.size) - np.repeat(np.cumsum(n) - n, n)
        self._cv_pairs.append((lo[spike] + offset, rows[spike]))
        if len(self._cv_pairs) > 64:
            self._cv_pairs = [tuple(np.concatenate(parts) for parts in zip(*self._cv_pairs))]

    def _trim_history(self) -> None:
        """Forget frames older than ``max_spike_delay_s`` that no pending work needs."""
        t = self._ft
        if t.size == 0:
            return
        keep_from = int(np.searchsorted(t, t[-1] - self.max_spike_delay_s, side="left"))
        # Unsettled intervals need their speed window; waiting spikes reach
        # back half an evaluation window from the settled horizon.
        reach_s = 0.5 * max(self.speed_window_s, self.cv_window_s)
        needed_from = int(np.searchsorted(t, t[self._n_final] - reach_s, side="left")) - 1
        cut = max(0, min(keep_from, needed_from, self._n_final))
        if cut:
            self._ft, self._fxy, self._fbin = t[cut:], self._fxy[cut:], self._fbin[cut:]
            self._iv_status, self._iv_fold = self._iv_status[cut:], self._iv_fold[cut:]
            self._n_final -= cut

    # ------------------------------------------------------------------
    # Estimation
    # ------------------------------------------------------------------

    def _output_order(self) -> np.ndarray:
        """Rows in output order: as given, or by ascending unit id."""
        ids = np.asarray(self._unit_list, dtype=np.int64)
        return np.arange(len(ids)) if self.unit_ids is not None else np.argsort(ids, kind="stable")

    def _totals(self, exclude_fold: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Spike counts (n_units, n_bins) and occupancy (n_bins,) over folds, in output order."""
        folds = [f for f in range(self.cv_folds) if f != exclude_fold]
        held = self._fold_counts[:, : len(self._unit_list)]
        # Integer sums are exact in any order, so the whole array is summed in
        # place rather than gathered fold by fold and row by row first.
        counts = held.sum(axis=0, dtype=np.int64)
        if exclude_fold is not None:
            counts -= held[exclude_fold]
        occupancy = self._fold_occ[folds].sum(axis=0)
        return counts[self._output_order()], occupancy

    def _visited(self, occupancy: np.ndarray, env: Environment | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Occupancy around each bin (n_bins,) and the bins the decoder may use.

        A bin is used when the running time in its neighbourhood, weighted by
        a Gaussian of ``smooth_cm`` with weight 1 at the bin itself, reaches
        ``min_occupancy_s``. With small bins a running animal spends well
        under 0.1 s in most bins it crosses, so a threshold on each bin's own
        time would leave holes along its path; the neighbourhood fills them,
        and the smoothed rate maps are defined there (common practice).
        """
        env = self.environment if env is None else env
        s = self.smooth_cm / env.bin_cm
        # Sum of a unit-peak Gaussian over the grid (2-D) or the track (1-D).
        peak_to_sum = 2.0 * np.pi * s * s if env.ndim_spatial == 2 else np.sqrt(2.0 * np.pi) * s
        every_bin = np.ones(env.n_bins, dtype=bool)
        around = env.smooth(occupancy, every_bin, self.smooth_cm) * max(peak_to_sum, 1.0)
        return around, env.valid_mask & (occupancy.sum() > 0) & (around >= self.min_occupancy_s)

    def _rate_maps(
        self, counts: np.ndarray, occupancy: np.ndarray, env: Environment | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Smoothed rate maps (n_units, n_bins) and the visited mask from totals, on ``env`` (the model's)."""
        env = self.environment if env is None else env
        valid = env.valid_mask
        _, visited = self._visited(occupancy, env)
        if not np.any(visited):
            raise ValueError(
                f"no bin has min_occupancy_s={self.min_occupancy_s} s of running yet "
                f"(running time so far {occupancy.sum():.1f} s); feed more frames of the animal moving "
                f"faster than min_speed_cm_s={self.min_speed_cm_s}"
            )
        spikes = env.smooth(counts.astype(np.float64), valid, self.smooth_cm)
        time = env.smooth(occupancy, valid, self.smooth_cm)
        rates = np.zeros_like(spikes)
        np.divide(spikes, time, out=rates, where=visited & (time > 0))
        rates = np.where(visited, np.maximum(rates, self.rate_floor_hz), 0.0)
        return rates, visited

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
        logger.info(
            "fitted %d units on %d visited bins from %.1f s of running",
            len(self.unit_ids_), int(visited.sum()), occupancy.sum(),
        )
        return self

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
        _, visited = self._visited(occupancy)
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
        )

    def _count_tuned(self, counts: np.ndarray, occupancy: np.ndarray, env: Environment) -> int:
        """Units whose maps on ``env`` pass the tuning thresholds (0 before any bin is visited)."""
        _, visited = self._visited(occupancy, env)
        if not (np.any(visited) and len(counts)):
            return 0
        rates, visited = self._rate_maps(counts, occupancy, env)
        bits, _ = skaggs_information(rates, np.where(visited, occupancy, 0.0))
        tuned = (bits >= _TUNED_BITS_PER_SPIKE) & (rates.max(axis=1) >= _TUNED_PEAK_HZ)
        return int(np.count_nonzero(tuned))

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
            env = self.environment
            factor = int(self.smooth_cm // env.bin_cm)
            if env.grid_shape is None or factor < 2:
                grid, to_grid = env, np.arange(env.n_bins)
            else:
                grid = Environment.from_dict({**env.to_dict(), "bin_cm": factor * env.bin_cm})
                to_grid = np.where(env.valid_mask, grid.bin_index(env.bin_centers_cm), -1)
            self._tuning = (grid, to_grid)
            n = len(self._unit_list)
            fine = self._fold_counts[:, :n].sum(axis=0, dtype=np.int64)
            self._tuning_counts = np.zeros((self._fold_counts.shape[1], grid.n_bins), dtype=np.int64)
            into = np.flatnonzero(to_grid >= 0)
            np.add.at(self._tuning_counts, (slice(0, n), to_grid[into]), fine[:, into])
        return self._tuning

    def _cv_counts(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sparse spike counts per sample: sample index, output row, count; sorted by sample."""
        self._flush()
        if not self._cv_pairs:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty, np.zeros(0)
        sample, row = (np.concatenate(parts) for parts in zip(*self._cv_pairs))
        to_output = np.empty(self.n_units, dtype=np.int64)
        to_output[self._output_order()] = np.arange(self.n_units)
        code = sample * self.n_units + to_output[row]
        uniq, counts = np.unique(code, return_counts=True)
        return uniq // self.n_units, uniq % self.n_units, counts.astype(np.float64)

    def cross_validated_error_cm(self) -> CrossValidatedError:
        """Median decoding error on held-out folds.

        For each fold, rate maps are fitted on the other folds and every
        evaluation sample of the held-out fold is decoded with a uniform
        prior from the spikes within ``cv_window_s`` around it. Samples
        whose window holds no spike carry no information and are skipped.

        Returns
        -------
        CrossValidatedError

        References
        ----------
        Zhang, K., Ginzburg, I., McNaughton, B. L. & Sejnowski, T. J. (1998).
        Interpreting neuronal population activity by reconstruction: unified
        framework with application to hippocampal place cells. Journal of
        Neurophysiology 79, 1017-1044.
        """
        self._flush()
        sample, row, count = self._cv_counts()
        with_spikes = np.unique(sample)
        if with_spikes.size == 0:
            raise ValueError(
                "no evaluation sample with spikes yet; cross-validation needs running time and spikes"
            )
        bounds = np.searchsorted(sample, with_spikes), np.searchsorted(sample, with_spikes, side="right")
        decoded = np.full((len(with_spikes), 2), np.nan)
        fold_of = self._cv_fold[with_spikes]
        for fold in range(self.cv_folds):
            held_out = np.flatnonzero(fold_of == fold)
            if held_out.size == 0:
                continue
            counts, occupancy = self._totals(exclude_fold=fold)
            if not np.any(occupancy >= max(self.min_occupancy_s, np.finfo(float).tiny)):
                logger.info("fold %d has no training data in the other folds; skipped", fold)
                continue
            rates, visited = self._rate_maps(counts, occupancy)
            decoder = BayesDecoder(
                rates, self.environment, visited, self.cv_window_s,
                prior="uniform", rate_floor_hz=self.rate_floor_hz,
            )
            for i in held_out:
                lo, hi = bounds[0][i], bounds[1][i]
                step = decoder.decode(row[lo:hi].astype(np.int64), count[lo:hi])
                decoded[i] = step.map_xy_cm
        errors = self.environment.distance_cm(decoded, self._cv_xy[with_spikes])
        ok = np.isfinite(errors)
        errors, fold_of = errors[ok], fold_of[ok]
        if errors.size == 0:
            raise ValueError("no held-out sample could be decoded; the folds need more running time")
        fold_n = np.bincount(fold_of, minlength=self.cv_folds)
        fold_median = np.array(
            [np.median(errors[fold_of == f]) if fold_n[f] else np.nan for f in range(self.cv_folds)]
        )
        return CrossValidatedError(
            median_cm=float(np.median(errors)),
            fold_median_cm=fold_median,
            fold_n_samples=fold_n,
            errors_cm=errors,
            fold_of_sample=fold_of,
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
        spikes still waiting to be settled are not saved.

        Parameters
        ----------
        path : str or path-like
            Written exactly as given (no suffix is added).
        """
        self._flush()
        path = Path(path)
        fitted = hasattr(self, "rate_maps_hz_")
        header = {
            "format": FORMAT_NAME,
            "version": FORMAT_VERSION,
            "environment": self.environment.to_dict(),
            "settings": self._settings(),
            "unit_list": self._unit_list,
            "counters": self._counters,
            "t0_s": self._t0,
            "running_s": self._running_s,
            "fitted": fitted,
        }
        if self._cv_pairs:
            sample, row = (np.concatenate(parts) for parts in zip(*self._cv_pairs))
        else:
            sample = row = np.zeros(0, dtype=np.int64)
        arrays = {
            "header": np.array(json.dumps(header, default=_json_default)),
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
        # Written beside the target and renamed, so that a crash mid-write
        # never leaves a half file under the model's name.
        partial = path.with_name(path.name + ".partial")
        try:
            with open(partial, "wb") as fh:
                np.savez_compressed(fh, **arrays)
            os.replace(partial, path)
        finally:
            partial.unlink(missing_ok=True)
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
        path = Path(path)
        with open(path, "rb") as fh:
            magic = fh.read(4)
        if magic != b"PK\x03\x04":
            raise ModelFileError(f"{path} is not a placeloop place-model file (it is not an .npz archive)")
        try:
            with np.load(path, allow_pickle=False) as npz:
                if "header" not in npz.files:
                    raise ModelFileError(
                        f"{path} is an .npz archive but not a placeloop place-model file (no header)"
                    )
                header = json.loads(str(npz["header"][()]))
                if not isinstance(header, dict) or header.get("format") != FORMAT_NAME:
                    raise ModelFileError(f"{path} is an .npz archive but not a placeloop place-model file")
                if header.get("version") != FORMAT_VERSION:
                    raise ModelFileError(
                        f"{path} is a place-model file of format version {header.get('version')!r}; "
                        f"this placeloop reads version {FORMAT_VERSION} only"
                    )
                arrays = {name: npz[name] for name in npz.files if name != "header"}
            return cls._from_parts(header, arrays)
        except ModelFileError:
            raise
        except (zipfile.BadZipFile, EOFError, zlib.error, OSError, ValueError, KeyError, TypeError) as exc:
            raise ModelFileError(f"{path} is truncated or damaged ({exc}); save the model again") from None

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
            if model.rate_maps_hz_.shape != (len(model.unit_ids_), n_bins):
                raise ValueError("the rate maps do not match the header's units and bins")
        return model
