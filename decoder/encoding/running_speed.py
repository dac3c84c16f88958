"""Running speed from tracker frames: a least-squares slope of position on time over a short window.

The fit over a quarter second, not frame-to-frame differences, because
tracker jitter of a few mm at 30-50 Hz alone reads as several cm/s between
frames (common practice). :func:`running_speed` is the compiled kernel the
place model calls; :func:`running_speed_numpy` is its plain numpy twin, the
reference in tests and the baseline in benchmarks.
"""

import math

import numba
import numpy as np


@numba.njit(cache=True)
def running_speed(t_s, xy_cm, start, stop, half_window_s, max_gap_s):
    """Running speed at frames ``start..stop-1`` from a least-squares fit of position on time.

    The fit uses the frames within ``half_window_s`` of the frame, and at
    least its neighbours when they are no more than ``max_gap_s`` away.

    Parameters
    ----------
    t_s : ndarray of float64, shape (m,)
        Frame times, strictly increasing.
    xy_cm : ndarray of float64, shape (m, 2)
        Positions, all finite.
    start, stop : int
    half_window_s, max_gap_s : float

    Returns
    -------
    ndarray of float64, shape (stop - start,)
        cm/s; NaN where the window holds a single frame.
    """
    m = t_s.shape[0]
    out = np.empty(stop - start)
    for k in range(start, stop):
        tk = t_s[k]
        lo = k
        while lo > 0 and t_s[lo - 1] >= tk - half_window_s:
            lo -= 1
        if lo == k and k > 0 and tk - t_s[k - 1] <= max_gap_s:
            lo = k - 1
        hi = k
        while hi < m - 1 and t_s[hi + 1] <= tk + half_window_s:
            hi += 1
        if hi == k and k < m - 1 and t_s[k + 1] - tk <= max_gap_s:
            hi = k + 1
        n = hi - lo + 1
        st = 0.0
        stt = 0.0
        sx = 0.0
        sy = 0.0
        stx = 0.0
        sty = 0.0
        for j in range(lo, hi + 1):
            d = t_s[j] - tk
            dx = xy_cm[j, 0] - xy_cm[k, 0]
            dy = xy_cm[j, 1] - xy_cm[k, 1]
            st += d
            stt += d * d
            sx += dx
            sy += dy
            stx += d * dx
            sty += d * dy
        den = n * stt - st * st
        if n < 2 or den <= 0.0:
            out[k - start] = np.nan
        else:
            vx = (n * stx - st * sx) / den
            vy = (n * sty - st * sy) / den
            out[k - start] = math.sqrt(vx * vx + vy * vy)
    return out


def running_speed_numpy(t_s, xy_cm, start, stop, half_window_s, max_gap_s):
    """Numpy twin of :func:`running_speed`: same arguments, same result."""
    m = len(t_s)
    k = np.arange(start, stop)
    if k.size == 0:
        return np.zeros(0)
    tk = t_s[k]
    lo = np.searchsorted(t_s, tk - half_window_s, side="left")
    hi = np.searchsorted(t_s, tk + half_window_s, side="right") - 1
    prev_ok = (k > 0) & (tk - t_s[np.maximum(k - 1, 0)] <= max_gap_s)
    next_ok = (k < m - 1) & (t_s[np.minimum(k + 1, m - 1)] - tk <= max_gap_s)
    lo = np.where((lo == k) & prev_ok, k - 1, lo)
    hi = np.where((hi == k) & next_ok, k + 1, hi)
    width = int((hi - lo).max()) + 1
    idx = lo[:, None] + np.arange(width)[None, :]
    inside = idx <= hi[:, None]
    idx = np.minimum(idx, m - 1)
    d = np.where(inside, t_s[idx] - tk[:, None], 0.0)
    dx = np.where(inside, xy_cm[idx, 0] - xy_cm[k, 0][:, None], 0.0)
    dy = np.where(inside, xy_cm[idx, 1] - xy_cm[k, 1][:, None], 0.0)
    n = inside.sum(axis=1)
    st, stt = d.sum(axis=1), (d * d).sum(axis=1)
    den = n * stt - st * st
    with np.errstate(divide="ignore", invalid="ignore"):
        vx = (n * (d * dx).sum(axis=1) - st * dx.sum(axis=1)) / den
        vy = (n * (d * dy).sum(axis=1) - st * dy.sum(axis=1)) / den
    return np.where((n >= 2) & (den > 0), np.hypot(vx, vy), np.nan)
