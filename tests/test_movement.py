"""Tests of decoder.encoding.movement: the random walk learned from tracking.

References used: the Gaussian random walk (displacements over a lag of
``dt`` are N(0, D dt) per axis; common practice for a movement prior,
Brown et al. 1998, J Neurosci 18:7411), its sampling error measured by
replicate simulations, scipy.integrate.quad for the probability of leaving
a bin. Tracks here are simulated walks, not data.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from decoder.encoding.movement import MovementModel, default_uniform_weight
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import LinearTrack

FRAME_S = 0.02
STEP_S = 0.02
SD_CM = 0.8
N_FRAMES = 20_000
N_REPLICATES = 20


def _walk_2d(seed: int, n: int = N_FRAMES, sd_cm: float = SD_CM) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(n) * FRAME_S
    xy = np.cumsum(rng.normal(0.0, sd_cm * math.sqrt(FRAME_S / STEP_S), (n, 2)), axis=0)
    return t, xy


@pytest.fixture(scope="module")
def replicate_sd():
    """S.d. of the estimator over independent replicate walks: its sampling error."""
    estimates = [MovementModel.from_tracking(*_walk_2d(1000 + k), STEP_S).sd_cm for k in range(N_REPLICATES)]
    return float(np.mean(estimates)), float(np.std(estimates, ddof=1))


def test_sd_of_a_gaussian_random_walk_is_recovered_within_sampling_error(replicate_sd):
    mean, se = replicate_sd
    # Source: common practice — an unbiased estimator's mean over the replicates lies within
    # 4 standard errors (se / sqrt(N_REPLICATES)) of the true s.d.; se itself is a few per cent at most.
    assert abs(mean - SD_CM) < 4 * se / math.sqrt(N_REPLICATES)
    assert se < 0.03 * SD_CM
    model = MovementModel.from_tracking(*_walk_2d(7), STEP_S)
    assert abs(model.sd_cm - SD_CM) < 4 * se
    assert model.step_s == STEP_S
    # Source: the documented default, 0.05 jumps per second, 1 - exp(-0.05 * 0.02) ~ 1e-3 per step.
    assert model.uniform_weight == pytest.approx(1e-3, rel=1e-3)


def test_the_sd_scales_with_the_square_root_of_the_step(replicate_sd):
    _, se = replicate_sd
    t, xy = _walk_2d(8)
    model = MovementModel.from_tracking(t, xy, 0.08)
    # Source: random walk, variance linear in time: sd over 80 ms = 2 x sd over 20 ms.
    assert abs(model.sd_cm - 2 * SD_CM) < 4 * 2 * se


def test_lost_frames_do_not_bias_the_estimate(replicate_sd):
    _, se = replicate_sd
    t, xy = _walk_2d(9)
    rng = np.random.default_rng(10)
    xy[rng.random(len(xy)) < 0.2] = np.nan
    xy[5000:5100] = np.nan  # two seconds lost together
    model = MovementModel.from_tracking(t, xy, STEP_S)
    # Source: random walk — a displacement over a lost frame has twice the variance and is divided
    # by twice the lag; 20% fewer frames widen the sampling error by about 1/sqrt(0.8), hence 5 se.
    assert abs(model.sd_cm - SD_CM) < 5 * se


def test_tracker_jitter_is_separated_from_movement(replicate_sd):
    _, se = replicate_sd
    t, xy = _walk_2d(11)
    jitter_cm = 0.6
    noisy = xy + np.random.default_rng(12).normal(0.0, jitter_cm, xy.shape)
    model = MovementModel.from_tracking(t, noisy, STEP_S)
    naive = math.sqrt(SD_CM**2 + 2 * jitter_cm**2)
    # Source: random walk plus white position noise, var(lag) = D lag + 2 jitter^2 (common practice);
    # the intercept takes the jitter. The fit over lags is noisier than one lag: 3% of the s.d.
    assert abs(model.sd_cm - SD_CM) < 0.03 * SD_CM + 4 * se
    assert naive > 1.3 * SD_CM


def test_a_steady_run_widens_the_walk_to_keep_up_over_the_horizon():
    rng = np.random.default_rng(15)
    t = np.arange(N_FRAMES) * FRAME_S
    # Straight runs at 20 cm/s back and forth along x (turning every 40 s), with tracker jitter.
    v = 20.0 * np.where((t // 40.0) % 2 == 0, 1.0, -1.0)
    x = np.cumsum(v) * FRAME_S
    xy = np.column_stack([x, np.zeros_like(x)]) + rng.normal(0.0, 0.3, (N_FRAMES, 2))
    horizon_s = 0.5
    model = MovementModel.from_tracking(t, xy, STEP_S, horizon_s=horizon_s)
    # Source: closed form — displacement over a lag L is v L on one axis and 0 on the other, so the
    # trimmed variance averaged over the two axes is (v L)^2 / 2 = A L^2 with A = v^2 / 2, and the walk
    # that spreads as far over the horizon H has sd^2 = A H step_s per step. The trimming's Gaussian
    # correction (1 / 0.925 on the variance) makes it 4% high for displacements that are all alike;
    # the turns (one frame in 2000) move it by a few per cent more: within 8%.
    expected = math.sqrt(20.0**2 / 2 * horizon_s * STEP_S)
    assert model.sd_cm == pytest.approx(expected, rel=0.08)
    # A pure random walk's s.d. does not depend on the horizon; a run's grows as its square root.
    longer = MovementModel.from_tracking(t, xy, STEP_S, horizon_s=4 * horizon_s)
    assert longer.sd_cm == pytest.approx(2 * model.sd_cm, rel=0.05)


def test_on_a_track_displacements_are_measured_along_it():
    track = LinearTrack((0, 0), (1000, 0), bin_cm=2.5)
    rng = np.random.default_rng(13)
    n = N_FRAMES
    # A 1-D walk reflected at the ends, with a sideways wobble the track's projection ignores.
    s = np.abs(500.0 + np.cumsum(rng.normal(0.0, SD_CM, n)))
    s = 1000.0 - np.abs(1000.0 - s)
    xy = np.column_stack([s, rng.normal(0.0, 2.0, n)])
    model = MovementModel.from_tracking(np.arange(n) * FRAME_S, xy, STEP_S, environment=track)
    # Source: random walk along the track; one axis only, so about sqrt(2) the 2-D sampling error
    # (about 1% here): within 5%.
    assert model.sd_cm == pytest.approx(SD_CM, rel=0.05)


@pytest.mark.parametrize("sd_cm, bin_cm", [(0.6, 2.5), (1.5, 2.5), (4.0, 2.5), (2.0, 10.0)])
def test_walk_sd_leaves_a_bin_as_often_as_the_continuous_walk(sd_cm, bin_cm):
    model = MovementModel(sd_cm=sd_cm, uniform_weight=1e-3, step_s=STEP_S)
    track = LinearTrack((0, 0), (50 * bin_cm, 0), bin_cm=bin_cm)
    walk = RandomWalk(track, track.valid_mask, model.walk_sd_cm(bin_cm), backend="numpy")
    p = np.zeros(track.n_bins)
    p[25] = 1.0
    stay = walk.predict(p)[25]

    def leave_from(u_cm: float) -> float:
        return stats.norm.sf((bin_cm - u_cm) / sd_cm) + stats.norm.cdf(-u_cm / sd_cm)

    # Source: scipy.integrate.quad over a start uniform in the bin of the normal mass beyond its edges.
    leave, _ = integrate.quad(leave_from, 0.0, bin_cm)
    assert stay == pytest.approx(1.0 - leave / bin_cm, rel=1e-6)


def test_a_walk_far_narrower_than_a_bin_keeps_its_sd():
    model = MovementModel(sd_cm=0.001, uniform_weight=0.0, step_s=STEP_S)
    # Source: closed form — it leaves a 10 cm bin with probability 2 x 0.001 / 10 x phi(0) ~ 8e-5,
    # less than RandomWalk's narrowest moving kernel (2 exp(-8) ~ 7e-4) can express; both stay put.
    assert model.walk_sd_cm(10.0) == 0.001


def test_default_uniform_weight_is_a_rate_per_second():
    # Source: Poisson jumps at 0.05 per second: probability 1 - exp(-0.05 step_s) per step.
    assert default_uniform_weight(1.0) == pytest.approx(1 - math.exp(-0.05))
    assert default_uniform_weight(0.002) == pytest.approx(1e-4, rel=1e-3)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"sd_cm": -1.0, "uniform_weight": 0.0, "step_s": 0.02}, "sd_cm"),
        ({"sd_cm": 1.0, "uniform_weight": 1.0, "step_s": 0.02}, "uniform_weight"),
        ({"sd_cm": 1.0, "uniform_weight": 0.0, "step_s": float("nan")}, "step_s"),
    ],
)
def test_bad_settings_name_the_value(kwargs, message):
    with pytest.raises(ValueError, match=message):
        MovementModel(**kwargs)


def test_bad_tracking_says_what_is_wrong():
    t, xy = _walk_2d(14, n=200)
    with pytest.raises(ValueError, match="shape"):
        MovementModel.from_tracking(t, xy[:, :1], STEP_S)
    with pytest.raises(ValueError, match="increasing"):
        MovementModel.from_tracking(t[::-1], xy, STEP_S)
    xy[20:] = np.nan
    with pytest.raises(ValueError, match="valid tracked frames"):
        MovementModel.from_tracking(t, xy, STEP_S)
    with pytest.raises(ValueError, match="never move"):
        MovementModel.from_tracking(t, np.zeros((200, 2)), STEP_S)
    with pytest.raises(ValueError, match="step_s"):
        MovementModel.from_tracking(t, np.zeros((200, 2)), 0)
