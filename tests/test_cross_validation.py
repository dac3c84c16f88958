"""Tests for decoder.encoding.cross_validation: blocked folds and the held-out decoding error.

The decoded positions are checked against the Poisson likelihood computed
independently with scipy.stats.poisson.logpmf (uniform prior: the MAP bin is
the likelihood's argmax; Zhang et al. 1998, J Neurophysiol 79:1017). The two
bins, two units and their rates are invented for the test.
"""

import numpy as np
import pytest
from scipy import stats

from decoder.encoding.cross_validation import CrossValidatedError, cv_block, held_out_error
from decoder.space.environments import LinearTrack

WINDOW_S = 0.5
RATES_HZ = np.array([[10.0, 1.0], [1.0, 10.0]])  # unit 0 fires in the first bin, unit 1 in the second


def two_bins():
    return LinearTrack((0, 0), (20, 0), bin_cm=10)  # bin centres at x = 5 and 15 cm


def map_bin_by_scipy(counts):
    """Argmax over bins of sum_u log Poisson(count_u; rate_u * window) (scipy.stats.poisson.logpmf)."""
    loglik = stats.poisson.logpmf(np.asarray(counts)[:, None], RATES_HZ * WINDOW_S).sum(axis=0)
    return int(np.argmax(loglik))


def test_blocks_are_whole_stretches_of_time_from_the_first_frame():
    t = 100.0 + np.array([0.0, 59.9, 60.0, 120.5, -0.1])
    # floor((t - t0) / block): block 0 holds [t0, t0 + 60) (arithmetic, common practice).
    np.testing.assert_array_equal(cv_block(t, 100.0, 60.0), [0, 0, 1, 2, -1])


def test_held_out_error_matches_the_poisson_map_and_the_distance_along_the_track():
    env = two_bins()
    # Sample 0 (fold 0): three spikes of unit 0; sample 1 (fold 1): two of unit 1; sample 2 has none.
    sample = np.array([0, 1])
    row = np.array([0, 1])
    count = np.array([3.0, 2.0])
    true_xy = np.array([[5.0, 0.0], [5.0, 0.0], [15.0, 0.0]])
    fits = []

    def fit_without(fold):
        fits.append(fold)
        return RATES_HZ, np.ones(2, bool)

    got = held_out_error(env, sample, row, count, np.array([0, 1, 0]), true_xy, 2, fit_without, WINDOW_S, 0.01)
    assert isinstance(got, CrossValidatedError)
    centres = env.bin_centers_cm[:, 0]
    expected = [
        abs(centres[map_bin_by_scipy([3, 0])] - 5.0),  # scipy: bin 0, error 0 cm
        abs(centres[map_bin_by_scipy([0, 2])] - 5.0),  # scipy: bin 1, error 10 cm along the track
    ]
    np.testing.assert_allclose(got.errors_cm, expected)
    assert float(got) == got.median_cm == pytest.approx(np.median(expected))
    np.testing.assert_array_equal(got.fold_of_sample, [0, 1])
    np.testing.assert_array_equal(got.fold_n_samples, [1, 1])
    np.testing.assert_allclose(got.fold_median_cm, expected)
    # Each fold's maps are asked for once, and only for a fold with a sample holding spikes.
    assert fits == [0, 1]


def test_a_fold_without_training_data_is_skipped_and_no_spikes_is_an_error():
    env = two_bins()
    true_xy = np.array([[5.0, 0.0], [5.0, 0.0]])

    def only_fold_0(fold):
        return (RATES_HZ, np.ones(2, bool)) if fold == 0 else None

    got = held_out_error(env, np.array([0, 1]), np.array([0, 1]), np.array([3.0, 2.0]), np.array([0, 1]),
                         true_xy, 2, only_fold_0, WINDOW_S, 0.01)
    np.testing.assert_array_equal(got.fold_n_samples, [1, 0])
    assert np.isnan(got.fold_median_cm[1])
    with pytest.raises(ValueError, match="no evaluation sample with spikes"):
        held_out_error(env, np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), np.array([0, 1]),
                       true_xy, 2, only_fold_0, WINDOW_S, 0.01)
    with pytest.raises(ValueError, match="no held-out sample could be decoded"):
        held_out_error(env, np.array([1]), np.array([1]), np.array([2.0]), np.array([0, 1]),
                       true_xy, 2, only_fold_0, WINDOW_S, 0.01)
