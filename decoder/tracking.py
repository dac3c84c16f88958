"""The tracked position over recent data time: lookup and running speed."""

from __future__ import annotations

import numpy as np


#: Frames the buffer holds before it compacts (grows if keep_s needs more).
_CAPACITY = 4096


class TrackHistory:
    """Recent tracker frames on the reference clock.

    Parameters
    ----------
    keep_s : float
        How much recent data time to keep (s).
    speed_window_s : float
        Running speed is the displacement over about this long (s); a lag
        rather than frame-to-frame differences, because tracker jitter of a
        few mm at 50 Hz alone reads as tens of cm/s (common practice).
    max_age_s : float
        A position older than this at the time asked is unknown (NaN).
    """

    def __init__(self, keep_s: float = 5.0, speed_window_s: float = 0.25, max_age_s: float = 0.25) -> None:
        self.keep_s = float(keep_s)
        self.speed_window_s = float(speed_window_s)
        self.max_age_s = float(max_age_s)
        # A preallocated buffer, compacted when full: a tracker sends 30-60
        # frames a second, and a concatenation per frame was the replay's
        # largest cost.
        self._t = np.zeros(_CAPACITY, np.float64)
        self._xy = np.zeros((_CAPACITY, 2), np.float64)
        self._start = 0
        self._stop = 0
        self.newest_t_s = -np.inf
        self.out_of_order = 0

    def add(self, t_s: np.ndarray, xy_cm: np.ndarray) -> None:
        """Append frames (t_s (n,), xy_cm (n, 2)); lost frames (NaN) are skipped.

        Frames not newer than the newest one held are counted and dropped.
        """
        if t_s.size == 1:
            t = float(t_s[0])
            if not t > self.newest_t_s:
                self.out_of_order += 1
                return
            self.newest_t_s = t
            x, y = xy_cm[0]
            if x != x or y != y:
                return
            self._append(t_s, xy_cm)
            return
        newer = t_s > self.newest_t_s
        self.out_of_order += int(np.count_nonzero(~newer))
        if t_s.size:
            self.newest_t_s = max(self.newest_t_s, float(t_s.max()))
        good = newer & np.all(np.isfinite(xy_cm), axis=1)
        if np.any(good):
            self._append(t_s[good], xy_cm[good])

    def _append(self, t_s: np.ndarray, xy_cm: np.ndarray) -> None:
        n = t_s.size
        if self._stop + n > self._t.size:
            # Keep only the last keep_s of data, moved to the front (grown if needed).
            t = self._t[self._start:self._stop]
            cut = int(np.searchsorted(t, t_s[-1] - self.keep_s, side="left")) if t.size else 0
            kept_t, kept_xy = t[cut:].copy(), self._xy[self._start + cut:self._stop].copy()
            need = kept_t.size + n
            if need > self._t.size // 2:
                self._t = np.zeros(2 * need, np.float64)
                self._xy = np.zeros((2 * need, 2), np.float64)
            self._t[:kept_t.size] = kept_t
            self._xy[:kept_t.size] = kept_xy
            self._start, self._stop = 0, kept_t.size
        self._t[self._stop:self._stop + n] = t_s
        self._xy[self._stop:self._stop + n] = xy_cm
        self._stop += n

    def at(self, t_s: float) -> tuple[np.ndarray, float]:
        """Position (2,) and running speed (cm/s) at ``t_s`` from frames at or before it.

        NaN when the newest such frame is older than ``max_age_s``.
        """
        # Asked at every decoding step: ndarray methods and Python floats
        # (the same IEEE operations) rather than numpy's wrappers on 1-element arrays.
        t = self._t[self._start:self._stop]
        i = int(t.searchsorted(t_s, side="right")) - 1
        if i < 0:
            return np.full(2, np.nan), float("nan")
        t_i = t.item(i)
        if t_s - t_i > self.max_age_s:
            return np.full(2, np.nan), float("nan")
        j = int(t.searchsorted(t_i - self.speed_window_s, side="left"))
        xy = self._xy[self._start:self._stop]
        dt = t_i - t.item(j)
        if dt > 0:
            x_i, y_i = xy[i].tolist()
            x_j, y_j = xy[j].tolist()
            speed = float(np.hypot(x_i - x_j, y_i - y_j)) / dt
        else:
            speed = float("nan")
        return xy[i].copy(), speed
