"""The newest spikes of the learning period, kept to calibrate the filter on held-out steps.

The likelihood temperature (:mod:`decoder.encoding.calibration`) is fitted
by decoding learning data that the rate maps did not see. The place model's
folds say which maps did not see which stretch of time; this buffer keeps
the spikes themselves, every spike of every unit (running or not, as the
live decoder sees them), for the newest :data:`HELD_OUT_S` seconds of data
and at most :data:`MAX_HELD_OUT_SPIKES` spikes: 16 bytes a spike, so at
most 16 MB. At fit time :meth:`HeldOutSpikes.step_counts` bins them in
non-overlapping steps of the decoder's step.
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
        self._n = 0
        self._newest_s = -math.inf
        # Every spike after this time is kept (until one is dropped, all are).
        self._complete_from_s = -math.inf

    def add(self, t_s: np.ndarray, unit_ids: np.ndarray) -> None:
        """Keep a batch of spikes (validated by the caller; any order; non-finite times are dropped).

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
        unit_ids : ndarray of int, shape (n,)
        """
        t = np.asarray(t_s, np.float64)
        finite = np.isfinite(t)
        if not finite.any():
            return
        t, ids = t[finite], np.asarray(unit_ids, np.int64)[finite]
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
        keep = t >= self._newest_s - self.keep_s
        if not keep.all():
            self._complete_from_s = max(self._complete_from_s, self._newest_s - self.keep_s)
        t, ids = t[keep], ids[keep]
        if t.size > self.max_spikes:
            order = np.argsort(t, kind="stable")
            self._complete_from_s = max(self._complete_from_s, float(t[order[-self.max_spikes - 1]]))
            t, ids = t[order[-self.max_spikes :]], ids[order[-self.max_spikes :]]
        self._t, self._unit, self._n = [t], [ids], t.size

    def step_counts(self, step_s: float, unit_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Spike counts of the kept spikes in steps ``((k - 1) step_s, k step_s]``.

        Only steps whose every spike is kept are returned: none that began
        before spikes were dropped, none that ends after the newest spike
        (more may still arrive). The decoder's steps end at multiples of
        ``step_s`` and take the spikes up to and including their end.

        Parameters
        ----------
        step_s : float
        unit_ids : ndarray of int64, shape (n_units,)
            Unit of each column; spikes of other units are left out.

        Returns
        -------
        step_end_s : ndarray of float64, shape (n_steps,)
        counts : ndarray of int64, shape (n_steps, n_units)
        """
        self._merge()
        ids = np.asarray(unit_ids, np.int64)
        if not self._t or self._t[0].size == 0 or ids.size == 0:
            return np.zeros(0), np.zeros((0, ids.size), np.int64)
        t, spike_ids = self._t[0], self._unit[0]
        order = np.argsort(ids, kind="stable")
        at = np.clip(np.searchsorted(ids, spike_ids, sorter=order), 0, ids.size - 1)
        column = order[at]
        known = ids[column] == spike_ids
        # Step k holds (k - 1) step_s < t <= k step_s.
        k = np.ceil(t / step_s).astype(np.int64)
        first = int(k.min())
        if math.isfinite(self._complete_from_s):
            first = max(first, math.ceil(self._complete_from_s / step_s) + 1)
        last = math.floor(self._newest_s / step_s)
        if last < first:
            return np.zeros(0), np.zeros((0, ids.size), np.int64)
        inside = known & (k >= first) & (k <= last)
        counts = np.zeros((last - first + 1, ids.size), np.int64)
        np.add.at(counts, (k[inside] - first, column[inside]), 1)
        return np.arange(first, last + 1) * step_s, counts
