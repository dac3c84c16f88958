"""Binning spikes into decoding windows by data time.

Spikes are held sorted by time, as decoder rows; a window ``(t_end_s -
window_s, t_end_s]`` is counted and decoded in one compiled call, and the
spikes before it are forgotten. Which steps close when is the session's
business (``decoder.session.steps``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numba
import numpy as np

if TYPE_CHECKING:
    from decoder.inference.decoding import BayesDecoder, DecodedStep


@numba.njit(cache=True)
def append_known_spikes(t_s, unit_ids, known_ids, row_of_known, closed_until_s, held_t_s, held_rows, stop):
    """Append the spikes of known units, as decoder rows, at ``stop`` of the held arrays.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
    unit_ids : ndarray of int64, shape (n,)
    known_ids : ndarray of int64, shape (n_known,)
        The units the decoder has rows for, ascending, each once.
    row_of_known : ndarray of int64, shape (n_known,)
        The decoder row of each unit of ``known_ids``.
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

    Notes
    -----
    A binary search over the known ids rather than a table indexed by id:
    a rig's unit ids are labels (tetrode * 100 + cluster, or wider), and a
    search over a few hundred ids costs a handful of comparisons, whatever
    their spread.
    """
    n_known = known_ids.size
    n_unknown = 0
    n_late = 0
    for i in range(t_s.size):
        unit = unit_ids[i]
        j = np.searchsorted(known_ids, unit)
        if j == n_known or known_ids[j] != unit:
            n_unknown += 1
            continue
        if t_s[i] <= closed_until_s:
            n_late += 1
        held_t_s[stop] = t_s[i]
        held_rows[stop] = row_of_known[j]
        stop += 1
    return stop, n_unknown, n_late


def append_known_spikes_numpy(t_s, unit_ids, known_ids, row_of_known, closed_until_s, held_t_s, held_rows, stop):
    """Numpy twin of :func:`append_known_spikes` (the tests' reference)."""
    j = np.minimum(np.searchsorted(known_ids, unit_ids), known_ids.size - 1)
    known = known_ids[j] == unit_ids
    n = int(np.count_nonzero(known))
    held_t_s[stop:stop + n] = t_s[known]
    held_rows[stop:stop + n] = row_of_known[j[known]]
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
        if n_units < 0:
            raise ValueError(f"n_units must be >= 0, got {n_units}")
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

    def add_units(self, t_s: np.ndarray, unit_ids: np.ndarray, known_ids: np.ndarray, row_of_known: np.ndarray,
                  closed_until_s: float) -> tuple[int, int]:
        """Add spikes given by unit id, looked up among the known units, in one compiled pass.

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
            Sorted; may be older than spikes already held.
        unit_ids : ndarray of int64, shape (n,)
        known_ids : ndarray of int64, shape (n_known,)
            Units with a decoder row, ascending; spikes of other units are left out.
        row_of_known : ndarray of int64, shape (n_known,)
            The row of each known unit.
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
            t_s, unit_ids, known_ids, row_of_known, closed_until_s, self._t, self._row, stop
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

    def decode(self, decoder: BayesDecoder, t_end_s: float, mark_log_like: np.ndarray | None = None,
               mark_expected: np.ndarray | None = None) -> DecodedStep:
        """Decode the window ``(t_end_s - window_s, t_end_s]`` and forget the spikes before it.

        For a caller whose windows only move forward, as decoding steps do:
        no later window needs the forgotten spikes.

        Parameters
        ----------
        decoder : BayesDecoder
            With the same ``window_s``; counts and decodes the window in one
            call (:meth:`~decoder.inference.decoding.BayesDecoder.decode_held`).
        t_end_s : float
        mark_log_like, mark_expected : ndarray of float64, shape (n_bins,), optional
            The window's terms from waveform marks, passed on to the decoder.

        Returns
        -------
        DecodedStep
        """
        step, first = decoder.decode_held(self._t, self._row, self._start, self._stop, t_end_s, mark_log_like,
                                          mark_expected)
        self._start = first
        return step
