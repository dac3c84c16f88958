"""The tracked position over recent data time: lookup and running speed."""

from __future__ import annotations

import numpy as np


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
        self._t = np.zeros(0, np.float64)
        self._xy = np.zeros((0, 2), np.float64)
        self.newest_t_s = -np.inf
        self.out_of_order = 0

    def add(self, t_s: np.ndarray, xy_cm: np.ndarray) -> None:
        """Append frames (t_s (n,), xy_cm (n, 2)); lost frames (NaN) are skipped.

        Frames not newer than the newest one held are counted and dropped.
        """
        newer = t_s > self.newest_t_s
        self.out_of_order += int(np.count_nonzero(~newer))
        if t_s.size:
            self.newest_t_s = max(self.newest_t_s, float(t_s.max()))
        good = newer & np.all(np.isfinite(xy_cm), axis=1)
        if not np.any(good):
            return
        self._t = np.concatenate([self._t, t_s[good]])
        self._xy = np.concatenate([self._xy, xy_cm[good]])
        cut = np.searchsorted(self._t, self._t[-1] - self.keep_s, side="left")
        if cut:
            self._t, self._xy = self._t[cut:], self._xy[cut:]

    def at(self, t_s: float) -> tuple[np.ndarray, float]:
        """Position (2,) and running speed (cm/s) at ``t_s`` from frames at or before it.

        NaN when the newest such frame is older than ``max_age_s``.
        """
        i = int(np.searchsorted(self._t, t_s, side="right")) - 1
        if i < 0 or t_s - self._t[i] > self.max_age_s:
            return np.full(2, np.nan), float("nan")
        j = int(np.searchsorted(self._t, self._t[i] - self.speed_window_s, side="left"))
        dt = self._t[i] - self._t[j]
        speed = float(np.hypot(*(self._xy[i] - self._xy[j])) / dt) if dt > 0 else float("nan")
        return self._xy[i].copy(), speed
