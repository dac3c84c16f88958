"""Tests of the accuracy benchmark's yardsticks: the textbook decoder and the trajectory scores.

Each check compares against something outside the project: scipy's Poisson
distribution and Gaussian filter, hand-worked cases of the formulas, or a
trajectory shifted by construction.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, stats

from bench.scores import best_lag_s, in_hpd
from bench.textbook import RATE_FLOOR_HZ, decode_map, gaussian_kernel, poisson_log_likelihood, rate_maps_hz

# A tiny worked case: three cells over four bins, two windows of 0.25 s.
RATES_HZ = np.array([[1.0, 5.0, 20.0, 2.0], [10.0, 2.0, 0.5, 4.0], [3.0, 3.0, 3.0, 8.0]])
COUNTS = np.array([[0, 1, 4], [5, 0, 1]])
WINDOW_S = 0.25


def test_poisson_log_likelihood_matches_scipy_logpmf():
    got = poisson_log_likelihood(COUNTS, RATES_HZ, WINDOW_S)
    # scipy.stats.poisson.logpmf summed over independent cells (Zhang et al. 1998,
    # J Neurophysiol 79:1017: the likelihood of independent Poisson cells).
    want = np.array([[stats.poisson.logpmf(n, RATES_HZ[:, b] * WINDOW_S).sum() for b in range(4)] for n in COUNTS])
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


def test_map_over_sliding_windows_is_the_argmax_of_the_scipy_likelihood():
    rng = np.random.default_rng(0)
    steps = rng.poisson(0.3, (12, 3))
    visited = np.array([True, True, True, False])
    got = decode_map(steps, window_steps=5, step_s=0.05, rates_hz=RATES_HZ, visited=visited, chunk=3)
    assert (got[:4] == -1).all()
    for k in range(4, 12):
        n = steps[k - 4:k + 1].sum(axis=0)
        # Uniform prior over the visited bins: the MAP is the argmax of the
        # likelihood there (scipy.stats.poisson.logpmf as the reference).
        ll = np.array([stats.poisson.logpmf(n, RATES_HZ[:, b] * 0.25).sum() for b in range(3)])
        assert got[k] == int(np.argmax(ll))


def test_rate_maps_divide_spike_counts_by_occupancy():
    # Worked by hand with no smoothing (identity kernel): bin 0 is occupied for
    # 3 x 0.1 s with 3 spikes of cell 0 -> 10 Hz; bin 1 for 0.2 s with 1 spike
    # -> 5 Hz; the resting time bin is dropped; bin 2 is never visited.
    position_bin = np.array([0, 0, 1, 0, 1, 1])
    moving = np.array([True, True, True, True, True, False])
    counts = np.array([[1], [2], [1], [0], [0], [7]])
    rates, visited = rate_maps_hz(position_bin, counts, 0.1, moving, np.eye(3), min_occupancy_s=0.05)
    np.testing.assert_allclose(rates[0], [10.0, 5.0, RATE_FLOOR_HZ])
    np.testing.assert_array_equal(visited, [True, True, False])


def test_gaussian_kernel_smooths_like_scipy_gaussian_filter():
    x = np.zeros(41)
    x[[5, 20, 33]] = [1.0, 3.0, 2.0]
    centres_cm = np.arange(41) * 2.0
    kernel = gaussian_kernel(np.abs(centres_cm[:, None] - centres_cm[None, :]), sigma_cm=4.0)
    norm = np.exp(-0.5 * (np.arange(-40, 41) / 2.0) ** 2).sum()
    # scipy.ndimage.gaussian_filter1d with zeros outside and a kernel wide
    # enough to cover the whole array, sigma 4 cm = 2 bins.
    want = ndimage.gaussian_filter1d(x, 2.0, mode="constant", truncate=20.0)
    np.testing.assert_allclose(kernel @ x / norm, want, atol=1e-12)


def test_hpd_region_of_a_worked_posterior():
    posterior = np.array([0.06, 0.6, 0.04, 0.3])
    # The smallest set reaching 0.95 is {0.6, 0.3, 0.06} (0.96): worked by hand.
    assert [in_hpd(posterior, b) for b in range(4)] == [True, True, False, True]
    assert not in_hpd(posterior, -1)


def test_best_lag_recovers_a_shift_made_by_construction():
    t = np.arange(0.0, 60.0, 0.02)

    def true_xy(times):
        return np.column_stack([50 + 40 * np.sin(0.7 * times), 30 * np.cos(0.3 * times)])

    decoded = true_xy(t - 0.12)
    lag, median = best_lag_s(t, decoded, true_xy, lambda a, b: np.hypot(*(a - b).T))
    assert lag == 0.12 and median < 1e-9
