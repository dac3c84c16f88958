"""Spike sanity: spikes no neuron could have fired are left out of learning and decoding.

Two guards, both on data time, both over a short history carried from one
spike batch to the next:

* **Per-unit rate ceiling.** A neuron's absolute refractory period, about
  1-2 ms (common practice; the usual ISI-violation criterion of spike-sorting
  quality metrics uses a similar bound), caps its instantaneous rate. A unit
  whose ``ceiling_hz * window_s + 1`` spikes fall within less than one window
  (mean ISI under ``1 / ceiling_hz``) is a noise transient on its channel: all
  of those spikes are flagged. With the defaults (500 Hz, i.e. a 2 ms
  refractory period; 10 ms window) that is 6 spikes within 10 ms. A place
  cell's complex-spike burst, 2-6 spikes at 3-6 ms ISI (common practice),
  puts at most 4 spikes in any 10 ms and passes untouched. A lone short ISI
  is not flagged: sorted units carry a few such violations, and dropping
  them would gain nothing.
* **Population-burst guard.** A motion or electrical artefact reaches every
  channel in the same instant. When at least ``max(population_min_units,
  ceil(population_fraction * units seen))`` distinct units fire within
  ``population_window_s`` (defaults 4 units, 50 %, 0.5 ms), every spike in
  that window is flagged. A sharp-wave ripple recruits many cells, but spread
  over ~50-100 ms with each cell firing a spike or two (common practice), so
  only a few percent of the units fall in any one 0.5 ms: it stays far below
  half of them.

A spike flagged by both guards is counted once, under ``unit_rate``.
The rules run in one small numba kernel, :func:`artefact_flags`; its numpy
twin :func:`artefact_flags_numpy` is the tests' reference (measured on the
2-core machine, for a batch of 5-20 spikes with its history: the twin ~25 µs,
the kernel under 2 µs).
Spikes of earlier batches were already handed on and are never recalled: a
transient that starts at the very end of one batch may pass its first
``ceiling_hz * window_s`` spikes, the rest are caught.
"""

from __future__ import annotations

import math

import numba
import numpy as np

#: The reasons a spike is flagged, as counted in :attr:`SpikeSanity.counts`.
REASONS = ("unit_rate", "population")

#: Times closer than this count as equal (s): far below one sample at 30 kHz (33 µs), so spikes at
#: exactly the refractory bound are not flagged for a rounding error.
TIME_TOLERANCE_S = 1e-6

#: Flag codes of :func:`artefact_flags`: kept, or the reason (index into ``REASONS``) plus one.
KEPT, BY_UNIT_RATE, BY_POPULATION = 0, 1, 2

#: Spikes of history and batch the guard's buffers hold before they first grow; they grow to twice the
#: largest batch with its history and stay (18 bytes a spike: about 7 MB after a batch of MAX_BATCH spikes).
_CAPACITY = 1024


@numba.njit(cache=True)
def artefact_flags(t_s, unit_id, max_in_window, window_s, population_window_s, min_units):
    """Flag artefact spikes among time-sorted spikes.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
        Spike times (s), non-decreasing.
    unit_id : ndarray of int64, shape (n,)
    max_in_window : int
        Spikes a unit may fire within less than ``window_s``; 0 turns the per-unit rule off.
    window_s, population_window_s : float
        The windows of the two rules (s).
    min_units : int
        Distinct units within ``population_window_s`` that make a population
        artefact; 0 turns the population rule off.

    Returns
    -------
    flags : ndarray of int8, shape (n,)
        ``KEPT``, ``BY_UNIT_RATE`` or ``BY_POPULATION``.
    """
    n = t_s.size
    flags = np.zeros(n, np.int8)
    span_s = window_s - TIME_TOLERANCE_S
    if max_in_window > 0:
        for i in range(n):
            # Walk back to the max_in_window-th earlier spike of this unit inside the window.
            seen = 0
            j = i - 1
            while j >= 0 and t_s[i] - t_s[j] < span_s:
                if unit_id[j] == unit_id[i]:
                    seen += 1
                    if seen == max_in_window:
                        break
                j -= 1
            if seen == max_in_window and j >= 0 and t_s[i] - t_s[j] < span_s:
                for k in range(j, i + 1):
                    if unit_id[k] == unit_id[i]:
                        flags[k] = BY_UNIT_RATE
    if min_units > 0:
        end = 0
        for i in range(n):
            if end < i:
                end = i
            while end < n and t_s[end] <= t_s[i] + population_window_s:
                end += 1
            if end - i < min_units:
                continue
            distinct = 0
            for p in range(i, end):
                first = True
                for q in range(i, p):
                    if unit_id[q] == unit_id[p]:
                        first = False
                        break
                if first:
                    distinct += 1
                    if distinct >= min_units:
                        break
            if distinct >= min_units:
                for p in range(i, end):
                    if flags[p] == KEPT:
                        flags[p] = BY_POPULATION
    return flags


def artefact_flags_numpy(t_s, unit_id, max_in_window, window_s, population_window_s, min_units):
    """The numpy twin of :func:`artefact_flags` (same parameters and result)."""
    n = t_s.size
    flags = np.zeros(n, np.int8)
    m = max_in_window
    if m > 0 and n > m:
        order = np.lexsort((t_s, unit_id))
        ts, us = t_s[order], unit_id[order]
        dense = (us[m:] == us[:-m]) & (ts[m:] - ts[:-m] < window_s - TIME_TOLERANCE_S)
        by_rate = np.zeros(n, bool)
        for k in range(m + 1):
            by_rate[k:k + dense.size] |= dense
        flags[order[by_rate]] = BY_UNIT_RATE
    if min_units > 0:
        end = np.searchsorted(t_s, t_s + population_window_s, side="right")
        population = np.zeros(n, bool)
        # Enough spikes is necessary for enough units: only those few windows count units.
        for i in np.flatnonzero(end - np.arange(n) >= min_units):
            if np.unique(unit_id[i:end[i]]).size >= min_units:
                population[i:end[i]] = True
        flags[population & (flags == KEPT)] = BY_POPULATION
    return flags


@numba.njit(cache=True)
def _flag_batch_in_order(hist_t, hist_u, n_hist, t_s, unit_id, batch_flags, max_in_window, window_s,
                         population_window_s, min_units, horizon_s):
    """Flag one batch against the history held in place; -1 if the batch starts before the history's newest spike.

    The history is ``hist_t[:n_hist]``, ``hist_u[:n_hist]`` (capacity >= ``n_hist + n``); the batch
    is appended behind it, flagged with it by :func:`artefact_flags`, its flags written to
    ``batch_flags[:n]``, and the spikes of the last ``horizon_s`` up to the batch's newest moved to
    the front as the next history. A spike batch arrives every few ms: buffers kept from one batch to
    the next and plain integers returned leave numba nothing to allocate or box but the flags.

    Returns
    -------
    n_hist : int
        The new history's length, or -1 (nothing touched) for a batch older than the history.
    n_rate, n_population : int
        The batch's spikes flagged by each rule.
    """
    n = t_s.size
    if n_hist and hist_t[n_hist - 1] > t_s[0]:
        return -1, 0, 0
    total = n_hist + n
    hist_t[n_hist:total] = t_s
    hist_u[n_hist:total] = unit_id
    flags = artefact_flags(hist_t[:total], hist_u[:total], max_in_window, window_s, population_window_s,
                           min_units)
    n_rate = 0
    n_population = 0
    for i in range(n):
        f = flags[n_hist + i]
        batch_flags[i] = f
        if f == BY_UNIT_RATE:
            n_rate += 1
        elif f == BY_POPULATION:
            n_population += 1
    lo = np.searchsorted(hist_t[:total], t_s[n - 1] - horizon_s, side="right")
    # Forward, in place: the history moves towards the front, never over a value still to move.
    for i in range(lo, total):
        hist_t[i - lo] = hist_t[i]
        hist_u[i - lo] = hist_u[i]
    return total - lo, n_rate, n_population


class SpikeSanity:
    """Flags artefact spikes, batch by batch.

    Parameters
    ----------
    ceiling_hz : float, default 500.0
        Per-unit instantaneous-rate ceiling (Hz): 1 / an absolute refractory
        period of 2 ms (common practice). 0 turns the per-unit guard off.
    window_s : float, default 0.010
        Window over which a unit's rate is held to the ceiling (s).
    population_fraction : float, default 0.5
        Fraction of the units seen so far that, firing within
        ``population_window_s``, make a population artefact. 0 turns the
        population guard off.
    population_window_s : float, default 0.0005
        The instant of a population artefact (s).
    population_min_units : int, default 4
        At least this many distinct units make a population artefact, so that
        a session with few units does not flag chance coincidences.

    Attributes
    ----------
    counts : dict of str to int
        Flagged spikes so far, by reason (``REASONS``).
    """

    def __init__(self, ceiling_hz: float = 500.0, window_s: float = 0.010, population_fraction: float = 0.5,
                 population_window_s: float = 0.0005, population_min_units: int = 4) -> None:
        if ceiling_hz < 0 or not math.isfinite(ceiling_hz):
            raise ValueError(f"the per-unit rate ceiling must be a finite rate >= 0 Hz (0 = off), got {ceiling_hz}")
        if not window_s > 0 or not population_window_s > 0:
            raise ValueError(f"artefact windows must be > 0 s, got {window_s} and {population_window_s}")
        if not 0 <= population_fraction <= 1:
            raise ValueError(f"the population fraction must lie in [0, 1] (0 = off), got {population_fraction}")
        if population_min_units < 2:
            raise ValueError(f"a population artefact needs at least 2 units, got {population_min_units}")
        self.ceiling_hz = ceiling_hz
        self.window_s = window_s
        self.population_fraction = population_fraction
        self.population_window_s = population_window_s
        self.population_min_units = population_min_units
        # Spikes allowed within one window; one more within less than a window is a transient.
        self._max_in_window = int(math.floor(ceiling_hz * window_s + 1e-9)) if ceiling_hz > 0 else 0
        self._horizon_s = max(window_s if ceiling_hz > 0 else 0.0,
                              population_window_s if population_fraction > 0 else 0.0)
        self._units_seen: set[int] = set()
        # The history lives at the front of buffers that the batch is appended to: spikes of the last
        # horizon, hist_t[:n_hist] and hist_u[:n_hist]; _flags receives a batch's flags.
        self._n_hist = 0
        self._reserve(_CAPACITY)
        self.counts = dict.fromkeys(REASONS, 0)

    def _reserve(self, capacity: int) -> None:
        """Buffers for ``capacity`` spikes of history and batch together, the history kept."""
        n_hist = self._n_hist
        t = np.empty(capacity)
        u = np.empty(capacity, np.int64)
        if n_hist:
            t[:n_hist] = self._t[:n_hist]
            u[:n_hist] = self._u[:n_hist]
        self._t, self._u = t, u
        self._flags = np.empty(capacity, np.int8)
        self._all_kept = np.ones(capacity, bool)
        self._all_kept.setflags(write=False)

    def keep(self, t_s: np.ndarray, unit_id: np.ndarray) -> np.ndarray:
        """The spikes of one batch to hand on; the others are counted in ``counts``.

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
            Spike times (s, data time), non-decreasing.
        unit_id : ndarray of int64, shape (n,)

        Returns
        -------
        keep : ndarray of bool, shape (n,)
            Read-only when every spike is kept (a view of one shared array of ``True``).
        """
        n = t_s.size
        if n == 0 or self._horizon_s == 0.0:
            return np.ones(n, bool)
        self._units_seen.update(unit_id.tolist())
        min_units = 0
        if self.population_fraction > 0:
            min_units = max(self.population_min_units,
                            math.ceil(self.population_fraction * len(self._units_seen)))
        n_old = self._n_hist
        if n_old + n > self._t.size:
            self._reserve(2 * (n_old + n))
        n_hist, n_rate, n_population = _flag_batch_in_order(
            self._t, self._u, n_old, t_s, unit_id, self._flags, self._max_in_window, self.window_s,
            self.population_window_s, min_units, self._horizon_s)
        if n_hist < 0:
            return self._keep_late(t_s, unit_id, min_units)
        self._n_hist = n_hist
        if not (n_rate or n_population):
            return self._all_kept[:n]
        self.counts["unit_rate"] += n_rate
        self.counts["population"] += n_population
        return self._flags[:n] == KEPT

    def _keep_late(self, t_s: np.ndarray, unit_id: np.ndarray, min_units: int) -> np.ndarray:
        """:meth:`keep` for a batch older than the last one (a late batch or a restarted clock): sorted in."""
        n_old = self._n_hist
        t = np.concatenate((self._t[:n_old], t_s))
        u = np.concatenate((self._u[:n_old], unit_id))
        order = np.argsort(t, kind="stable")
        t, u = t[order], u[order]
        flags = np.empty(t.size, np.int8)
        flags[order] = artefact_flags(t, u, self._max_in_window, self.window_s, self.population_window_s, min_units)
        # t is sorted: the history is the slice of the last horizon up to this batch's newest spike.
        newest = t_s[-1]
        lo, hi = np.searchsorted(t, (newest - self._horizon_s, newest), side="right")
        self._n_hist = hi - lo
        self._t[:hi - lo] = t[lo:hi]
        self._u[:hi - lo] = u[lo:hi]
        flags = flags[n_old:]
        if not flags.any():
            return self._all_kept[:t_s.size]
        self.counts["unit_rate"] += int(np.count_nonzero(flags == BY_UNIT_RATE))
        self.counts["population"] += int(np.count_nonzero(flags == BY_POPULATION))
        return flags == KEPT
