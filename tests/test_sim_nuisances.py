"""Tests of the simulated rig's nuisances of real recordings, and of runs through a maze.

The sessions are simulated (invented data), so every check is a bound on the
generator against an outside reference: a closed form of the model, a scipy
distribution, or common practice of the trade.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats

from decoder.messages import SpikeBatch, TrackerFrames
from decoder.space.environments import Arena, LinearTrack, TrackGraph
from rig_adapters.sim.simulation import TRACKER_SOURCE, TRUTH_SOURCE, SimulatedSession, SimulationSettings

ARENA = Arena.rectangle(80.0, 60.0, bin_cm=3.0)
# Laps are cheaper to simulate than foraging: the tests of rates and spikes run there.
TRACK = LinearTrack((0.0, 0.0), (150.0, 0.0), bin_cm=2.0)
# A W-maze: three 80 cm arms 60 cm apart, joined at the bottom by a crossbar.
W_MAZE = TrackGraph([(0, 0), (60, 0), (120, 0), (0, 80), (60, 80), (120, 80)],
                    [(3, 0), (0, 1), (1, 2), (4, 1), (5, 2)], bin_cm=3.0)
FLAT = SimulationSettings(n_place_cells=0, n_grid_cells=0, n_nonspatial_cells=30, nonspatial_rate_hz=(20.0, 20.0))


def _spikes(messages):
    batches = [m for m in messages if isinstance(m, SpikeBatch)]
    return np.concatenate([m.t_s for m in batches]), np.concatenate([m.unit_id for m in batches])


def _frames(messages, source):
    frames = [m for m in messages if isinstance(m, TrackerFrames) and m.source == source]
    return (np.concatenate([m.t_s for m in frames]), np.concatenate([m.xy_cm for m in frames]),
            np.concatenate([m.quality for m in frames]))


def _run(env, settings, seed, until_s):
    session = SimulatedSession(env, settings, seed)
    return session, list(session.messages(until_s=until_s))


def test_every_nuisance_is_off_by_default_and_off_means_off():
    s = SimulationSettings()
    assert (s.theta_depth, s.gain_cv, s.burst_prob, s.elongated_fraction, s.double_field_fraction,
            s.n_interneurons, s.tracker_outlier_prob) == (0.0, 0.0, 0.0, 0.0, 0.0, 0, 0.0)
    # The auxiliary settings of a nuisance that is off change nothing at all.
    off = dataclasses.replace(FLAT, theta_hz=6.0, gain_interval_s=0.2, burst_spikes=(3.0, 4.0),
                              elongation_aspect=(2.0, 2.0), interneuron_rate_hz=(11.0, 12.0), tracker_outlier_cm=30.0)
    a, b = _run(TRACK, FLAT, 4, 2.0)[1], _run(TRACK, off, 4, 2.0)[1]
    assert len(a) == len(b)
    for x, y in zip(a, b):
        if isinstance(x, (SpikeBatch, TrackerFrames)):
            np.testing.assert_array_equal(x.t_s, y.t_s)


@pytest.mark.parametrize(
    ("table", "words"),
    [
        ({"theta_depth": 1.5}, "theta_depth"),
        ({"gain_cv": -0.1}, "gain_cv"),
        ({"burst_prob": 0.2, "burst_isi_s": [0.001, 0.004]}, "burst_isi_s"),
        ({"interneuron_spatial_depth": [0.0, 1.5]}, "interneuron_spatial_depth"),
        ({"tracker_outlier_prob": 1.0}, "tracker_outlier_prob"),
        ({"elongation_aspect": [0.5, 2.0]}, "elongation_aspect"),
    ],
)
def test_bad_nuisance_settings_are_named(table, words):
    with pytest.raises(ValueError, match=words):
        SimulationSettings.from_dict(table)


def test_theta_modulation_gives_the_phase_distribution_of_the_rate():
    depth = 0.5
    _, messages = _run(TRACK, dataclasses.replace(FLAT, theta_depth=depth, refractory_s=0.0), 1, 60.0)
    t, _ = _spikes(messages)
    phase = np.mod(2 * np.pi * 8.0 * t, 2 * np.pi)
    # A Poisson process with rate proportional to 1 + d cos(phase) puts its
    # spikes at phases of density (1 + d cos) / 2 pi, whose first circular
    # moment is d / 2 at mean direction 0 (worked from the density; scipy's
    # circmean as the reference for the direction).
    resultant = np.abs(np.mean(np.exp(1j * phase)))
    assert resultant == pytest.approx(depth / 2, abs=0.02)
    assert abs(np.angle(np.exp(1j * stats.circmean(phase)))) < 0.05


def test_gamma_gain_makes_counts_overdispersed_like_a_negative_binomial():
    cv = 0.3
    settings = dataclasses.replace(FLAT, gain_cv=cv, gain_interval_s=0.1, refractory_s=0.0)
    session, messages = _run(TRACK, settings, 2, 150.0)
    t, unit = _spikes(messages)
    ids = session.ground_truth().unit_ids
    edges = np.arange(0.0, 150.0 + 1e-9, 0.1)
    counts = np.stack([np.histogram(t[unit == u], edges)[0] for u in ids])
    mean, var = counts.mean(), counts.var()
    # A Poisson count whose rate carries a gamma gain of mean 1 and CV c is
    # negative binomial with n = 1 / c^2 (Greenwood & Yule 1920); scipy.stats.nbinom
    # gives its variance, mu + c^2 mu^2, against mu for plain Poisson.
    n = 1.0 / cv**2
    want = stats.nbinom(n, n / (n + mean)).var()
    assert var == pytest.approx(want, rel=0.05)
    assert var / mean > 1.1


def test_bursts_are_complex_spikes_of_place_cells_outside_the_dead_time():
    base = SimulationSettings(n_place_cells=15, n_grid_cells=0, n_nonspatial_cells=5, place_peak_hz=(15.0, 20.0))
    p = 0.3
    session, messages = _run(TRACK, dataclasses.replace(base, burst_prob=p), 3, 120.0)
    t, unit = _spikes(messages)
    truth = session.ground_truth()
    place_ids = truth.unit_ids[np.array(truth.cell_type) == "place"]
    isi = {u: np.diff(t[unit == u]) for u in truth.unit_ids}
    assert min(v.min() for v in isi.values() if v.size) >= base.refractory_s - 1e-9
    short = sum(int(np.count_nonzero(isi[u] <= 0.0061)) for u in place_ids)
    total = sum(int(np.count_nonzero(unit == u)) for u in place_ids)
    # Each spike opens a burst with probability p and adds on average 3 spikes
    # (2-6 spikes a burst, the first included) at 3-6 ms intervals (common
    # practice for complex spikes): about 3p / (1 + 3p) of all spikes follow a
    # burst spike by 6 ms or less.
    assert short / total == pytest.approx(3 * p / (1 + 3 * p), rel=0.1)
    flat_ids = truth.unit_ids[np.array(truth.cell_type) == "nonspatial"]
    assert sum(int(np.count_nonzero(isi[u] <= 0.0061)) for u in flat_ids) < 0.05 * np.count_nonzero(
        np.isin(unit, flat_ids))


def test_elongated_and_double_fields_follow_the_gaussian_level_sets():
    settings = SimulationSettings(n_place_cells=40, n_grid_cells=0, n_nonspatial_cells=0,
                                  elongated_fraction=0.5, double_field_fraction=0.5)
    truth = SimulatedSession(ARENA, settings, 5).ground_truth()
    stretched = np.flatnonzero(truth.field_aspect > 1)
    doubled = np.flatnonzero(np.isfinite(truth.second_peak_fraction))
    assert 8 <= stretched.size <= 32 and 8 <= doubled.size <= 32
    for row in stretched:
        if row in doubled:
            continue
        c, a, th, sd = (truth.field_center_cm[row], truth.field_aspect[row], truth.field_orientation_rad[row],
                        truth.field_sigma_cm[row])
        axis, across = np.array([np.cos(th), np.sin(th)]), np.array([-np.sin(th), np.cos(th)])
        points = np.vstack([c + sd * np.sqrt(a) * axis, c + sd / np.sqrt(a) * across])
        # An elliptical Gaussian is exp(-1/2) of its peak one standard deviation
        # out along either axis (closed form).
        want = truth.baseline_rate_hz[row] + truth.peak_rate_hz[row] * np.exp(-0.5)
        np.testing.assert_allclose(truth.rate_hz(points)[row], [want, want], rtol=1e-9)
    for row in doubled:
        at_second = truth.rate_hz(truth.second_center_cm[row][None, :])[row, 0]
        assert at_second >= truth.baseline_rate_hz[row] + truth.second_peak_fraction[row] * truth.peak_rate_hz[row]


def test_interneurons_fire_fast_and_weakly_spatial():
    settings = SimulationSettings(n_place_cells=0, n_grid_cells=0, n_nonspatial_cells=0, n_interneurons=6)
    session, messages = _run(TRACK, settings, 6, 60.0)
    truth = session.ground_truth()
    rates = truth.rate_hz(TRACK.bin_centers_cm)
    # Common practice: fast-spiking interneurons fire at 10-30 Hz, with at most
    # a weak spatial modulation (here depth <= 0.3, so max / min <= 1.3 / 0.7).
    assert rates.min() >= 10.0 * 0.7 and rates.max() <= 30.0 * 1.3
    assert np.all(rates.max(axis=1) / rates.min(axis=1) <= 1.3 / 0.7 + 1e-9)
    t, unit = _spikes(messages)
    observed = np.array([np.count_nonzero(unit == u) for u in truth.unit_ids]) / 60.0
    assert np.all((observed > 6.0) & (observed < 40.0))


def test_tracker_outliers_come_at_their_rate():
    settings = dataclasses.replace(FLAT, n_nonspatial_cells=1, tracker_outlier_prob=0.02, tracker_outlier_cm=20.0,
                                   lost_frame_prob=0.0, dropout_interval_s=1e9)
    session, messages = _run(TRACK, settings, 7, 120.0)
    truth = session.ground_truth()
    t_trk, xy, _ = _frames(messages, TRACKER_SOURCE)
    t_true, xy_true, _ = _frames(messages, TRUTH_SOURCE)
    t_acq = (t_trk - truth.tracker_offset_s) / (1.0 + truth.tracker_drift_ppm * 1e-6)
    keep = t_acq < t_true[-1]
    ref = np.column_stack([np.interp(t_acq[keep], t_true, xy_true[:, i]) for i in (0, 1)])
    far = np.hypot(*(xy[keep] - ref).T) > 5.0
    # Jitter of 0.5 cm almost never reaches 5 cm; an outlier of 20 cm per axis
    # does with probability about 0.97. scipy.stats.binom: 99.9 % interval.
    low, high = stats.binom.interval(0.999, int(keep.sum()), 0.02 * 0.97)
    assert low <= int(far.sum()) <= high


def test_runs_through_a_w_maze_stay_on_the_track_and_reach_every_arm():
    settings = SimulationSettings(n_place_cells=10, n_grid_cells=0, n_nonspatial_cells=2,
                                  place_field_fwhm_cm=(15.0, 30.0))
    session, messages = _run(W_MAZE, settings, 8, 120.0)
    t, xy, _ = _frames(messages, TRUTH_SOURCE)
    assert (W_MAZE.bin_index(xy) >= 0).all()
    ends = np.array([[0.0, 80.0], [60.0, 80.0], [120.0, 80.0]])
    near_end = np.min(np.hypot(*(xy[:, None, :] - ends[None]).transpose(2, 0, 1)), axis=1) < 10.0
    visited = {int(np.argmin(np.hypot(*(p - ends).T))) for p in xy[near_end]}
    assert visited == {0, 1, 2}
    speed = np.hypot(*np.diff(xy, axis=0).T) / np.diff(t)
    # Common practice: running speed 15-25 cm/s; stops only at the arms' ends (the reward sites).
    assert 15.0 <= speed[speed >= 3.0].mean() <= 25.0
    stopped = speed < 2.0
    assert stopped.any() and np.mean(near_end[1:][stopped]) > 0.95
    # Place fields of a maze lie on its centre lines.
    truth = session.ground_truth()
    centres = truth.field_center_cm[np.array(truth.cell_type) == "place"]
    assert np.all(np.isfinite(W_MAZE.linearize(centres)))


def test_a_seed_gives_the_same_noisy_session_however_it_is_split():
    settings = SimulationSettings(n_place_cells=10, n_grid_cells=0, n_nonspatial_cells=2, theta_depth=0.5,
                                  gain_cv=0.3, burst_prob=0.3, n_interneurons=2, tracker_outlier_prob=0.05)
    whole = list(SimulatedSession(W_MAZE, settings, seed=9).messages(until_s=3.0))
    session = SimulatedSession(W_MAZE, settings, seed=9)
    parts = list(session.messages(until_s=1.3)) + list(session.messages(until_s=3.0))
    assert len(whole) == len(parts)
    for a, b in zip(whole, parts):
        if isinstance(a, (SpikeBatch, TrackerFrames)):
            np.testing.assert_array_equal(a.t_s, b.t_s)
