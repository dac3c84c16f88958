"""Head direction: the heading ring, arcs, circular statistics and head-direction figures.

Every check of the numerics names its outside reference beside the assertion:
scipy.stats (circmean, circstd, circvar), scipy.ndimage.gaussian_filter1d
with mode="wrap", scipy.special (Bessel functions for the von Mises mean
resultant length), Zar (1999) for the Rayleigh test, or common practice.
"""

import math

import numpy as np
import pytest
from scipy import ndimage, special, stats

from decoder.config import ConfigError, SourceSettings, parse_config
from decoder.encoding.heading_metrics import (
    heading_error_deg,
    heading_tuning,
    mean_resultant,
    rayleigh_p,
    tuned_against_shuffle,
)
from decoder.inference.decoding import BayesDecoder
from decoder.messages import MessageError, TrackerFrames
from decoder.session.positions import Positions
from decoder.session.streams import SpikeWatermark
from decoder.space.environments import Arena, Environment, HeadingRing, RING_RADIUS_CM
from decoder.space.headings import heading_of_point, heading_points_cm
from decoder.space.zones import ArcZone, zone_from_dict


def test_ring_bins_distances_and_dict_form():
    ring = HeadingRing(bin_deg=6.0)
    assert ring.n_bins == 60 and ring.bin_cm == 6.0
    # Headings just either side of 0 and whole turns away land in the first and last bins.
    pts = heading_points_cm(np.radians([0.5, 359.5, 720.5, -0.5, np.nan]))
    assert ring.bin_index(pts).tolist() == [0, 59, 0, 59, -1]
    # The shortest turn wraps through 0/360 (common practice for angular error).
    d = ring.distance_cm(heading_points_cm(np.radians([350.0, 90.0])), heading_points_cm(np.radians([10.0, 270.0])))
    assert d == pytest.approx([20.0, 180.0])
    assert ring.bin_distance_matrix_cm()[0, 59] == pytest.approx(6.0)
    # One cm of arc on the ring is one degree.
    assert 2 * math.pi * RING_RADIUS_CM == pytest.approx(360.0)
    assert Environment.from_dict(ring.to_dict()) == ring
    with pytest.raises(ValueError, match="bin_deg"):
        HeadingRing(bin_deg=0.0)


@pytest.mark.parametrize("sigma_deg", [6.0, 15.0, 40.0])
def test_wrap_smoothing_matches_gaussian_filter1d_wrap(sigma_deg):
    ring = HeadingRing(bin_deg=6.0)
    values = np.random.default_rng(3).gamma(2.0, 1.0, ring.n_bins)
    every = np.ones(ring.n_bins, bool)
    ours = ring.smooth(values, every, sigma_deg)
    # Source: scipy.ndimage.gaussian_filter1d, mode="wrap", truncate=4 (its default), sigma in bins.
    ref = ndimage.gaussian_filter1d(values, sigma_deg / ring.bin_cm, mode="wrap")
    np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=1e-12)


def test_mean_resultant_matches_scipy_circular_statistics():
    rng = np.random.default_rng(11)
    angles = rng.vonmises(1.0, 2.0, 500)
    direction, length = mean_resultant(angles)
    # Source: scipy.stats.circmean / circvar (1 - R) / circstd (sqrt(-2 ln R)).
    assert direction == pytest.approx(stats.circmean(angles), abs=1e-12)
    assert 1.0 - length == pytest.approx(stats.circvar(angles), abs=1e-12)
    assert math.sqrt(-2.0 * math.log(length)) == pytest.approx(stats.circstd(angles), abs=1e-12)


def test_posterior_mean_on_the_ring_is_the_circular_mean():
    ring = HeadingRing(bin_deg=6.0)
    counts = np.zeros(ring.n_bins, int)
    counts[[0, 1, 58, 59, 30]] = [5, 3, 4, 6, 1]
    p = counts / counts.sum()
    mean_xy = p @ ring.bin_centers_cm
    direction_deg, length = heading_of_point(*mean_xy)
    samples = np.radians(np.repeat(ring.bin_centers_deg, counts))
    # Source: scipy.stats.circmean and circvar on the posterior as repeated samples of the bin centres.
    assert math.radians(direction_deg) == pytest.approx(stats.circmean(samples), abs=1e-12)
    assert 1.0 - length == pytest.approx(stats.circvar(samples), abs=1e-12)


def test_decoder_posterior_mean_on_a_ring_gives_circular_mean_direction():
    ring = HeadingRing(bin_deg=6.0)
    theta = np.radians(ring.bin_centers_deg)
    rates = 1.0 + 20.0 * np.exp(3.0 * (np.cos(theta[None, :] - np.radians([[10.0], [100.0], [350.0]])) - 1.0))
    dec = BayesDecoder(rates, ring, ring.valid_mask, window_s=0.25, prior="uniform")
    step = dec.decode(np.array([0, 2]), np.array([2, 3]))
    post = step.posterior
    # Source: scipy.stats.circmean of the bin centres weighted by posterior mass (as many samples),
    # compared through sin and cos; decoder mean_xy_cm is the planar mean of the ring points.
    direction_deg, length = heading_of_point(*step.mean_xy_cm)
    c, s = post @ np.cos(theta), post @ np.sin(theta)
    assert math.radians(direction_deg) == pytest.approx(math.atan2(s, c) % (2 * math.pi), abs=1e-9)
    assert length == pytest.approx(math.hypot(c, s), abs=1e-9)


def test_rayleigh_p_against_zar_series_and_a_null_simulation():
    # Source: Zar (1999) Biostatistical Analysis eq. 27.4 (ours) against the series of eq. 27.5
    # (Greenwood & Durand 1955), which agree closely from n of about 10 (Zar says so).
    n = np.array([10, 20, 50, 100])
    r = np.array([0.3, 0.35, 0.2, 0.15])
    z = n * r * r
    series = np.exp(-z) * (1 + (2 * z - z * z) / (4 * n)
                           - (24 * z - 132 * z**2 + 76 * z**3 - 9 * z**4) / (288 * n * n))
    np.testing.assert_allclose(rayleigh_p(n, r), series, atol=2e-3)
    # Small n: against the null distribution of R drawn with numpy (uniform angles), 200k draws;
    # tolerance 0.01 covers the Monte Carlo error (s.d. below 0.0011) and the approximation's.
    rng = np.random.default_rng(5)
    for n_small, r_obs in ((5, 0.6), (8, 0.5)):
        draws = rng.uniform(0, 2 * np.pi, (200_000, n_small))
        null_r = np.hypot(np.cos(draws).mean(axis=1), np.sin(draws).mean(axis=1))
        assert rayleigh_p(n_small, r_obs) == pytest.approx(np.mean(null_r >= r_obs), abs=0.01)
    assert rayleigh_p(0, 0.5) == 1.0


def test_heading_tuning_of_a_von_mises_curve():
    ring = HeadingRing(bin_deg=1.0)
    kappa, mu_deg = 4.0, 123.0
    theta = np.radians(ring.bin_centers_deg)
    curve = 30.0 * np.exp(kappa * (np.cos(theta - np.radians(mu_deg)) - 1.0))
    flat = np.full(ring.n_bins, 5.0)
    fig = heading_tuning(np.stack([curve, flat]), ring, ring.valid_mask, np.array([400, 400]))
    # An untuned unit: no mean vector (Fisher 1993), a width of the whole turn, no Rayleigh significance.
    assert fig.mean_vector_length[1] == pytest.approx(0.0, abs=1e-12)
    assert fig.tuning_width_deg[1] == 360.0 and fig.rayleigh_p[1] > 0.99
    assert fig.preferred_direction_deg[0] == pytest.approx(mu_deg, abs=1e-6)
    # Source: the von Mises mean resultant length I1(k)/I0(k) (Fisher 1993, eq. 3.4x; scipy.special),
    # the curve sampled at 1-degree bins (error far below 1e-6).
    assert fig.mean_vector_length[0] == pytest.approx(special.i1(kappa) / special.i0(kappa), abs=1e-6)
    # Half maximum at cos(d) = 1 - ln2 / k: the closed form, to within a bin.
    fwhm = 2.0 * math.degrees(math.acos(1.0 - math.log(2.0) / kappa))
    assert fig.tuning_width_deg[0] == pytest.approx(fwhm, abs=1.0)
    assert fig.rayleigh_p[0] < 1e-10


def test_arc_zone_contains_wraps_and_needs_a_ring():
    arc = ArcZone("goal", center_deg=350.0, half_width_deg=30.0)
    deg = np.array([320.0, 330.0, 10.0, 20.0, 21.0, 180.0, np.nan])
    inside = arc.contains(heading_points_cm(np.radians(deg)))
    assert inside.tolist() == [True, True, True, True, False, False, False]
    assert [arc.contains_point(*p) for p in heading_points_cm(np.radians(deg))] == inside.tolist()
    assert zone_from_dict(arc.to_dict()) == arc
    ring = HeadingRing(6.0)
    # 60 degrees of arc are 10 bins of 6 degrees (bin centres 321..21 degrees).
    assert arc.bin_mask(ring).sum() == 10
    with pytest.raises(ValueError, match="heading ring"):
        arc.bin_mask(Arena.rectangle(width_cm=50, height_cm=50, bin_cm=5))
    with pytest.raises(ValueError, match="half_width_deg"):
        ArcZone("bad", center_deg=0.0, half_width_deg=0.0)


CONFIG = """
[environment]
kind = "heading_ring"
bin_deg = 6.0
[[zones]]
kind = "arc"
name = "goal"
center_deg = 90.0
half_width_deg = 30.0
[[rules]]
name = "face_goal"
zone = "goal"
"""


def test_config_decodes_heading_on_a_ring_and_refuses_a_contradiction():
    cfg = parse_config(CONFIG)
    assert isinstance(cfg.environment, HeadingRing) and cfg.sources.tracked_value == "heading"
    with pytest.raises(ConfigError, match="contradicts"):
        parse_config(CONFIG + '[sources]\ntracked_value = "position"\n')


def test_positions_take_the_heading_count_unknown_and_wrap():
    counters = {"frames_dropped_unaligned": 0, "frames_dropped_ahead": 0}
    sources = SourceSettings(spikes="ephys", tracker="tracker", truth="truth", tracked_value="heading")
    positions = Positions(sources, counters, SpikeWatermark(max_jump_s=5.0))
    positions.watermark.advance(10.0)
    hd = [0.5, 0.5 + 4 * math.pi, math.nan, 1.0]
    frames = TrackerFrames.from_columns("tracker", 0, [1.0, 1.02, 1.04, 1.06], [0, 0, 0, math.nan],
                                        [0, 0, 0, math.nan], head_dir_rad=hd)
    positions.add_frames(frames, None)
    # Frame 3 has no heading (NaN), frame 4 is lost (NaN position): both unknown headings.
    assert counters["frames_heading_unknown"] == 2
    x0, y0 = positions.tracked.position_at(1.0)
    x1, y1 = positions.tracked.position_at(1.02)
    # A finite angle is taken modulo a whole turn (PROTOCOL.md).
    assert (x1, y1) == pytest.approx((x0, y0), abs=1e-9)
    assert heading_of_point(x0, y0)[0] == pytest.approx(math.degrees(0.5))
    # The speed on the ring is the angular head speed, 0 here (the same heading twice).
    assert positions.tracked.at_xy(1.02)[2] == pytest.approx(0.0, abs=1e-6)
    # Frames without any hd are unknown headings too.
    positions.add_frames(TrackerFrames.one("tracker", 1, 2.0, 1.0, 1.0), None)
    assert counters["frames_heading_unknown"] == 3
    # An infinite heading is an error of the message (PROTOCOL.md), refused before the pipeline.
    with pytest.raises(MessageError, match="infinite"):
        TrackerFrames.from_columns("tracker", 2, [3.0], [0.0], [0.0], head_dir_rad=[math.inf])


def test_angular_head_speed_from_the_track_history():
    sources = SourceSettings(spikes="ephys", tracker="tracker", tracked_value="heading")
    positions = Positions(sources, {"frames_dropped_unaligned": 0, "frames_dropped_ahead": 0},
                          SpikeWatermark(max_jump_s=5.0))
    positions.watermark.advance(10.0)
    t = np.arange(0.0, 1.0, 0.02)
    hd = np.radians(350.0 + 120.0 * t)   # 120 deg/s, across 0/360
    frames = TrackerFrames.from_columns("tracker", 0, t, np.zeros(t.size), np.zeros(t.size), head_dir_rad=hd)
    positions.add_frames(frames, None)
    # Common practice: angular head velocity as the turn between headings over the interval.
    assert positions.tracked.at_xy(0.8)[2] == pytest.approx(120.0, rel=1e-6)


def test_heading_error_wraps():
    assert heading_error_deg(np.array([355.0, 10.0]), np.array([5.0, 190.0])).tolist() == pytest.approx([10.0, 180.0])


def test_shuffle_tells_a_tuned_unit_from_an_untuned_one():
    # Invented data (a sanity bound, not a reference): a head turning at random, one von Mises unit, one flat unit.
    rng = np.random.default_rng(2)
    t = np.arange(0.0, 300.0, 0.02)
    omega = np.zeros(t.size)
    for i in range(1, t.size):
        omega[i] = omega[i - 1] * math.exp(-0.02 / 0.3) + 1.5 * math.sqrt(1 - math.exp(-0.04 / 0.3)) * rng.normal()
    hd = np.mod(np.cumsum(omega) * 0.02, 2 * np.pi)
    rate = 0.5 + 20.0 * np.exp(3.0 * (np.cos(hd - 2.0) - 1.0))
    tuned_spikes = t[rng.random(t.size) < rate * 0.02]
    flat_spikes = t[rng.random(t.size) < 5.0 * 0.02]
    tuned, mvl, threshold = tuned_against_shuffle(tuned_spikes, t, hd, rng, n_shuffles=100)
    assert tuned and mvl > threshold
    assert not tuned_against_shuffle(flat_spikes, t, hd, rng, n_shuffles=100)[0]


def test_simulated_head_turning_and_the_heading_pipeline_end_to_end(tmp_path):
    # Invented data (the simulated rig): plumbing and sanity bounds, not a reference.
    from decoder.config import load_config, with_overrides
    from rig_adapters.sessions.replay import replay_session
    from rig_adapters.sim.heading import HeadTurning
    from rig_adapters.sim.recording import record_simulated_session
    from rig_adapters.sim.settings import SimulationSettings

    settings = SimulationSettings(n_place_cells=0, n_grid_cells=0, n_nonspatial_cells=0, n_head_direction_cells=5)
    turning = HeadTurning(HeadingRing(6.0), settings, np.random.default_rng(4))
    omega = []
    for _ in range(20_000):
        turning.step(0.01)
        omega.append(math.degrees(turning.velocity_rad_s))
    # The Ornstein-Uhlenbeck velocity keeps its stationary s.d. (exact discretisation; 200 s, ~670 tau).
    assert np.std(omega) == pytest.approx(settings.angular_velocity_sd_deg_s, rel=0.15)

    config = with_overrides(load_config("configs/heading_goal_arc.toml"),
                            {"session.learn_s": 40.0, "session.arm_after_fit": True, "session.cross_validate": False})
    log_dir = record_simulated_session(config, tmp_path / "session", until_s=70.0, seed=3)
    first = replay_session(log_dir, config=config)
    second = replay_session(log_dir, config=config)
    decode = first.summary["decode"]
    assert decode["digest"] == second.summary["decode"]["digest"]
    assert decode["steps"] > 1000
    # Sanity bound on invented data: 30 simulated head-direction cells decode within 20 degrees (median).
    assert decode["heading_median_error_deg"] < 20.0
    assert first.summary["input"]["frames_heading_unknown"] > 0
    tuning = first.pipeline.model.heading_tuning_
    assert tuning is not None and np.sum(tuning.rayleigh_p < 0.001) >= 25


def test_place_model_on_a_ring_fits_heading_figures_and_keeps_them_through_its_file(tmp_path):
    # Invented data (a sanity bound): a head turning at 60 deg/s, one unit firing near 90 degrees.
    from decoder.encoding.place_model import PlaceModel

    ring = HeadingRing(6.0)
    model = PlaceModel(ring, min_speed_cm_s=0.0, smooth_cm=6.0, min_occupancy_s=0.05)
    t = np.arange(0.0, 120.0, 0.02)
    hd = np.radians(60.0 * t)
    near = np.abs(np.mod(np.degrees(hd) - 90.0 + 180.0, 360.0) - 180.0) < 15.0
    spikes = t[near][::2] + 0.005
    # Frames and spikes interleaved second by second, as a session delivers them.
    for start in range(120):
        in_second = (t >= start) & (t < start + 1)
        model.update_frames(t[in_second], heading_points_cm(hd[in_second]))
        batch = spikes[(spikes >= start) & (spikes < start + 1)]
        model.update_spikes(batch, np.full(batch.size, 7))
    fitted = model.fit().heading_tuning_
    assert model.counters_["spikes_placed"] >= 240
    # The unit fires within 15 degrees of 90: its preferred direction is 90 within a bin (common practice).
    assert abs(fitted.preferred_direction_deg[0] - 90.0) < 6.0 and fitted.rayleigh_p[0] < 1e-10
    model.save(tmp_path / "ring.npz")
    loaded = PlaceModel.load(tmp_path / "ring.npz")
    assert Environment.from_dict(loaded.environment.to_dict()) == ring
    np.testing.assert_allclose(loaded.heading_tuning_.mean_vector_length, fitted.mean_vector_length)
