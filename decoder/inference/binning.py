"""Binning spikes into decoding windows by data time.

Steps end at whole multiples of the step length on the reference (spike)
clock, ``t_k = k * step_s``, so that a live run and its replay close the same
steps whatever the first message was. Step ``k`` closes once the spike
stream's watermark (its newest timestamp or heartbeat) has passed ``t_k`` by
the allowed lateness; the window of step ``k`` is ``(t_k - window_s, t_k]``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numba
import numpy as np

if TYPE_CHECKING:
    from decoder.inference.decoding import BayesDecoder, DecodedStep


@numba.njit(cache=True)
def window_counts(t_s, rows, start, stop, t_end_s, window_s, n_units):
    """Spike counts per row in ``(t_end_s - window_s, t_end_s]`` over ``t_s[start:stop]`` (sorted).

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
    rows : ndarray of int64, shape (n,)
        Row ``0..n_units-1`` of each spike.
    start, stop : int
        The held part of the arrays.
    t_end_s, window_s : float
    n_units : int

    Returns
    -------
    fired : ndarray of int64, shape (k,)
        Rows that fired, ascending.
    counts : ndarray of float64, shape (k,)
    """
    held = t_s[start:stop]
    lo = start + np.searchsorted(held, t_end_s - window_s, side="right")
    hi = start + np.searchsorted(held, t_end_s, side="right")
    binned = np.zeros(n_units, np.int64)
    for i in range(lo, hi):
        binned[rows[i]] += 1
    k = 0
    for c in binned:
        if c:
            k += 1
    fired = np.empty(k, np.int64)
    counts = np.empty(k, np.float64)
    k = 0
    for r in range(n_units):
        if binned[r]:
            fired[k] = r
            counts[k] = binned[r]
            k += 1
    return fired, counts


def window_counts_numpy(t_s, rows, start, stop, t_end_s, window_s, n_units):
    """Numpy twin of :func:`window_counts` (the tests' reference)."""
    held_t, held_rows = t_s[start:stop], rows[start:stop]
    lo = np.searchsorted(held_t, t_end_s - window_s, side="right")
    hi = np.searchsorted(held_t, t_end_s, side="right")
    binned = np.bincount(held_rows[lo:hi], minlength=n_units)
    fired = np.flatnonzero(binned)
    return fired.astype(np.int64), binned[fired].astype(np.float64)


@numba.njit(cache=True)
def append_known_spikes(t_s, unit_ids, row_of_id, first_id, closed_until_s, held_t_s, held_rows, stop):
    """Append the spikes whose unit a lookup table knows, as rows, at ``stop`` of the held arrays.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
    unit_ids : ndarray of int64, shape (n,)
    row_of_id : ndarray of int64, shape (span,)
        Row of unit ``first_id + i`` at ``i``, or -1 for a unit without one.
    first_id : int
    closed_until_s : float
        End of the last step already decoded; a known spike at or before it
        is late (counted, still appended).
    held_t_s : ndarray of float64, shape (>= stop + n,)
    held_rows : ndarray of int64, shape (>= stop + n,)
        Receive the known spikes from ``stop`` on, in their order.
    stop : int

    Returns
    -------
    stop : int
        The new end of the held spikes.
    n_unknown : int
        Spikes left out: their unit has no row.
    n_late : int
    """
    span = row_of_id.size
    n_unknown = 0
    n_late = 0
    for i in range(t_s.size):
        j = unit_ids[i] - first_id
        row = row_of_id[j] if 0 <= j < span else -1
        if row < 0:
            n_unknown += 1
            continue
        if t_s[i] <= closed_until_s:
            n_late += 1
        held_t_s[stop] = t_s[i]
        held_rows[stop] = row
        stop += 1
    return stop, n_unknown, n_late


def append_known_spikes_numpy(t_s, unit_ids, row_of_id, first_id, closed_until_s, held_t_s, held_rows, stop):
    """Numpy twin of :func:`append_known_spikes` (the tests' reference)."""
    j = unit_ids - first_id
    inside = (j >= 0) & (j < row_of_id.size)
    rows = np.full(unit_ids.size, -1, np.int64)
    rows[inside] = row_of_id[j[inside]]
    known = rows >= 0
    n = int(np.count_nonzero(known))
    held_t_s[stop:stop + n] = t_s[known]
    held_rows[stop:stop + n] = rows[known]
    return stop + n, int(unit_ids.size - n), int(np.count_nonzero(t_s[known] <= closed_until_s))


#: Spikes the window's buffer holds before it first grows.
_CAPACITY = 4096


class SpikeWindow:
    """Recent spikes, kept sorted by time, counted per window.

    Parameters
    ----------
    n_units : int
        Number of decoder rows; spikes carry a row index ``0..n_units-1``.
    window_s : float
        Window length (s); spikes older than the oldest window still to be
        decoded are discarded.
    """

    def __init__(self, n_units: int, window_s: float) -> None:
        if n_units < 1:
            raise ValueError(f"n_units must be >= 1, got {n_units}")
        if not window_s > 0:
            raise ValueError(f"window_s must be positive, got {window_s}")
        self.n_units = int(n_units)
        self.window_s = float(window_s)
        # A preallocated buffer holding spikes [start, stop), compacted when
        # the end is reached: a batch comes every few ms, and a concatenation
        # per batch cost more than counting.
        self._t = np.zeros(_CAPACITY, np.float64)
        self._row = np.zeros(_CAPACITY, np.int64)
        self._start = 0
        self._stop = 0

    def __len__(self) -> int:
        return self._stop - self._start

    def add(self, t_s: np.ndarray, rows: np.ndarray) -> None:
        """Add spikes (shape (n,) each, times sorted); they may be older than spikes already held."""
        n = t_s.size
        if n == 0:
            return
        if self._stop + n > self._t.size:
            self._compact(n)
        stop = self._stop
        self._t[stop:stop + n] = t_s
        self._row[stop:stop + n] = rows
        self._stop = stop + n
        self._keep_sorted(stop)

    def add_units(self, t_s: np.ndarray, unit_ids: np.ndarray, row_of_id: np.ndarray, first_id: int,
                  closed_until_s: float) -> tuple[int, int]:
        """Add spikes given by unit id, through a lookup table, in one compiled pass.

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
            Sorted; may be older than spikes already held.
        unit_ids : ndarray of int64, shape (n,)
        row_of_id : ndarray of int64, shape (span,)
            Row of unit ``first_id + i`` at ``i``, or -1: such spikes are left out.
        first_id : int
        closed_until_s : float
            End of the last step already decoded (``-inf`` if none).

        Returns
        -------
        n_unknown : int
            Spikes left out because their unit has no row.
        n_late : int
            Spikes kept that are at or before ``closed_until_s``.
        """
        n = t_s.size
        if n == 0:
            return 0, 0
        if self._stop + n > self._t.size:
            self._compact(n)
        stop = self._stop
        self._stop, n_unknown, n_late = append_known_spikes(
            t_s, unit_ids, row_of_id, first_id, closed_until_s, self._t, self._row, stop
        )
        self._keep_sorted(stop)
        return n_unknown, n_late

    def _keep_sorted(self, stop: int) -> None:
        """Restore time order after spikes were appended at ``stop``."""
        start = self._start
        if start < stop < self._stop and self._t.item(stop) < self._t.item(stop - 1):
            # Stable, so spikes with equal times keep their arrival order and a
            # replay gives bit-identical windows.
            order = np.argsort(self._t[start:self._stop], kind="stable")
            self._t[start:self._stop] = self._t[start:self._stop][order]
            self._row[start:self._stop] = self._row[start:self._stop][order]

    def _compact(self, incoming: int) -> None:
        """Move the held spikes to the front, growing the buffer if they fill half of it."""
        held = self._stop - self._start
        t, row = self._t[self._start:self._stop].copy(), self._row[self._start:self._stop].copy()
        if held + incoming > self._t.size // 2:
            size = 2 * (held + incoming)
            self._t = np.zeros(size, np.float64)
            self._row = np.zeros(size, np.int64)
        self._t[:held] = t
        self._row[:held] = row
        self._start, self._stop = 0, held

    def counts(self, t_end_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Spike counts of the window ``(t_end_s - window_s, t_end_s]``.

        Returns
        -------
        rows : ndarray of int64, shape (k,)
            Rows that fired, ascending.
        counts : ndarray of float64, shape (k,)
            Their spike counts.
        """
        return window_counts(self._t, self._row, self._start, self._stop, t_end_s, self.window_s, self.n_units)

    def decode(self, decoder: BayesDecoder, t_end_s: float) -> DecodedStep:
        """Decode the window ``(t_end_s - window_s, t_end_s]`` and forget the spikes before it.

        For a caller whose windows only move forward, as decoding steps do:
        no later window needs the forgotten spikes.

        Parameters
        ----------
        decoder : BayesDecoder
            With the same ``window_s``; counts and decodes the window in one
            call (:meth:`~decoder.inference.decoding.BayesDecoder.decode_held`).
        t_end_s : float

        Returns
        -------
        DecodedStep
        """
        step, first = decoder.decode_held(self._t, self._row, self._start, self._stop, t_end_s)
        self._start = first
        return step

    def discard_before(self, t_s: float) -> None:
        """Forget spikes at or before ``t_s`` (no later window can contain them)."""
        self._start += int(self._t[self._start:self._stop].searchsorted(t_s, side="right"))


class StepSchedule:
    """Which decoding steps a watermark closes.

    Parameters
    ----------
    step_s : float
        Step length (s); step ``k`` ends at ``k * step_s``.
    allowed_lateness_s : float
        How far past a step's end the watermark must be before it closes.
    """

    def __init__(self, step_s: float, allowed_lateness_s: float) -> None:
        self.step_s = float(step_s)
        self.allowed_lateness_s = float(allowed_lateness_s)
        self.next_k: int | None = None

    def start_at(self, t_s: float) -> None:
        """Make the first step the first one ending after ``t_s``."""
        self.next_k = math.floor(t_s / self.step_s) + 1

    def step_end_s(self, k: int) -> float:
        return k * self.step_s

    def due(self, watermark_s: float) -> list[int]:
        """Steps that close at this watermark, in order; each is returned once."""
        if self.next_k is None:
            return []
        last_k = math.floor((watermark_s - self.allowed_lateness_s) / self.step_s + 1e-9)
        if last_k < self.next_k:
            return []
        ks = list(range(self.next_k, last_k + 1))
        self.next_k = last_k + 1
        return ks
