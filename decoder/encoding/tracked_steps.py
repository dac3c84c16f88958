"""The tracked position at the held-out steps' ends, as the fits score them, and how much tracker noise it keeps.

The fits at learning time (``decoder.encoding.calibration``) score the
held-out steps against the tracker: a running median of
``TRACKED_MEDIAN_FRAMES`` valid frames, linear between them. The median
takes out the tracker's outliers and most of its jitter, but not all:
:func:`smoothed_noise_sd` says how much remains at the steps' ends, for
a truth and a noise the caller simulates, so that a fit which knows the
frames' noise can score the held-out steps against the tracked position's
own distribution (``fit_temperature(tracked_noise_sd=...)``).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from decoder.space.environment_base import Environment

#: Tracked frames in the running median that the held-out steps are scored
#: against: 5 frames, 100 ms at 50 Hz, shorter than a stride of a running
#: rat, long enough to drop a lone outlier and halve frame-to-frame jitter.
TRACKED_MEDIAN_FRAMES = 5


def smoothed_at(frame_t_s: np.ndarray, values: np.ndarray, t_s: np.ndarray,
                 max_frame_gap_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Running median of ``values`` (n, k) over the frames, linear at ``t_s`` (m,); and which ``t_s`` fall in a gap."""
    frames = ndimage.median_filter(values, size=(TRACKED_MEDIAN_FRAMES, 1), mode="nearest")
    after = np.clip(np.searchsorted(frame_t_s, t_s), 1, frame_t_s.size - 1)
    gap = ((frame_t_s[after] - frame_t_s[after - 1] > max_frame_gap_s) | (t_s < frame_t_s[0])
           | (t_s > frame_t_s[-1]))
    return np.column_stack([np.interp(t_s, frame_t_s, frames[:, i]) for i in range(values.shape[1])]), gap


def tracked_at(environment: Environment, frame_t_s: np.ndarray, frame_xy_cm: np.ndarray, t_s: np.ndarray,
               max_frame_gap_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Tracked bin and position at each time, a running median of the frames, linear between them.

    Parameters
    ----------
    environment : Environment
    frame_t_s : ndarray of float64, shape (n,)
        Frame times, strictly increasing, data time.
    frame_xy_cm : ndarray of float64, shape (n, 2)
        Tracked positions (NaN rows lost; left out).
    t_s : ndarray of float64, shape (m,)
    max_frame_gap_s : float
        Times between two valid frames further apart than this are in a tracking gap.

    Returns
    -------
    bins : ndarray of int64, shape (m,)
        -1 in a gap and off the bins.
    xy_cm : ndarray of float64, shape (m, 2)
        NaN in a gap.
    """
    ok = np.all(np.isfinite(frame_xy_cm), axis=1)
    frame_t_s, frame_xy_cm = frame_t_s[ok], frame_xy_cm[ok]
    if frame_t_s.size < 2:
        return np.full(t_s.size, -1, np.int64), np.full((t_s.size, 2), np.nan)
    # The tracker's jitter and outliers would count as the filter's misses and
    # push the temperature up: a running median over a few frames removes them.
    xy, gap = smoothed_at(frame_t_s, frame_xy_cm, t_s, max_frame_gap_s)
    xy[gap] = np.nan
    return np.where(gap, -1, environment.bin_index(xy)), xy


def smoothed_noise_sd(frame_t_s: np.ndarray, truth_frames: np.ndarray, truth_at: np.ndarray, noise_sd: float,
                      t_s: np.ndarray, max_frame_gap_s: float, rng: np.random.Generator) -> float:
    """Root-mean-square error at ``t_s`` of frames ``truth + noise``, smoothed as :func:`tracked_at` smooths them.

    A running median leaves a still truth alone and shrinks white noise to
    0.54 of its s.d. (the median of 5 normal draws; David and Nagaraja
    2003, Order Statistics, tables of the normal order statistics'
    variances; from memory), but where the truth moves by about the noise
    from one frame to the next the median is mostly the middle frame and
    keeps more of it; hence a simulation with the caller's truth.

    Parameters
    ----------
    frame_t_s : ndarray of float64, shape (n,)
        Valid frames' times, strictly increasing.
    truth_frames : ndarray of float64, shape (n, k)
        ``k`` draws of the truth at the frames (one coordinate).
    truth_at : ndarray of float64, shape (m, k)
        The same truths at ``t_s``.
    noise_sd : float
        S.d. of the frames' white noise, in the truth's units.
    t_s : ndarray of float64, shape (m,)
    max_frame_gap_s : float
    rng : numpy.random.Generator

    Returns
    -------
    float
        NaN when fewer than two frames or every time falls in a gap.
    """
    if frame_t_s.size < 2:
        return float("nan")
    seen = truth_frames + rng.normal(0.0, noise_sd, truth_frames.shape)
    smoothed, gap = smoothed_at(frame_t_s, seen, t_s, max_frame_gap_s)
    if gap.all():
        return float("nan")
    return float(np.sqrt(np.mean((smoothed[~gap] - truth_at[~gap]) ** 2)))
