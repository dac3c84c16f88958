"""The textbook decoder that placeloop is measured against, in plain numpy.

Bayesian decoding as Zhang et al. (1998) describe it, with nothing added:
rate maps from a learning part (occupancy-normalised spike counts of moving
epochs, Gaussian-smoothed), a Poisson likelihood of the spike counts in a
window that assumes independent cells and a constant rate over the window,
a uniform prior over the visited bins, and the maximum a posteriori bin as
the estimate. A window is moved along in steps and its estimate is dated at
the window's end, which is all a causal decoder could know at that time.

Nothing here reads the project's packages: the caller hands in arrays
(position bins, spike counts, a distance matrix between bins), so the same
functions serve the accuracy benchmark and the test against
``scipy.stats.poisson``.

References
----------
Zhang K, Ginzburg I, McNaughton BL, Sejnowski TJ (1998) Interpreting neuronal
population activity by reconstruction: unified framework with application to
hippocampal place cells. J Neurophysiol 79:1017-1044.
"""

from __future__ import annotations

import math

import numpy as np

#: Windows the textbook decoder is tried with (s); the best one is taken.
WINDOWS_S = (0.1, 0.25, 0.5)

#: Lowest rate a map may hold (Hz), so that a spike in a bin where the cell
#: never fired during learning lowers the likelihood rather than excludes the
#: bin; every implementation needs some floor, the value is ours.
RATE_FLOOR_HZ = 0.01


def gaussian_kernel(distance_cm: np.ndarray, sigma_cm: float) -> np.ndarray:
    """Weights ``exp(-d² / 2σ²)`` between every pair of bins.

    Parameters
    ----------
    distance_cm : ndarray of float64, shape (n_bins, n_bins)
        Distance between bin centres (along the track on a maze).
    sigma_cm : float
        Standard deviation of the smoothing Gaussian.

    Returns
    -------
    ndarray of float64, shape (n_bins, n_bins)
    """
    if not sigma_cm > 0:
        raise ValueError(f"sigma_cm must be positive, got {sigma_cm}")
    return np.exp(-0.5 * (np.asarray(distance_cm, np.float64) / sigma_cm) ** 2)


def rate_maps_hz(position_bin: np.ndarray, counts: np.ndarray, dt_s: float, moving: np.ndarray,
                 kernel: np.ndarray, min_occupancy_s: float = 0.1) -> tuple[np.ndarray, np.ndarray]:
    """Occupancy-normalised, smoothed rate maps from time bins of a learning part.

    Parameters
    ----------
    position_bin : ndarray of int, shape (n_t,)
        Spatial bin of each time bin; negative where the position is unknown.
    counts : ndarray of int, shape (n_t, n_units)
        Spikes of each unit in each time bin.
    dt_s : float
        Length of a time bin.
    moving : ndarray of bool, shape (n_t,)
        Time bins that count (the speed filter: running, not resting).
    kernel : ndarray of float64, shape (n_bins, n_bins)
        Smoothing weights, e.g. :func:`gaussian_kernel`; the spike counts and
        the occupancy are smoothed alike and then divided.
    min_occupancy_s : float
        Smoothed occupancy below which a bin counts as unvisited.

    Returns
    -------
    rates_hz : ndarray of float64, shape (n_units, n_bins)
        At least :data:`RATE_FLOOR_HZ`.
    visited : ndarray of bool, shape (n_bins,)
        The bins the uniform prior spreads over.
    """
    n_bins = kernel.shape[0]
    use = moving & (position_bin >= 0)
    occupancy_s = np.bincount(position_bin[use], minlength=n_bins) * dt_s
    spikes = np.zeros((counts.shape[1], n_bins))
    np.add.at(spikes.T, position_bin[use], counts[use])
    occupancy_s = kernel @ occupancy_s
    spikes = spikes @ kernel.T
    visited = occupancy_s >= min_occupancy_s
    rates = np.where(visited, spikes / np.maximum(occupancy_s, 1e-12), 0.0)
    return np.maximum(rates, RATE_FLOOR_HZ), visited


def poisson_log_likelihood(window_counts: np.ndarray, rates_hz: np.ndarray, window_s: float) -> np.ndarray:
    """log P(counts | x) of independent Poisson cells, for every window and bin.

    ``sum_i [n_i log(f_i(x) τ) - f_i(x) τ - log n_i!]`` (Zhang et al. 1998).

    Parameters
    ----------
    window_counts : ndarray of int, shape (n_windows, n_units)
    rates_hz : ndarray of float64, shape (n_units, n_bins)
        Positive everywhere.
    window_s : float
        τ, the window's length.

    Returns
    -------
    ndarray of float64, shape (n_windows, n_bins)
    """
    n = np.asarray(window_counts, np.float64)
    expected = np.asarray(rates_hz, np.float64) * window_s
    log_factorial = np.array([math.lgamma(k + 1.0) for k in range(int(n.max(initial=0)) + 1)])
    return n @ np.log(expected) - expected.sum(axis=0)[None, :] - log_factorial[n.astype(np.int64)].sum(axis=1)[:, None]


def decode_map(step_counts: np.ndarray, window_steps: int, step_s: float, rates_hz: np.ndarray,
               visited: np.ndarray, chunk: int = 2000) -> np.ndarray:
    """Maximum a posteriori bin for a window ending at every step, under a uniform prior.

    Parameters
    ----------
    step_counts : ndarray of int, shape (n_steps, n_units)
        Spikes in each step, step ``k`` covering ``[k·step_s, (k+1)·step_s)``.
    window_steps : int
        Steps per window; the window ending with step ``k`` covers steps
        ``k - window_steps + 1 .. k``, and the estimate is dated at its end.
    step_s : float
    rates_hz : ndarray of float64, shape (n_units, n_bins)
    visited : ndarray of bool, shape (n_bins,)
        Bins the prior spreads over; the others are never the answer.
    chunk : int
        Windows decoded at once (bounds the memory).

    Returns
    -------
    ndarray of int64, shape (n_steps,)
        -1 for the first ``window_steps - 1`` steps, whose window is incomplete.
    """
    if window_steps < 1:
        raise ValueError(f"window_steps must be at least 1, got {window_steps}")
    cumulative = np.vstack([np.zeros((1, step_counts.shape[1]), np.int64), np.cumsum(step_counts, axis=0)])
    ends = np.arange(window_steps, step_counts.shape[0] + 1)
    windows = cumulative[ends] - cumulative[ends - window_steps]
    out = np.full(step_counts.shape[0], -1, np.int64)
    for lo in range(0, windows.shape[0], chunk):
        log_like = poisson_log_likelihood(windows[lo:lo + chunk], rates_hz, window_steps * step_s)
        log_like[:, ~visited] = -np.inf
        out[ends[lo:lo + chunk] - 1] = np.argmax(log_like, axis=1)
    return out
