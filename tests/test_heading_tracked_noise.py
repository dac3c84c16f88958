"""The tracked heading's noise in the temperature fit: its bin kernel, the predictive scoring, and the smoothing's gain.

References used: scipy.ndimage.gaussian_filter1d with mode="wrap" on a
fine grid and scipy.integrate.quad over scipy.stats.norm (the wrapped
normal as a sum over turns; Mardia and Jupp 2000, from memory) for the
kernel; Bayesian coverage (on data drawn from the model, the observed
value falls in the predictive distribution's HPD region with probability
equal to the region's mass; common practice); the variance of the median
of 5 normal draws, 0.2868 of one draw's (David and Nagaraja 2003, tables
of normal order statistics; from memory); and the tracked heading's error
measured directly against a generator's truth. Posteriors, tuning curves,
walks and headings here are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, ndimage, stats

from decoder.encoding.calibration import fit_temperature
from decoder.encoding.heading_motion import tracked_heading_noise_deg
from decoder.encoding.tracked_steps import smoothed_noise_sd, tracked_at
from decoder.inference.filtering import hpd_contains, hpd_mass
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Arena, HeadingRing
from decoder.space.headings import angle_difference_deg, heading_points_cm
from test_heading_velocity import _ou_heading

RING = HeadingRing(6.0)
STEP_S = 0.02
EPS = 1e-3


@pytest.mark.parametrize("noise_sd_deg", [0.5, 1.5, 3.0, 20.0, 300.0])
def test_bin_kernel_is_a_wrapped_normal_blurring_a_uniform_bin(noise_sd_deg):
    kernel = RING.tracked_bin_kernel(noise_sd_deg)
    np.testing.assert_allclose(kernel.sum(axis=1), 1.0, rtol=1e-12)
    np.testing.assert_allclose(kernel[7], np.roll(kernel[0], 7), atol=1e-15)  # circulant
    # Source: scipy.ndimage.gaussian_filter1d(mode="wrap") — a heading uniform in bin 0 on a grid of 400
    # points a bin, smoothed by the normal (8 s.d. either side), summed back into bins. The grid's
    # quantisation bounds the difference at ~1e-5.
    fine = np.zeros(RING.n_bins * 400)
    fine[:400] = 1.0 / 400
    smoothed = ndimage.gaussian_filter1d(fine, noise_sd_deg / (6.0 / 400), mode="wrap", truncate=8.0)
    np.testing.assert_allclose(kernel[0], smoothed.reshape(RING.n_bins, 400).sum(axis=1), atol=2e-5)


def test_bin_kernel_against_a_direct_sum_of_the_wrapped_normal():
    sd, w = 3.0, 6.0
    kernel = RING.tracked_bin_kernel(sd)

    def into_bin(j: int) -> float:
        # Source: the wrapped normal's c.d.f. as a sum over turns (Mardia and Jupp 2000, sec. 3.5.7; from
        # memory), averaged over a true heading uniform in bin 0 by scipy.integrate.quad.
        def mass(x: float) -> float:
            turns = 360.0 * np.arange(-2, 3)
            return float(np.sum(stats.norm.cdf((j + 1) * w - x + turns, scale=sd)
                                - stats.norm.cdf(j * w - x + turns, scale=sd)))
        return integrate.quad(mass, 0.0, w)[0] / w

    for j in (0, 1, 2, 59, 58, 30):
        assert kernel[0, j] == pytest.approx(into_bin(j), abs=1e-12)


def test_no_noise_is_the_identity_and_a_planar_environment_has_no_kernel_yet():
    np.testing.assert_array_equal(RING.tracked_bin_kernel(0.0), np.eye(RING.n_bins))
    with pytest.raises(ValueError, match="noise_sd_cm"):
        RING.tracked_bin_kernel(-1.0)
    with pytest.raises(NotImplementedError, match="noise s.d. of 0"):
        Arena.rectangle(20, 20, bin_cm=5).tracked_bin_kernel(1.0)


def _observed_through_noise(rng, posteriors, noise_sd_deg):
    """True bins drawn from each posterior, the heading uniform within its bin, seen through normal noise: the tracked bins."""
    cum = np.cumsum(posteriors, axis=1)
    true_bin = np.minimum((cum < rng.random((len(posteriors), 1))).sum(axis=1), RING.n_bins - 1)
    heading = (true_bin + rng.random(true_bin.size)) * RING.bin_cm + rng.normal(0.0, noise_sd_deg, true_bin.size)
    return RING.bin_index(heading_points_cm(np.radians(heading)))


def test_a_correct_posterior_seen_through_noise_covers_the_regions_mass_only_when_scored_predictively():
    rng = np.random.default_rng(4)
    n, noise = 40_000, 3.0
    # Posteriors correct by construction: von Mises bumps of random centre and concentration (1.5-6 bins
    # wide), the truth drawn from each.
    centre = rng.uniform(0, 360, (n, 1))
    kappa = rng.uniform(150, 1500, (n, 1))
    post = np.exp(kappa * (np.cos(np.radians(RING.bin_centers_deg[None, :] - centre)) - 1))
    post /= post.sum(axis=1, keepdims=True)
    tracked = _observed_through_noise(rng, post, noise)
    predictive = post @ RING.tracked_bin_kernel(noise)
    plain, scored = hpd_contains(post, tracked).mean(), hpd_contains(predictive, tracked).mean()
    # Source: Bayesian coverage (common practice) — the tracked bin is drawn from the predictive
    # distribution, so its HPD region holds it with probability equal to its mass; 40,000 independent
    # steps give a standard error of 0.0011, and 4 of them bound the difference.
    assert scored == pytest.approx(hpd_mass(predictive).mean(), abs=0.0045)
    # Scored against the posterior's own region, the same correct posterior looks overconfident.
    assert plain < hpd_mass(post).mean() - 0.03


def _ring_session(rng, walk, rates, n_steps, noise_sd_deg):
    """A path drawn from the filter's own walk on the ring, Poisson counts, and the tracked bins seen through noise."""
    cum = np.cumsum((1 - EPS) * walk.dense_matrix() + EPS / RING.n_bins, axis=1)
    x = np.empty(n_steps, np.int64)
    x[0] = rng.integers(RING.n_bins)
    u = rng.random(n_steps)
    for t in range(1, n_steps):
        x[t] = min(np.searchsorted(cum[x[t - 1]], u[t], side="right"), RING.n_bins - 1)
    counts = rng.poisson(rates[:, x].T * STEP_S)
    heading = (x + rng.random(n_steps)) * RING.bin_cm + rng.normal(0.0, noise_sd_deg, n_steps)
    return counts, RING.bin_index(heading_points_cm(np.radians(heading)))


def test_on_data_from_the_model_the_predictive_scoring_keeps_the_temperature_at_one():
    rng = np.random.default_rng(11)
    preferred = np.linspace(0, 360, 20, endpoint=False)
    rates = 0.5 + 40.0 * np.exp(4.0 * (np.cos(np.radians(RING.bin_centers_deg[None, :] - preferred[:, None])) - 1))
    walk = RandomWalk(RING, RING.valid_mask, 6.0)
    noise = 3.0
    folds = [_ring_session(rng, walk, rates, 2500, noise) for _ in range(4)]
    args = ([rates] * 4, [c for c, _ in folds], [b for _, b in folds], STEP_S, walk)
    exact = fit_temperature(*args, uniform_weight=EPS)
    predictive = fit_temperature(*args, uniform_weight=EPS, tracked_noise_sd=noise)
    # Source: a well-specified model needs no widening (common practice), as in test_calibration: scored
    # against the noisy tracked bin as if it were exact, the correct posterior looks overconfident and
    # is widened; scored against its predictive distribution it is not, to the held-out sampling error.
    # The bound on T is test_calibration's for the exact tracker (the bisection's resolution and the
    # correlated held-out steps' sampling error).
    assert exact.coverage_at_1 < exact.region_mass - 0.01 and exact.temperature > 1.2
    assert predictive.temperature < 1.1 and predictive.temperature < exact.temperature - 0.2
    assert predictive.coverage_at_1 == pytest.approx(predictive.region_mass, abs=0.012)
    assert predictive.tracked_noise_sd == noise and exact.tracked_noise_sd == 0.0


def test_a_running_median_of_five_still_frames_keeps_the_share_of_noise_order_statistics_give():
    rng = np.random.default_rng(0)
    frame_t = np.arange(20_000) * 0.02
    still = np.zeros((frame_t.size, 4))
    ends = frame_t[100:-100]
    # Source: the median of 5 normal draws has 0.2868 of one draw's variance (David & Nagaraja 2003, from
    # memory): s.d. 0.536 at the frames themselves (1 %: the draws' sampling error).
    at_frames = smoothed_noise_sd(frame_t, still, still[100:-100], 2.0, ends, 0.5, rng)
    assert at_frames == pytest.approx(2.0 * math.sqrt(0.2868), rel=0.01)
    # Between frames the interpolation averages two neighbouring medians and the noise shrinks further.
    assert smoothed_noise_sd(frame_t, still, still[100:-100], 2.0, ends + 0.01, 0.5, rng) < 0.97 * at_frames
    assert math.isnan(smoothed_noise_sd(frame_t[:1], still[:1], still[:3], 2.0, frame_t[:3], 0.5, rng))


def test_the_tracked_headings_noise_is_what_its_smoothing_leaves_of_the_trackers():
    rng = np.random.default_rng(3)
    t = np.arange(15_000) * 0.02
    truth = _ou_heading(rng, 90.0, 0.3, t.size, 0.02)  # an invented head turning at 90 deg/s over 0.3 s
    seen = truth + rng.normal(0.0, 3.0, t.size)
    seen[rng.random(t.size) < 0.02] = np.nan
    xy = heading_points_cm(np.radians(seen))
    ends = np.arange(50, 14_950) * 0.02 + 0.007
    # Source: a direct measurement — the tracked heading as the place model smooths it
    # (tracked_steps.tracked_at) against the generator's truth at the same times; the estimate only
    # knows the frames. A head turning ~2 degrees a frame keeps more noise than a still one would;
    # 5 % covers the fit's error in the noise and the process.
    _, tracked_xy = tracked_at(RING, t, xy, ends, 0.5)
    error = angle_difference_deg(RING.linearize(tracked_xy), np.interp(ends, t, truth))
    measured = float(np.sqrt(np.nanmean(error**2)))
    still = np.zeros((t.size, 4))
    assert measured > 1.04 * smoothed_noise_sd(t, still, still[50:14_950], 3.0, ends, 0.5, rng)
    assert tracked_heading_noise_deg(RING, t, xy, ends, 0.5) == pytest.approx(measured, rel=0.05)
    assert tracked_heading_noise_deg(Arena.rectangle(20, 20, bin_cm=5), t, xy, ends, 0.5) == 0.0
    assert tracked_heading_noise_deg(RING, t[:10], xy[:10], ends, 0.5) == 0.0
