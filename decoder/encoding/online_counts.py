"""What a session delivers, reduced online to occupancy and spike counts per bin, unit and fold.

:class:`OnlineCounts` takes tracker frames and spikes as a session delivers
them, in any interleaving, and keeps only what rate maps need: running
occupancy and spike counts per bin, per unit and per cross-validation fold,
plus a sparse set of evaluation samples. Memory is bounded by
``bins x units x folds``; no whole-session array is kept. It is the online
half of :class:`decoder.encoding.place_model.PlaceModel`, which fits the
maps from these counts.

Occupancy comes from the intervals between consecutive valid frames: each
interval of at most ``max_frame_gap_s`` adds its length to the bin of its
first frame when the animal runs at least ``min_speed_cm_s`` there. A spike
is placed at the position interpolated between the two frames around it and
counted only if that interval counted for occupancy.

Running speed at a frame is the least-squares slope of position against
time over the frames within ``speed_window_s / 2`` of it (and at least its
two neighbours; :mod:`decoder.encoding.running_speed`). An interval is
settled only once the frames that complete its speed window have arrived,
so the last half window of a session waits for more frames and is not yet
in the maps.

Arrivals are held briefly and worked in together (up to 64 frames or spike
batches, and always before anything reads the counts): a tracker sends one
frame per message, and settling each alone would cost far more than the
frame's share of a batch. The result is the same, to the bit, as working in
each arrival on the spot, whatever the chunking (see ``OnlineCounts._flush``).

Spikes wait in a bounded buffer until the frames around them are settled
(and half an evaluation window beyond, so that every evaluation sample that
could hold them exists). Frames are kept for ``max_spike_delay_s``, so a
spike delivered late is still placed; one later than that is dropped and
counted, as are spikes of unknown units and spikes outside the environment.
"""

from __future__ import annotations

import collections
import logging
import math
from typing import Any

import numpy as np

from decoder.encoding.cross_validation import cv_block
from decoder.encoding.running_speed import running_speed
from decoder.space.environments import Environment

logger = logging.getLogger(__name__)

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
#: ``OnlineCounts._flush``).
_FRAME_BATCH = 64

#: Most recent tracked frames kept for learning the movement model at fit
#: time: 30 minutes at 50 Hz, 2 MB.
_MAX_MOVEMENT_FRAMES = 90_000

#: Unit ids below this are looked up in a table rather than a dict.
_MAX_UNIT_TABLE = 1 << 20

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


class OnlineCounts:
    """Occupancy, spike counts and evaluation samples accumulated online from frames and spikes.

    The settings and what they mean are those of
    :class:`decoder.encoding.place_model.PlaceModel`, which builds on this
    class and documents them; a PlaceModel is how the counts are used.
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
        # Counts up whenever the totals (occupancy, spike counts, units) change.
        self._revision = 0
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
        # The newest valid frames (at most _MAX_MOVEMENT_FRAMES, in whole
        # batches), for the movement model; all frames, running or not.
        self._move_batches: collections.deque[tuple[np.ndarray, np.ndarray]] = collections.deque()
        self._n_move_frames = 0
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
        self._counters["frames_received"] += len(t)
        if len(t) == 1:
            # A tracker sends one frame per message: reading it costs more than the rule.
            frames = [(t.item(0), xy.item(0), xy.item(1))]
        else:
            frames = zip(t.tolist(), xy[:, 0].tolist(), xy[:, 1].tolist())
        take = self._take_frame
        kept = [frame for frame in frames if take(*frame)]
        if not kept:
            return
        if len(kept) >= _FRAME_BATCH:
            # A batch this long gains nothing from being held.
            self._flush()
            txy = np.array(kept)
            self._work_in_frames(txy[:, 0], txy[:, 1:], [len(kept)])
            return
        for t_s, x_cm, y_cm in kept:
            self._held_t.append(t_s)
            self._held_xy.append((x_cm, y_cm))
        self._held_calls.append(len(self._held_t))
        if len(self._held_t) >= _FRAME_BATCH:
            self._flush()

    def _take_frame(self, t_s: float, x_cm: float, y_cm: float) -> bool:
        """Count one frame; True when it has a finite time, is newer than any before, and is seen.

        The one rule for every frame: a batch is taken frame by frame, so a
        message's single frame and a long batch are judged alike. Python
        floats rather than numpy, because a tracker sends one frame per
        message and numpy's calls on one element cost more than the rule.
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
        self._keep_movement_frames(t, xy)
        self._settle_intervals()
        horizons = None
        if len(calls) > 1 and self._pend_t.size:
            horizons = self._horizons_after(m0 + np.asarray(calls), n_final0)
        self._release_spikes(horizons)
        self._trim_history()

    def _keep_movement_frames(self, t: np.ndarray, xy: np.ndarray) -> None:
        self._move_batches.append((t, xy))
        self._n_move_frames += len(t)
        while self._n_move_frames - len(self._move_batches[0][0]) >= _MAX_MOVEMENT_FRAMES:
            self._n_move_frames -= len(self._move_batches.popleft()[0])

    def movement_frames(self) -> tuple[np.ndarray, np.ndarray]:
        """The newest tracked frames kept for the movement model (about ``_MAX_MOVEMENT_FRAMES``).

        Returns
        -------
        t_s : ndarray of float64, shape (n,)
            Frame times, strictly increasing, data time.
        xy_cm : ndarray of float64, shape (n, 2)
        """
        self._flush()
        if not self._move_batches:
            return np.zeros(0), np.zeros((0, 2))
        t, xy = (np.concatenate(parts) for parts in zip(*self._move_batches))
        return t, xy

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
        self._revision += 1
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
        speed = running_speed(t, self._fxy, start, stop, half, self.max_frame_gap_s)
        dt = t[k + 1] - t[k]
        status = np.full(len(k), _COUNTED, dtype=np.int8)
        status[~(speed >= self.min_speed_cm_s)] = _SLOW
        status[self._fbin[k] < 0] = _OUTSIDE
        status[dt > self.max_frame_gap_s] = _GAP
        block = cv_block(t[k], self._t0, self.cv_block_s).astype(np.int64)
        fold = block % self.cv_folds
        self._iv_status[k] = status
        self._iv_fold[k] = fold
        counted = status == _COUNTED
        np.add.at(self._fold_occ, (fold[counted], self._fbin[k][counted]), dt[counted])
        self._revision += 1
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
        same_block = cv_block(ts - half, self._t0, self.cv_block_s) == cv_block(
            ts + half, self._t0, self.cv_block_s
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
        self._revision += 1
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
    # The counts, in output order
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

