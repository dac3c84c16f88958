"""Head-direction figures per unit: preferred direction, mean vector length, tuning width, Rayleigh test, shuffle.

The tuning curve of a unit on a :class:`~decoder.space.headings.HeadingRing`
is its rate map (Hz per heading bin). From it:

* the preferred direction and the mean vector length (Rayleigh vector) of the
  curve, ``sum_k r_k e^{i theta_k} / sum_k r_k`` (Fisher 1993, Statistical
  Analysis of Circular Data, ch. 2; common practice for head-direction cells);
* the tuning width, the arc around the peak bin where the curve stays at or
  above half its peak (full width at half maximum, degrees);
* the Rayleigh test's p value for ``n`` spikes with that mean vector length,
  by Zar's approximation (Zar 1999, Biostatistical Analysis, 4th ed., eq.
  27.4).

Whether a unit counts as head-direction tuned is judged against a shuffle of
its spike times (:func:`tuned_against_shuffle`): the spikes are shifted
circularly in time by random offsets of at least 20 s and the mean vector
length recomputed; a unit is tuned when its own exceeds the 99th percentile
of the shuffled ones (common practice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from decoder.space.headings import HeadingRing, angle_difference_deg

#: Percentile of the shuffled mean vector lengths a tuned unit must exceed (common practice).
SHUFFLE_PERCENTILE = 99.0

#: Least circular shift of the spike train in a shuffle (s), so that a shift breaks the tuning (common practice).
MIN_SHIFT_S = 20.0


def mean_resultant(angles_rad: np.ndarray, weights: np.ndarray | None = None, axis: int = -1) -> tuple[np.ndarray, np.ndarray]:
    """Mean direction (radians, [0, 2 pi)) and mean resultant length of angles, optionally weighted.

    Parameters
    ----------
    angles_rad : array_like of float64
    weights : array_like of float64, optional
        Broadcast against ``angles_rad``; non-negative.
    axis : int, default -1

    Returns
    -------
    (direction_rad, length) : ndarrays
        ``length`` in [0, 1]; ``direction`` NaN where the weights sum to 0.

    References
    ----------
    Fisher NI (1993) Statistical Analysis of Circular Data. Cambridge University Press, section 2.3.
    """
    theta = np.asarray(angles_rad, dtype=np.float64)
    if weights is None:
        w = np.ones_like(theta)
    else:
        theta, w = np.broadcast_arrays(theta, np.asarray(weights, np.float64))
    total = w.sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        c = (w * np.cos(theta)).sum(axis=axis) / total
        s = (w * np.sin(theta)).sum(axis=axis) / total
    return np.mod(np.arctan2(s, c), 2.0 * math.pi), np.hypot(c, s)


def rayleigh_p(n: np.ndarray, mean_vector_length: np.ndarray) -> np.ndarray:
    """The Rayleigh test's p value for ``n`` angles whose mean resultant length is ``mean_vector_length``.

    ``p = exp(sqrt(1 + 4n + 4(n² - R²)) - (1 + 2n))`` with ``R = n r``: Zar's
    approximation, good to three decimals from ``n = 10`` and usable below.

    Parameters
    ----------
    n : array_like of float
        Number of angles (spikes); p is 1 where ``n`` is 0.
    mean_vector_length : array_like of float in [0, 1]

    Returns
    -------
    ndarray of float64, clipped to [0, 1]

    References
    ----------
    Zar JH (1999) Biostatistical Analysis, 4th ed. Prentice Hall, eq. 27.4.
    """
    n = np.asarray(n, dtype=np.float64)
    r = np.asarray(mean_vector_length, dtype=np.float64)
    big_r = n * r
    with np.errstate(invalid="ignore"):
        p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n * n - big_r * big_r)) - (1.0 + 2.0 * n))
    return np.where(n > 0, np.clip(p, 0.0, 1.0), 1.0)


@dataclass(frozen=True)
class HeadingTuning:
    """Head-direction figures of each unit, in the model's row order.

    Attributes
    ----------
    preferred_direction_deg : ndarray of float64, shape (n_units,)
        Direction of the tuning curve's mean vector, [0, 360).
    mean_vector_length : ndarray of float64, shape (n_units,)
        In [0, 1]; NaN for a unit without rate.
    tuning_width_deg : ndarray of float64, shape (n_units,)
        Width of the arc around the peak at or above half the peak.
    peak_direction_deg : ndarray of float64, shape (n_units,)
        Centre of the peak bin.
    rayleigh_p : ndarray of float64, shape (n_units,)
        For the unit's spike count and mean vector length (Zar 1999).
    """

    preferred_direction_deg: np.ndarray
    mean_vector_length: np.ndarray
    tuning_width_deg: np.ndarray
    peak_direction_deg: np.ndarray
    rayleigh_p: np.ndarray


def heading_tuning(rate_maps_hz: np.ndarray, ring: HeadingRing, visited: np.ndarray,
                   spike_counts: np.ndarray) -> HeadingTuning:
    """Per-unit head-direction figures from tuning curves on a heading ring.

    Parameters
    ----------
    rate_maps_hz : ndarray of float64, shape (n_units, n_bins)
    ring : HeadingRing
    visited : ndarray of bool, shape (n_bins,)
        Bins the curves are defined on; others are left out.
    spike_counts : ndarray, shape (n_units,)
        Spikes behind each curve: the ``n`` of the Rayleigh test.

    Returns
    -------
    HeadingTuning
    """
    if not isinstance(ring, HeadingRing):
        raise ValueError(f"head-direction figures need a HeadingRing, got a {type(ring).__name__}")
    rates = np.where(visited, np.asarray(rate_maps_hz, dtype=np.float64), 0.0)
    theta = np.radians(ring.bin_centers_deg)
    direction, length = mean_resultant(theta[None, :], rates)
    peak_bin = rates.argmax(axis=1)
    peak = rates[np.arange(len(rates)), peak_bin]
    width = np.zeros(len(rates))
    n = ring.n_bins
    for unit in np.flatnonzero(peak > 0):
        above = rates[unit] >= 0.5 * peak[unit]
        if above.all():
            width[unit] = 360.0
            continue
        # Walk both ways from the peak, around the ring, while the curve stays above half its peak.
        k = peak_bin[unit]
        right = next(j for j in range(1, n) if not above[(k + j) % n])
        left = next(j for j in range(1, n) if not above[(k - j) % n])
        width[unit] = (right + left - 1) * ring.bin_cm
    return HeadingTuning(
        preferred_direction_deg=np.degrees(direction),
        mean_vector_length=length,
        tuning_width_deg=width,
        peak_direction_deg=ring.bin_centers_deg[peak_bin].copy(),
        rayleigh_p=rayleigh_p(np.asarray(spike_counts), np.nan_to_num(length)),
    )


def heading_at(t_s: np.ndarray, frame_t_s: np.ndarray, frame_heading_rad: np.ndarray,
               max_gap_s: float = 0.1) -> np.ndarray:
    """Heading (radians) of the nearest earlier frame at each time; NaN without one within ``max_gap_s``.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
    frame_t_s : ndarray of float64, shape (m,), increasing
    frame_heading_rad : ndarray of float64, shape (m,); NaN where unknown
    max_gap_s : float
    """
    i = np.searchsorted(frame_t_s, t_s, side="right") - 1
    ok = i >= 0
    out = np.full(np.shape(t_s), np.nan)
    j = i[ok]
    out[ok] = np.where(t_s[ok] - frame_t_s[j] <= max_gap_s, frame_heading_rad[j], np.nan)
    return out


def tuned_against_shuffle(spike_t_s: np.ndarray, frame_t_s: np.ndarray, frame_heading_rad: np.ndarray,
                          rng: np.random.Generator, n_shuffles: int = 200) -> tuple[bool, float, float]:
    """Whether one unit's head-direction tuning beats a shuffle of its spike times.

    The mean vector length of the spikes' headings, occupancy-normalised
    (each spike weighted by the inverse time spent in its 6-degree bin), is
    compared with the same figure after shifting the whole spike train
    circularly in time by a random offset of at least ``MIN_SHIFT_S``
    within the recording (common practice).

    Parameters
    ----------
    spike_t_s : ndarray of float64, shape (n_spikes,)
    frame_t_s : ndarray of float64, shape (m,), increasing
    frame_heading_rad : ndarray of float64, shape (m,); NaN where unknown
    rng : numpy.random.Generator
    n_shuffles : int, default 200

    Returns
    -------
    (tuned, mean_vector_length, threshold) : (bool, float, float)
        ``threshold`` is the ``SHUFFLE_PERCENTILE``-th percentile of the shuffled lengths.

    Raises
    ------
    ValueError
        When the recording is shorter than twice ``MIN_SHIFT_S``.
    """
    t0, t1 = float(frame_t_s[0]), float(frame_t_s[-1])
    span = t1 - t0
    if span < 2 * MIN_SHIFT_S:
        raise ValueError(f"a shuffle needs at least {2 * MIN_SHIFT_S:g} s of frames, got {span:.1f} s")
    ring = HeadingRing(6.0)
    frame_ok = np.isfinite(frame_heading_rad)
    frame_bin = ring.bin_index(np.column_stack([np.cos(frame_heading_rad), np.sin(frame_heading_rad)]))
    dwell = np.bincount(frame_bin[frame_ok], minlength=ring.n_bins).astype(np.float64)
    weight_of_bin = np.where(dwell > 0, 1.0 / np.maximum(dwell, 1.0), 0.0)

    def length(times: np.ndarray) -> float:
        hd = heading_at(times, frame_t_s, frame_heading_rad)
        hd = hd[np.isfinite(hd)]
        if hd.size == 0:
            return 0.0
        bins = ring.bin_index(np.column_stack([np.cos(hd), np.sin(hd)]))
        return float(mean_resultant(hd, weight_of_bin[bins])[1])

    observed = length(np.asarray(spike_t_s, dtype=np.float64))
    shifts = rng.uniform(MIN_SHIFT_S, span - MIN_SHIFT_S, n_shuffles)
    shuffled = [length(t0 + np.mod(spike_t_s - t0 + shift, span)) for shift in shifts]
    threshold = float(np.percentile(shuffled, SHUFFLE_PERCENTILE))
    return observed > threshold, observed, threshold


def heading_error_deg(decoded_deg: np.ndarray, true_deg: np.ndarray) -> np.ndarray:
    """Absolute shortest turn between decoded and true headings, degrees in [0, 180]; NaN where either is."""
    return np.abs(angle_difference_deg(decoded_deg, true_deg))
