"""Tests for decoder.encoding.readiness: the tuning test and the coarser grid it may be counted on.

Spatial information is recomputed here from its published formula
(Skaggs et al. 1993, NIPS 5:1030): I = sum_i p_i (r_i / r) log2(r_i / r) bits
per spike, p_i the occupancy fraction and r the mean rate. The 0.5 bits/spike
and 1 Hz thresholds are common practice. Maps and arenas are invented.
"""

import numpy as np

from decoder.encoding.readiness import (
    TUNED_BITS_PER_SPIKE,
    TUNED_PEAK_HZ,
    Readiness,
    coarse_counts,
    coarse_tuning_grid,
    count_tuned,
    count_tuned_units,
)
from decoder.space.environments import Arena, LinearTrack


def skaggs_bits_per_spike(rate_hz, occupancy_s):
    p = occupancy_s / occupancy_s.sum()
    mean = (p * rate_hz).sum()
    ratio = rate_hz / mean
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(ratio > 0, p * ratio * np.log2(ratio), 0.0)
    return terms.sum()


def test_tuned_units_pass_both_thresholds_of_the_published_information():
    occupancy = np.array([1.0, 1.0, 1.0, 1.0])
    maps = np.array([
        [4.0, 0.1, 0.1, 0.1],  # a field in one bin of four: about 1.5 bits/spike, 4 Hz peak
        [0.4, 0.01, 0.01, 0.01],  # the same shape, but a peak under 1 Hz
        [2.0, 2.0, 2.0, 2.1],  # flat: about 0 bits/spike
    ])
    bits = np.array([skaggs_bits_per_spike(m, occupancy) for m in maps])
    expected = int(np.count_nonzero((bits >= TUNED_BITS_PER_SPIKE) & (maps.max(axis=1) >= TUNED_PEAK_HZ)))
    assert expected == 1  # the formula's verdict on these maps, before the code's
    assert count_tuned_units(maps, occupancy) == expected


def test_the_coarse_grid_puts_every_bin_centre_in_the_grid_bin_that_holds_it():
    arena = Arena.rectangle(width_cm=40, height_cm=30, bin_cm=2.0)
    grid, to_grid = coarse_tuning_grid(arena, smooth_cm=5.0)  # f = floor(5 / 2) = 2
    assert grid.bin_cm == 4.0
    # numpy.histogram2d on the coarse grid's lines finds the same bin for each fine centre (row-major, y then x).
    x, y = arena.bin_centers_cm.T
    ix = np.searchsorted(grid.x_edges_cm, x, side="right") - 1
    iy = np.searchsorted(grid.y_edges_cm, y, side="right") - 1
    for k in np.flatnonzero(arena.valid_mask)[::37]:
        h, _, _ = np.histogram2d([y[k]], [x[k]], bins=[grid.y_edges_cm, grid.x_edges_cm])
        assert np.flatnonzero(h.ravel()).tolist() == [iy[k] * grid.grid_shape[1] + ix[k]] == [to_grid[k]]


def test_no_coarser_grid_on_a_track_or_below_twice_the_bin():
    track = LinearTrack((0, 0), (100, 0), bin_cm=2.0)
    assert coarse_tuning_grid(track, smooth_cm=10.0)[0] is track
    arena = Arena.rectangle(width_cm=40, height_cm=30, bin_cm=4.0)
    grid, to_grid = coarse_tuning_grid(arena, smooth_cm=5.0)
    assert grid is arena
    np.testing.assert_array_equal(to_grid, np.arange(arena.n_bins))


def test_readiness_reads_as_a_mapping_of_its_fields():
    r = Readiness(0.5, 12.0, np.array([3]), np.array([40]), 1)
    assert list(r) == ["coverage", "running_time_s", "unit_ids", "spikes_per_unit", "n_tuned_units",
                       "median_cv_error_cm", "walk_sd_cm_per_sqrt_s"]
    assert dict(r)["running_time_s"] == 12.0 and r["median_cv_error_cm"] is None and len(r) == 7


def test_counts_on_the_coarse_grid_are_numpys_unbuffered_sums():
    arena = Arena.rectangle(width_cm=30, height_cm=20, bin_cm=2.0)
    _, to_grid = coarse_tuning_grid(arena, smooth_cm=5.0)
    to_grid = to_grid.copy()
    to_grid[::7] = -1  # bins left out, as invalid bins are
    counts = np.random.default_rng(3).poisson(4.0, (12, arena.n_bins))
    expected = np.zeros((12, int(to_grid.max()) + 1), np.int64)
    into = np.flatnonzero(to_grid >= 0)
    # Reference: numpy's np.add.at, which adds every element, repeated indices included.
    np.add.at(expected, (slice(None), to_grid[into]), counts[:, into])
    got = coarse_counts(counts, to_grid, expected.shape[1])
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, expected)


def test_the_tuned_count_from_figures_is_the_count_from_maps():
    rng = np.random.default_rng(5)
    maps = rng.gamma(0.3, 4.0, (40, 50))
    occupancy = rng.uniform(0.1, 2.0, 50)
    bits = np.array([skaggs_bits_per_spike(m, occupancy) for m in maps])  # Skaggs et al. 1993
    assert count_tuned(bits, maps.max(axis=1)) == count_tuned_units(maps, occupancy)
