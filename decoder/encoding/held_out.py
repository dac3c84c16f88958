"""The newest spikes of the learning period, kept to calibrate the filter on held-out steps.

The likelihood temperature (:mod:`decoder.encoding.calibration`) is fitted
by decoding learning data that the encoding models did not see. The place
model's folds say which maps did not see which stretch of time; this buffer
keeps the spikes themselves, every spike of every unit (running or not, as
the live decoder sees them), for the newest :data:`HELD_OUT_S` seconds of
data and at most :data:`MAX_HELD_OUT_SPIKES` spikes: 16 bytes a spike, so
at most 16 MB. At fit time :meth:`HeldOutSpikes.step_counts` bins them in
non-overlapping steps of the decoder's step.

The mark model keeps its marked spikes in one too (the electrode group as
the id, the marks beside: 4 bytes more per channel), and
:meth:`HeldOutSpikes.step_spikes` hands them back step by step, for the
fold's mark model to weigh.
"""

from __future__ import annotations

import math

import numpy as np

#: Data time of spikes kept (s): the newest minute of learning. At 20 ms
#: steps that is 3,000 held-out steps; the place model uses at most
#: ``MAX_CALIBRATION_STEPS`` of them.
HELD_OUT_S = 60.0

#: Most spikes kept; 300 units at 30 Hz over ``HELD_OUT_S`` is 540,000.
MAX_HELD_OUT_SPIKES = 1_000_000

#: Chunks of arrivals are merged into one array once this many are held.
_MERGE_EVERY = 256


class HeldOutSpikes:
    """The newest spikes, by data time, within fixed bounds of time and memory.

    Examples
    --------
    >>> held = HeldOutSpikes()
    >>> held.add(np.array([0.005, 0.031, 0.032, 0.045]), np.array([7, 7, 9, 9]))
    >>> ends, counts = held.step_counts(0.02, np.array([7, 9]))
    >>> ends.tolist(), counts.tolist()
    ([0.02, 0.04], [[1, 0], [1, 1]])
    """

    def __init__(self, keep_s: float = HELD_OUT_S, max_spikes: int = MAX_HELD_OUT_SPIKES) -> None:
        self.keep_s = float(keep_s)
        self.max_spikes = int(max_spikes)
        self._t: list[np.ndarray] = []
        self._unit: list[np.ndarray] = []
        self._marks: list[np.ndarray] = []
        self._n = 0
        self._newest_s = -math.inf
        # Every spike after this time is kept (until one is dropped, all are).
        self._complete_from_s = -math.inf

    def add(self, t_s: np.ndarray, unit_ids: np.ndarray, marks_uv: np.ndarray | None = None) -> None:
        """Keep a batch of spikes (validated by the caller; any order; non-finite times are dropped).

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
        unit_ids : ndarray of int, shape (n,)
            Unit, or electrode group, of each spike.
        marks_uv : ndarray of float32, shape (n, n_channels), optional
            Each spike's mark; a buffer holds marks with every batch or with none.
        """
        t = np.asarray(t_s, np.float64)
        finite = np.isfinite(t)
        if not finite.any():
            return
        t, ids = t[finite], np.asarray(unit_ids, np.int64)[finite]
        if (marks_uv is not None) != bool(self._marks) and self._t:
            raise ValueError("a held-out buffer holds marks with every batch or with none")
        if marks_uv is not None:
            self._marks.append(np.asarray(marks_uv, np.float32)[finite])
        self._t.append(t)
        self._unit.append(ids)
        self._n += t.size
        self._newest_s = max(self._newest_s, float(t.max()))
        if len(self._t) >= _MERGE_EVERY or self._n > 2 * self.max_spikes:
            self._merge()

    def _merge(self) -> None:
        """One array of the spikes within ``keep_s`` of the newest, at most ``max_spikes`` of the newest."""
        if not self._t:
            return
        t, ids = np.concatenate(self._t), np.concatenate(self._unit)
        marks = None
        if self._marks:
            # Batches of narrower groups are padded with zeros to the widest.
            marks = np.zeros((t.size, max(m.shape[1] for m in self._marks)), np.float32)
            at = 0
            for m in self._marks:
                marks[at : at + len(m), : m.shape[1]] = m
                at += len(m)
        keep = t >= self._newest_s - self.keep_s
        if not keep.all():
            self._complete_from_s = max(self._complete_from_s, self._newest_s - self.keep_s)
        order = np.flatnonzero(keep)
        if order.size > self.max_spikes:
            order = order[np.argsort(t[order], kind="stable")]
            self._complete_from_s = max(self._complete_from_s, float(t[order[-self.max_spikes - 1]]))
            order = order[-self.max_spikes :]
        t, ids = t[order], ids[order]
        self._t, self._unit, self._n = [t], [ids], t.size
        if marks is not None:
            self._marks = [marks[order]]

    def step_range(self, step_s: float) -> tuple[int, int]:
        """First and last index ``k`` of the steps ``((k - 1) step_s, k step_s]`` whose every spike is kept.

        None that began before spikes were dropped, none that ends after the
        newest spike (more may still arrive); ``last < first`` when there is
        none. The decoder's steps end at multiples of ``step_s`` and take the
        spikes up to and including their end.

        Parameters
        ----------
        step_s : float

        Returns
        -------
        first, last : int
        """
        self._merge()
        if not self._t or self._t[0].size == 0:
            return 0, -1
        first = int(np.ceil(self._t[0].min() / step_s))
        if math.isfinite(self._complete_from_s):
            first = max(first, math.ceil(self._complete_from_s / step_s) + 1)
        return first, math.floor(self._newest_s / step_s)

    def _step_of(self, step_s: float, steps: tuple[int, int] | None) -> tuple[int, int, np.ndarray, np.ndarray]:
        """The range of steps asked (within :meth:`step_range`), each kept spike's step index and which are inside."""
        first, last = self.step_range(step_s)
        if steps is not None:
            first, last = max(first, steps[0]), min(last, steps[1])
        if last < first:
            return first, last, np.zeros(0, np.int64), np.zeros(0, bool)
        # Step k holds (k - 1) step_s < t <= k step_s.
        k = np.ceil(self._t[0] / step_s).astype(np.int64)
        return first, last, k, (k >= first) & (k <= last)

    def step_counts(self, step_s: float, unit_ids: np.ndarray,
                    steps: tuple[int, int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Spike counts of the kept spikes in steps ``((k - 1) step_s, k step_s]``.

        Only the steps of :meth:`step_range` are returned.

        Parameters
        ----------
        step_s : float
        unit_ids : ndarray of int64, shape (n_units,)
            Unit of each column; spikes of other units are left out.
        steps : (int, int), optional
            Only the steps ``first..last`` of these (those of another buffer, for instance).

        Returns
        -------
        step_end_s : ndarray of float64, shape (n_steps,)
        counts : ndarray of int64, shape (n_steps, n_units)
        """
        ids = np.asarray(unit_ids, np.int64)
        first, last, k, inside = self._step_of(step_s, steps)
        if last < first:
            return np.zeros(0), np.zeros((0, ids.size), np.int64)
        counts = np.zeros((last - first + 1, ids.size), np.int64)
        if ids.size:
            spike_ids = self._unit[0]
            order = np.argsort(ids, kind="stable")
            at = np.clip(np.searchsorted(ids, spike_ids, sorter=order), 0, ids.size - 1)
            column = order[at]
            inside = inside & (ids[column] == spike_ids)
            np.add.at(counts, (k[inside] - first, column[inside]), 1)
        return np.arange(first, last + 1) * step_s, counts

    def step_spikes(self, step_s: float,
                    steps: tuple[int, int] | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The kept spikes of whole steps, in time order, each with its step; as :meth:`step_counts`.

        Parameters
        ----------
        step_s : float
        steps : (int, int), optional
            As in :meth:`step_counts`.

        Returns
        -------
        step_end_s : ndarray of float64, shape (n_steps,)
        step_index : ndarray of int64, shape (n,)
            Each spike's step, an index into ``step_end_s``.
        ids : ndarray of int64, shape (n,)
        marks_uv : ndarray of float32, shape (n, n_channels)
            Zero columns in a buffer without marks.
        """
        first, last, k, inside = self._step_of(step_s, steps)
        width = self._marks[0].shape[1] if self._marks else 0
        if last < first:
            return np.zeros(0), np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, width), np.float32)
        pick = np.flatnonzero(inside)
        pick = pick[np.argsort(self._t[0][pick], kind="stable")]
        marks = self._marks[0][pick] if self._marks else np.zeros((pick.size, 0), np.float32)
        return np.arange(first, last + 1) * step_s, k[pick] - first, self._unit[0][pick], marks
