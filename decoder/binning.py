"""Binning spikes into decoding windows by data time.

Steps end at whole multiples of the step length on the reference (spike)
clock, ``t_k = k * step_s``, so that a live run and its replay close the same
steps whatever the first message was. Step ``k`` closes once the spike
stream's watermark (its newest timestamp or heartbeat) has passed ``t_k`` by
the allowed lateness; the window of step ``k`` is ``(t_k - window_s, t_k]``.
"""

from __future__ import annotations

import math

import numpy as np


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
        self._t = np.zeros(0, np.float64)
        self._row = np.zeros(0, np.int64)
        self._counts = np.zeros(self.n_units, np.float64)

    def __len__(self) -> int:
        return int(self._t.size)

    def add(self, t_s: np.ndarray, rows: np.ndarray) -> None:
        """Add spikes (shape (n,) each); they may be older than spikes already held."""
        if t_s.size == 0:
            return
        if self._t.size and t_s[0] < self._t[-1]:
            t = np.concatenate([self._t, t_s])
            r = np.concatenate([self._row, rows])
            # Stable, so spikes with equal times keep their arrival order and a
            # replay gives bit-identical windows.
            order = np.argsort(t, kind="stable")
            self._t, self._row = t[order], r[order]
        else:
            self._t = np.concatenate([self._t, t_s])
            self._row = np.concatenate([self._row, rows])

    def counts(self, t_end_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Spike counts of the window ``(t_end_s - window_s, t_end_s]``.

        Returns
        -------
        rows : ndarray of int64, shape (k,)
            Rows that fired, ascending.
        counts : ndarray of float64, shape (k,)
            Their spike counts.
        """
        # Called at every decoding step on a short array: ndarray methods
        # skip the module functions' dispatch, which cost more than the work.
        lo = self._t.searchsorted(t_end_s - self.window_s, side="right")
        hi = self._t.searchsorted(t_end_s, side="right")
        rows = self._row[lo:hi]
        if rows.size == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.float64)
        binned = np.bincount(rows, minlength=self.n_units)
        fired = binned.nonzero()[0]
        return fired.astype(np.int64), binned[fired].astype(np.float64)

    def discard_before(self, t_s: float) -> None:
        """Forget spikes at or before ``t_s`` (no later window can contain them)."""
        cut = self._t.searchsorted(t_s, side="right")
        if cut:
            self._t = self._t[cut:]
            self._row = self._row[cut:]


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
