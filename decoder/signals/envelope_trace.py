"""A coarse, bounded history of the ripple detector's envelope, for display.

The detector judges every sample; a person watching a page needs far less:
the peak of the channels' mean z-score over each short step (so that a
ripple of 30-100 ms keeps its height when thinned), for the newest seconds.
The ring is filled chunk by chunk in data time and never grows.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["EnvelopeTrace"]


class EnvelopeTrace:
    """The newest ``keep_s`` of an envelope as the peak of each ``step_s``, in data time.

    Parameters
    ----------
    step_s : float, default 0.01
        Length of one kept value (s); steps start at whole multiples of it.
    keep_s : float, default 8.0
        Data seconds kept; older steps are overwritten.

    Attributes
    ----------
    last_step_ : int or None
        Index (``floor(t / step_s)``) of the newest step written; None before any.

    Examples
    --------
    >>> trace = EnvelopeTrace(step_s=0.01, keep_s=0.05)
    >>> trace.add(0.0, np.array([0.5, 2.0, 1.0]), rate_hz=200.0)
    >>> t0, values = trace.recent()
    >>> t0, values.tolist()
    (0.0, [2.0, 1.0])
    """

    def __init__(self, step_s: float = 0.01, keep_s: float = 8.0) -> None:
        if not (math.isfinite(step_s) and step_s > 0 and keep_s >= step_s):
            raise ValueError(f"step_s must be a positive number of seconds no longer than keep_s; got {step_s}, "
                             f"{keep_s}")
        self.step_s = float(step_s)
        self._ring = np.full(int(round(keep_s / step_s)), np.nan, np.float32)
        self.last_step_: int | None = None
        self._first_step = 0

    def add(self, t_s: float, values: np.ndarray, rate_hz: float) -> None:
        """Take one chunk's envelope: ``values`` (shape (n,)) sampled at ``rate_hz`` from data time ``t_s``."""
        n = values.size
        if not n:
            return
        first = math.floor(t_s / self.step_s)
        last = math.floor((t_s + (n - 1) / rate_hz) / self.step_s)
        ring, size = self._ring, self._ring.size
        if self.last_step_ is None:
            self.last_step_ = self._first_step = first - 1
        if first > self.last_step_:
            # Steps the signal skipped (a gap, a baseline not ready) stay NaN.
            skipped = np.arange(max(self.last_step_ + 1, first - size), first)
            ring[skipped % size] = np.nan
        elif first < self.last_step_ - size + 1:
            return  # older than the ring: nothing left to update
        if first == last:  # the usual chunk of a few ms lies within one step
            pairs = ((first, max(values.tolist())),)
        else:
            steps = np.floor((t_s + np.arange(n) / rate_hz) / self.step_s).astype(np.int64)
            starts = np.flatnonzero(np.diff(steps, prepend=steps[0] - 1))
            pairs = zip(steps[starts].tolist(), np.maximum.reduceat(values, starts).tolist())
        for step, peak in pairs:
            if step <= self.last_step_:
                kept = ring[step % size]
                ring[step % size] = peak if math.isnan(kept) else max(kept, peak)
            else:
                ring[step % size] = peak
        self.last_step_ = max(self.last_step_, last)

    def recent(self, keep_s: float | None = None) -> tuple[float, np.ndarray]:
        """The newest steps in time order.

        Parameters
        ----------
        keep_s : float, optional
            At most this many data seconds (all kept by default).

        Returns
        -------
        t0_s : float
            Data time of the first value's step start; NaN before any value.
        values : ndarray of float32, shape (n,)
            Each step's peak; NaN where the signal gave none.
        """
        if self.last_step_ is None:
            return math.nan, np.zeros(0, np.float32)
        size = self._ring.size
        n = size if keep_s is None else min(size, max(1, int(round(keep_s / self.step_s))))
        first = max(self._first_step + 1, self.last_step_ - n + 1)
        idx = np.arange(first, self.last_step_ + 1) % size
        return first * self.step_s, self._ring[idx].copy()

    def restart(self) -> None:
        """Forget the history (a new stream: another rate or channel count may follow)."""
        self._ring[:] = np.nan
        self.last_step_ = None
