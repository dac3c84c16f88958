"""Tests for decoder.encoding.spatial_metrics.

Each check of the science names its source beside the assertion: a closed
form from the cited paper, a reference library (scipy, numpy), or common
practice. Maps are built from formulas (a Gaussian field, the cosine grid
model); no simulated spikes are used.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import entropy

from decoder.space.environments import Arena, LinearTrack
from decoder.encoding.spatial_metrics import (
    field_size,
    gridness_score,
    skaggs_information,
    sparsity,
    spatial_autocorrelogram,
)

RNG_SEED = 7


def _grid_xy(n_bins: int, bin_cm: float) -> tuple[np.ndarray, np.ndarray]:
    y, x = (np.indices((n_bins, n_bins)) + 0.5) * bin_cm
    return x, y


def _cosine_grid(x, y, spacing_cm, orientation_rad=0.2, phase_cm=(13.0, 7.0)):
    """Grid-cell rate map from the three-cosine model.

    Solstad, Moser & Einevoll (2006), Hippocampus 16:1026: the sum of three
    plane waves 60 degrees apart with wave number 4 pi / (sqrt(3) spacing),
    passed through g(u) = exp(0.3 (u + 1.5)) - 1 (the constants from memory).
    """
    k = 4 * np.pi / (np.sqrt(3) * spacing_cm)
    total = np.zeros_like(x)
    for i in range(3):
        theta = orientation_rad + i * np.pi / 3
        total += np.cos(k * ((x - phase_cm[0]) * np.cos(theta) + (y - phase_cm[1]) * np.sin(theta)))
    return np.exp(0.3 * (total + 1.5)) - 1


def _gaussian_field(x, y, center_cm, sigma_cm, peak_hz=10.0, base_hz=0.0):
    d2 = (x - center_cm[0]) ** 2 + (y - center_cm[1]) ** 2
    return peak_hz * np.exp(-d2 / (2 * sigma_cm**2)) + base_hz


# --- Skaggs information -------------------------------------------------------


def test_uniform_map_carries_no_information():
    occupancy = np.array([2.0, 1.0, 3.0, 0.5])
    bits, bits_s = skaggs_information(np.full((1, 4), 3.0), occupancy)
    # Skaggs et al. 1993: log2(r_i / r) = 0 in every bin when the rate is flat.
    assert bits[0] == pytest.approx(0.0, abs=1e-12)
    assert bits_s[0] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("n_bins", [2, 8, 100])
def test_one_bin_of_n_gives_log2_n_bits_per_spike(n_bins):
    rates = np.zeros((1, n_bins))
    rates[0, 3 % n_bins] = 12.0
    occupancy = np.full(n_bins, 0.7)
    bits, bits_s = skaggs_information(rates, occupancy)
    # Skaggs et al. 1993: a cell firing in one of N equally occupied bins gives log2 N bits/spike.
    assert bits[0] == pytest.approx(math.log2(n_bins), rel=1e-12)
    # Skaggs et al. 1993: bits/s = bits/spike x mean rate, mean rate = 12 Hz / N here.
    assert bits_s[0] == pytest.approx(math.log2(n_bins) * 12.0 / n_bins, rel=1e-12)


def test_information_equals_kl_divergence_from_scipy():
    rng = np.random.default_rng(RNG_SEED)
    rates = rng.gamma(1.0, 4.0, size=(5, 30))
    rates[:, :4] = 0.0
    occupancy = rng.uniform(0.1, 3.0, 30)
    bits, bits_s = skaggs_information(rates, occupancy)
    p = occupancy / occupancy.sum()
    for unit in range(5):
        mean_rate = p @ rates[unit]
        q = p * rates[unit] / mean_rate
        # Skaggs et al. 1993 information is the KL divergence of the
        # spike-weighted occupancy q from occupancy p; scipy.stats.entropy(q, p, base=2) is that divergence.
        assert bits[unit] == pytest.approx(entropy(q, p, base=2), rel=1e-10)
        # Skaggs et al. 1993: bits/s = bits/spike x mean rate.
        assert bits_s[unit] == pytest.approx(bits[unit] * mean_rate, rel=1e-12)


def test_unvisited_bins_are_ignored_and_a_silent_unit_is_nan():
    rates = np.array([[5.0, 0.0, np.nan], [0.0, 0.0, 0.0]])
    bits, _ = skaggs_information(rates, [1.0, 1.0, 0.0])
    # Skaggs et al. 1993 with p = (1/2, 1/2, 0): one of two bins, 1 bit/spike.
    assert bits[0] == pytest.approx(1.0)
    assert np.isnan(bits[1])


def test_skaggs_rejects_mismatched_occupancy():
    with pytest.raises(ValueError, match="occupancy_s must have shape"):
        skaggs_information(np.ones((2, 4)), np.ones(3))
    with pytest.raises(ValueError, match="sums to zero"):
        skaggs_information(np.ones((2, 4)), np.zeros(4))


# --- sparsity -----------------------------------------------------------------


def test_sparsity_closed_forms():
    occupancy = np.full(10, 1.5)
    rates = np.zeros((2, 10))
    rates[0] = 4.0
    rates[1, 6] = 9.0
    out = sparsity(rates, occupancy)
    # Skaggs et al. 1996: (sum p r)^2 / sum p r^2 is 1 for a flat map ...
    assert out[0] == pytest.approx(1.0)
    # ... and 1/N for a cell firing in one of N equally occupied bins.
    assert out[1] == pytest.approx(0.1)


def test_sparsity_two_level_map():
    p = np.array([0.25, 0.75])
    rates = np.array([8.0, 2.0])
    # Skaggs et al. 1996 worked by hand: (0.25*8 + 0.75*2)^2 / (0.25*64 + 0.75*4) = 12.25 / 19.
    assert sparsity(rates, p * 4.0) == pytest.approx(12.25 / 19.0)


# --- field size -----------------------------------------------------------------


def test_field_size_of_gaussian_field_in_arena():
    box = Arena.rectangle(width_cm=100, height_cm=100, bin_cm=1.0)
    x, y = box.bin_centers_cm.T
    sigma = 8.0
    rate = _gaussian_field(x, y, (40.0, 55.0), sigma)
    size = field_size(rate, box, box.valid_mask)
    # Closed form for a Gaussian: rate >= 0.2 peak inside radius sigma*sqrt(2 ln 5),
    # area 2 pi sigma^2 ln 5; 2% covers the 1 cm bins along the rim.
    assert size == pytest.approx(2 * math.pi * sigma**2 * math.log(5), rel=0.02)


def test_field_size_keeps_only_the_region_around_the_peak():
    box = Arena.rectangle(width_cm=100, height_cm=100, bin_cm=1.0)
    x, y = box.bin_centers_cm.T
    one = _gaussian_field(x, y, (30.0, 30.0), 6.0, peak_hz=10.0)
    two = one + _gaussian_field(x, y, (75.0, 70.0), 6.0, peak_hz=8.0)
    sizes = field_size(np.vstack([one, two]), box, box.valid_mask)
    # Common practice: the field is the connected region around the peak, so a
    # second, separate field does not add to it.
    assert sizes[1] == pytest.approx(sizes[0], rel=1e-9)


def test_field_size_respects_the_mask():
    box = Arena.rectangle(width_cm=100, height_cm=100, bin_cm=1.0)
    x, y = box.bin_centers_cm.T
    rate = _gaussian_field(x, y, (50.0, 50.0), 8.0)
    mask = box.valid_mask & (x < 50.0)
    # Closed form: the mask cuts the disc of radius sigma*sqrt(2 ln 5) in half.
    assert field_size(rate, box, mask) == pytest.approx(math.pi * 64.0 * math.log(5), rel=0.03)


def test_field_size_on_a_track_is_a_length():
    track = LinearTrack((0, 0), (200, 0), bin_cm=1.0)
    x = track.bin_centers_cm[:, 0]
    sigma = 10.0
    rate = 15.0 * np.exp(-((x - 80.0) ** 2) / (2 * sigma**2))
    # Closed form: 2 sigma sqrt(2 ln 5) cm above a fifth of the peak, within one bin.
    expected_cm = 2 * sigma * math.sqrt(2 * math.log(5))
    assert field_size(rate, track, track.valid_mask) == pytest.approx(expected_cm, abs=1.0)


def test_field_size_of_silent_map_is_zero_and_bad_threshold_is_refused():
    box = Arena.rectangle(width_cm=20, height_cm=20, bin_cm=5.0)
    assert field_size(np.zeros(box.n_bins), box, box.valid_mask) == 0.0
    with pytest.raises(ValueError, match="threshold"):
        field_size(np.ones(box.n_bins), box, box.valid_mask, threshold=1.5)


# --- autocorrelogram and gridness -------------------------------------------------


def test_autocorrelogram_matches_numpy_corrcoef_at_every_lag():
    rng = np.random.default_rng(RNG_SEED)
    rate = rng.gamma(2.0, 2.0, size=(7, 9))
    rate[2, 3] = rate[5, 0] = np.nan
    auto = spatial_autocorrelogram(rate, min_overlap_bins=4)
    ny, nx = rate.shape
    checked = 0
    for dy in range(-(ny - 1), ny):
        for dx in range(-(nx - 1), nx):
            a, b = [], []
            for i in range(ny):
                for j in range(nx):
                    i2, j2 = i + dy, j + dx
                    inside = 0 <= i2 < ny and 0 <= j2 < nx
                    if inside and np.isfinite(rate[i, j]) and np.isfinite(rate[i2, j2]):
                        a.append(rate[i2, j2])
                        b.append(rate[i, j])
            got = auto[dy + ny - 1, dx + nx - 1]
            if len(a) < 4:
                assert np.isnan(got)
                continue
            # Sargolini et al. 2006 define the autocorrelogram as Pearson's r over
            # overlapping visited bins; numpy.corrcoef is the reference.
            assert got == pytest.approx(np.corrcoef(a, b)[0, 1], abs=1e-9)
            checked += 1
    assert checked > 50
    assert auto[ny - 1, nx - 1] == pytest.approx(1.0)


@pytest.mark.parametrize("spacing_cm", [30.0, 45.0])
def test_cosine_grid_scores_high(spacing_cm):
    x, y = _grid_xy(50, 2.0)
    score = gridness_score(_cosine_grid(x, y, spacing_cm))
    # Sargolini et al. 2006: a hexagonal autocorrelogram has r60, r120 high and
    # r30, r90, r150 low; the Solstad et al. 2006 grid should clear 0.3 easily.
    assert score > 0.3


@pytest.mark.parametrize("center_cm", [(50.0, 50.0), (30.0, 65.0)])
def test_single_place_field_scores_low(center_cm):
    x, y = _grid_xy(50, 2.0)
    score = gridness_score(_gaussian_field(x, y, center_cm, sigma_cm=8.0, base_hz=0.1))
    # Sargolini et al. 2006: a single field has no sixfold symmetry; its score is below zero.
    assert score < 0.0


def test_gridness_survives_unvisited_bins():
    x, y = _grid_xy(50, 2.0)
    rate = _cosine_grid(x, y, 35.0)
    rng = np.random.default_rng(RNG_SEED)
    rate[rng.random(rate.shape) < 0.05] = np.nan
    # Sargolini et al. 2006 correlate over visited bins only; a few holes keep the grid a grid.
    assert gridness_score(rate) > 0.3


def test_gridness_rejects_bad_input():
    with pytest.raises(ValueError, match="2-D grid"):
        gridness_score(np.ones(10))
    with pytest.raises(ValueError, match="annulus"):
        gridness_score(np.random.default_rng(0).random((20, 20)), inner_radius_bins=8, outer_radius_bins=4)
