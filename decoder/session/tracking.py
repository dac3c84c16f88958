"""The tracked position over recent data time: lookup and running speed (angular head speed on a heading ring)."""

from __future__ import annotations

import math
from bisect import bisect_left, bisect_right

import numpy as np

#: Frames held before the oldest (beyond ``keep_s``) are dropped in one cut.
_COMPACT_AT = 4096


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
    on_ring : bool
        Positions are headings on the heading ring (``decoder.space.headings``):
        the speed is the angular head speed, the shortest turn between the
        two frames' headings over their interval (deg/s).
    """

    def __init__(self, keep_s: float = 5.0, speed_window_s: float = 0.25, max_age_s: float = 0.25,
                 on_ring: bool = False) -> None:
        self.on_ring = bool(on_ring)
        self.keep_s = float(keep_s)
        self.speed_window_s = float(speed_window_s)
        self.max_age_s = float(max_age_s)
        # Plain lists of Python floats: frames come one at a time and are
        # looked up one at a time, at every decoding step, where numpy's
        # per-call cost on one-element arrays was most of the work.
        self._t: list[float] = []
        self._x: list[float] = []
        self._y: list[float] = []
        self.newest_t_s = -math.inf
        self.out_of_order = 0

    def __len__(self) -> int:
        return len(self._t)

    def add(self, t_s: list[float], xy_cm: list[list[float]]) -> None:
        """Append frames: times (n,) and positions (n, 2) as Python floats (``ndarray.tolist()``).

        Lost frames (NaN) are skipped; frames not newer than the newest one
        held are counted and dropped.
        """
        for t, (x, y) in zip(t_s, xy_cm):
            self.add_one(t, x, y)

    def add_one(self, t_s: float, x_cm: float, y_cm: float) -> None:
        """Append one frame given as Python floats; the same rules as :meth:`add`."""
        if not t_s > self.newest_t_s:
            self.out_of_order += 1
            return
        self.newest_t_s = t_s
        if math.isfinite(x_cm) and math.isfinite(y_cm):
            t = self._t
            t.append(t_s)
            self._x.append(x_cm)
            self._y.append(y_cm)
            if len(t) > _COMPACT_AT:
                cut = bisect_left(t, t_s - self.keep_s)
                if cut:
                    del t[:cut], self._x[:cut], self._y[:cut]

    def at(self, t_s: float) -> tuple[np.ndarray, float]:
        """Position (2,) and running speed (cm/s) at ``t_s`` from frames at or before it.

        NaN when the newest such frame is older than ``max_age_s``.
        """
        x, y, speed = self.at_xy(t_s)
        return np.array((x, y)), speed

    def position_at(self, t_s: float) -> tuple[float, float]:
        """:meth:`at_xy` without the speed: ``(x_cm, y_cm)``, NaN when unknown."""
        t = self._t
        i = bisect_right(t, t_s) - 1
        if i < 0 or t_s - t[i] > self.max_age_s:
            return math.nan, math.nan
        return self._x[i], self._y[i]

    def at_xy(self, t_s: float) -> tuple[float, float, float]:
        """:meth:`at` as three Python floats ``(x_cm, y_cm, speed_cm_s)``, for callers that want scalars."""
        t = self._t
        i = bisect_right(t, t_s) - 1
        if i < 0 or t_s - t[i] > self.max_age_s:
            return math.nan, math.nan, math.nan
        t_i = t[i]
        j = bisect_left(t, t_i - self.speed_window_s, 0, i)
        x_i, y_i = self._x[i], self._y[i]
        dt = t_i - t[j]
        if not dt > 0:
            return x_i, y_i, math.nan
        x_j, y_j = self._x[j], self._y[j]
        if self.on_ring:
            # The angle between the two heading vectors, however far the head turned past a half turn.
            turn = math.degrees(abs(math.atan2(x_j * y_i - y_j * x_i, x_j * x_i + y_j * y_i)))
            return x_i, y_i, turn / dt
        return x_i, y_i, math.hypot(x_i - x_j, y_i - y_j) / dt
