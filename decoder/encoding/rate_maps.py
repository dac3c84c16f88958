"""Rate maps from totals: the visited bins and the smoothed maps that the place model's fits share.

Pure functions of an environment, the spike counts per unit and bin and the
running time per bin, so that the fit, its folds (the likelihood
temperature's, the cross-validated error's) and the tuned-unit count while
learning each apply one rule, on the model's own bins or on the coarser
tuning grid (:func:`decoder.encoding.readiness.coarse_tuning_grid`).
"""

from __future__ import annotations

import numpy as np

from decoder.space.environments import Environment


def visited_bins(environment: Environment, occupancy_s: np.ndarray, smooth_cm: float,
                 min_occupancy_s: float) -> np.ndarray:
    """The bins a decoder may use: enough running time in their neighbourhood.

    A bin is used when the running time around it, weighted by a Gaussian of
    ``smooth_cm`` with weight 1 at the bin itself, reaches
    ``min_occupancy_s``. With small bins a running animal spends well under
    0.1 s in most bins it crosses, so a threshold on each bin's own time
    would leave holes along its path; the neighbourhood fills them, and the
    smoothed rate maps are defined there (common practice).

    Parameters
    ----------
    environment : Environment
    occupancy_s : ndarray of float64, shape (n_bins,)
        Running time per bin, s.
    smooth_cm : float
        S.d. of the smoothing Gaussian, cm.
    min_occupancy_s : float

    Returns
    -------
    ndarray of bool, shape (n_bins,)
    """
    s = smooth_cm / environment.bin_cm
    # Sum of a unit-peak Gaussian over the grid (2-D) or the track (1-D).
    peak_to_sum = 2.0 * np.pi * s * s if environment.ndim_spatial == 2 else np.sqrt(2.0 * np.pi) * s
    every_bin = np.ones(environment.n_bins, dtype=bool)
    around = environment.smooth(occupancy_s, every_bin, smooth_cm) * max(peak_to_sum, 1.0)
    return environment.valid_mask & (occupancy_s.sum() > 0) & (around >= min_occupancy_s)


def smoothed_rate_maps(environment: Environment, counts: np.ndarray, occupancy_s: np.ndarray, *, smooth_cm: float,
                       min_occupancy_s: float, rate_floor_hz: float,
                       min_speed_cm_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Smoothed rate maps and the visited bins, from spike counts and running time.

    Spike counts and occupancy are each smoothed by a Gaussian of
    ``smooth_cm`` inside the valid bins, then divided (common practice).

    Parameters
    ----------
    environment : Environment
    counts : ndarray of int, shape (n_units, n_bins)
        Spikes placed per unit and bin.
    occupancy_s : ndarray of float64, shape (n_bins,)
        Running time per bin, s.
    smooth_cm, min_occupancy_s : float
        As :func:`visited_bins`.
    rate_floor_hz : float
        Smallest rate in a visited bin, Hz.
    min_speed_cm_s : float
        The running threshold the occupancy was counted with; named in the
        error when no bin is visited.

    Returns
    -------
    rates : ndarray of float64, shape (n_units, n_bins)
        At least ``rate_floor_hz`` in the visited bins, 0 elsewhere.
    visited : ndarray of bool, shape (n_bins,)

    Raises
    ------
    ValueError
        When no bin is visited yet.
    """
    valid = environment.valid_mask
    visited = visited_bins(environment, occupancy_s, smooth_cm, min_occupancy_s)
    if not np.any(visited):
        raise ValueError(
            f"no bin has min_occupancy_s={min_occupancy_s} s of running yet "
            f"(running time so far {occupancy_s.sum():.1f} s); feed more frames of the animal moving "
            f"faster than min_speed_cm_s={min_speed_cm_s}"
        )
    spikes = environment.smooth(counts.astype(np.float64), valid, smooth_cm)
    time = environment.smooth(occupancy_s, valid, smooth_cm)
    rates = np.zeros_like(spikes)
    np.divide(spikes, time, out=rates, where=visited & (time > 0))
    rates = np.where(visited, np.maximum(rates, rate_floor_hz), 0.0)
    return rates, visited
