"""Tests of rig_adapters.sim.simulation: the generative model behind the simulated rig.

The sessions here are simulated, so every check is a sanity bound on the
generator against an outside reference (a published formula, scipy, numpy,
or common practice of the trade), never a claim about real data.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats

from decoder.space.environments import Arena, LinearTrack, TrackGraph
from decoder.messages import Heartbeat, SourceAnnounce, SpikeBatch, SyncPulse, TrackerFrames
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE, SimulatedSession

ARENA = Arena.circle((45.0, 45.0), 45.0, bin_cm=3.0)
TRACK = LinearTrack((0.0, 0.0), (200.0, 0.0), bin_cm=2.0)
ARENA_S = 200.0
TRACK_S = 150.0

SETTINGS = SimulationSettings(n_place_cells=20, n_grid_cells=4, n_nonspatial_cells=4)


def _collect(env, settings, seed, until_s):
    session = SimulatedSession(env, settings, seed)
    return session, list(session.messages(until_s=until_s))


@pytest.fixture(scope="module")
def arena_run():
    return _collect(ARENA, SETTINGS, 11, ARENA_S)


@pytest.fixture(scope="module")
def track_run():
    return _collect(TRACK, SETTINGS, 12, TRACK_S)


def _truth(messages):
    frames = [m for m in messages if isinstance(m, TrackerFrames) and m.source == TRUTH_SOURCE]
    return np.concatenate([m.t_s for m in frames]), np.concatenate([m.xy_cm for m in frames])


def _speed(t, xy):
    return np.hypot(*np.diff(xy, axis=0).T) / np.diff(t)


def _spikes(messages):
    batches = [m for m in messages if isinstance(m, SpikeBatch)]
    return np.concatenate([m.t_s for m in batches]), np.concatenate([m.unit_id for m in batches])


# -- settings ----------------------------------------------------------------------


def test_from_dict_takes_defaults_and_toml_lists():
    assert SimulationSettings.from_dict({}) == SimulationSettings()
    s = SimulationSettings.from_dict({"place_peak_hz": [4, 12], "n_grid_cells": 0})
    assert s.place_peak_hz == (4.0, 12.0) and s.n_grid_cells == 0


@pytest.mark.parametrize(
    ("table", "words"),
    [
        ({"n_place_cell": 3}, "unknown key(s) ['n_place_cell']"),
        ({"n_place_cells": -1}, "n_place_cells"),
        ({"place_peak_hz": [20, 5]}, "place_peak_hz"),
        ({"place_peak_hz": 5}, "pair"),
        ({"tick_s": 0.02001}, "whole number of acquisition samples"),
        ({"lost_frame_prob": 1.0}, "lost_frame_prob"),
        ({"mean_speed_cm_s": float("nan")}, "mean_speed_cm_s"),
        ({"n_place_cells": 0, "n_grid_cells": 0, "n_nonspatial_cells": 0}, "at least one cell"),
        ({"min_wall_distance_cm": 9.0}, "wall_margin_cm"),
    ],
)
def test_from_dict_names_the_bad_value(table, words):
    with pytest.raises(ValueError, match="simulation") as err:
        SimulationSettings.from_dict(table)
    assert words in str(err.value)


def test_a_maze_needs_arms_that_end():
    loop = TrackGraph([(0, 0), (100, 0), (100, 100), (0, 100)], [(0, 1), (1, 2), (2, 3), (3, 0)], bin_cm=5.0)
    with pytest.raises(ValueError, match="dead ends"):
        SimulatedSession(loop, SETTINGS, seed=0)


# -- trajectory --------------------------------------------------------------------


def test_open_field_path_stays_inside_and_runs_at_rodent_speed(arena_run):
    _, messages = arena_run
    t, xy = _truth(messages)
    # The shape itself (not just its grown bins) holds every true position,
    # at least min_wall_distance_cm from the wall of the 45 cm circle.
    assert ARENA.contains(xy).all()
    assert np.hypot(xy[:, 0] - 45.0, xy[:, 1] - 45.0).max() <= 45.0 - SETTINGS.min_wall_distance_cm + 1e-6
    assert (ARENA.bin_index(xy) >= 0).all()
    # The path must reach near the wall and cross the middle, i.e. cover the field.
    assert np.hypot(xy[:, 0] - 45.0, xy[:, 1] - 45.0).max() > 40.0
    assert np.hypot(xy[:, 0] - 45.0, xy[:, 1] - 45.0).min() < 10.0
    speed = _speed(t, xy)
    running = speed >= 3.0  # common practice: 2-5 cm/s separates running from immobility
    # Common practice: a foraging mouse or rat runs at about 15-25 cm/s on average.
    assert 15.0 <= speed[running].mean() <= 25.0
    # Pauses are there for the speed filter to drop (settings: 1-4 s every ~20 s).
    assert 0.03 <= np.mean(speed < 2.0) <= 0.3
    # Common practice (from memory): foraging rodents rarely exceed ~80 cm/s.
    assert np.percentile(speed, 99.9) < 80.0


def test_rectangular_arena_path_stays_inside_the_walls():
    box = Arena.rectangle(60.0, 40.0, bin_cm=2.0)
    _, messages = _collect(box, dataclasses.replace(SETTINGS, n_place_cells=2), 5, 60.0)
    _, xy = _truth(messages)
    gap = SETTINGS.min_wall_distance_cm - 1e-6
    # Geometry of the box: every true position keeps min_wall_distance_cm from each wall.
    assert np.all((xy[:, 0] >= gap) & (xy[:, 0] <= 60.0 - gap) & (xy[:, 1] >= gap) & (xy[:, 1] <= 40.0 - gap))


def test_linear_track_laps_pause_at_both_ends(track_run):
    _, messages = track_run
    t, xy = _truth(messages)
    assert (TRACK.bin_index(xy) >= 0).all()
    lin = TRACK.linearize(xy)
    stop = SETTINGS.end_stop_cm
    assert lin.min() >= stop - 1e-6 and lin.max() <= 200.0 - stop + 1e-6
    # A lap is a run from one end to the other: count visits alternating ends.
    at_end = np.where(lin < stop + 1.0, 0, np.where(lin > 200.0 - stop - 1.0, 1, -1))
    visits = at_end[at_end >= 0]
    laps = int(np.count_nonzero(np.diff(visits) != 0))
    # 150 s at ~20 cm/s over 190 cm with 2-5 s stops: about ten laps.
    assert laps >= 6
    speed = _speed(t, xy)
    stopped = speed < 2.0
    # The animal stops only at the ends (where the reward is), within a bin or so.
    near_end = (lin[1:] < stop + 5.0) | (lin[1:] > 200.0 - stop - 5.0)
    assert stopped.any() and np.mean(near_end[stopped]) > 0.95
    # Common practice: running speed of 15-25 cm/s on average.
    assert 15.0 <= speed[speed >= 3.0].mean() <= 25.0


# -- cells -------------------------------------------------------------------------


def test_place_cell_counts_in_field_match_poisson_expectation(arena_run):
    session, messages = arena_run
    truth = session.ground_truth()
    t, xy = _truth(messages)
    dt = np.diff(t)
    spike_t, spike_unit = _spikes(messages)
    tau = SETTINGS.refractory_s
    checked = 0
    for row in np.flatnonzero(np.array(truth.cell_type) == "place"):
        radius = truth.field_sigma_cm[row] * 1.1774  # half width at half maximum
        in_field = np.hypot(*(xy[:-1] - truth.field_center_cm[row]).T) <= radius
        rate = truth.rate_hz(xy[:-1])[row]
        # A Poisson process with a dead time tau fires at lambda / (1 + lambda tau)
        # (mean interval tau + 1/lambda; renewal theory, e.g. Johnson 1996,
        # J Comput Neurosci 3:275, from memory).
        expected = float(np.sum(rate / (1.0 + rate * tau) * dt * in_field))
        if expected < 100:
            continue
        own = spike_t[spike_unit == truth.unit_ids[row]]
        frame = np.searchsorted(t, own, side="right") - 1
        frame = frame[(frame >= 0) & (frame < in_field.size)]
        observed = int(np.count_nonzero(in_field[frame]))
        # scipy.stats.poisson: two-sided 99.9% interval of the count. A dead
        # time only narrows the spread (Fano factor below 1), so this is conservative.
        low, high = stats.poisson.interval(0.999, expected)
        assert low <= observed <= high, (row, observed, expected)
        checked += 1
    assert checked >= 5


def test_inter_spike_intervals_respect_the_refractory_period(arena_run):
    _, messages = arena_run
    spike_t, spike_unit = _spikes(messages)
    fs = SETTINGS.acquisition_rate_hz
    # Spike times are whole samples of the 30 kHz acquisition clock.
    np.testing.assert_allclose(spike_t * fs, np.round(spike_t * fs), atol=1e-6)
    shortest = min(np.diff(spike_t[spike_unit == u]).min() for u in np.unique(spike_unit))
    # Common practice: an absolute refractory period of about 2 ms.
    assert shortest >= SETTINGS.refractory_s - 1e-9


def test_grid_cells_have_the_hexagonal_symmetry_of_the_cosine_model(arena_run):
    session, _ = arena_run
    truth = session.ground_truth()
    rng = np.random.default_rng(0)
    points = rng.uniform(0.0, 90.0, (200, 2))
    for row in np.flatnonzero(np.array(truth.cell_type) == "grid"):
        spacing, theta = truth.grid_spacing_cm[row], truth.grid_orientation_rad[row]
        base = truth.rate_hz(points)[row]
        # Solstad, Moser & Einevoll 2006 (Hippocampus 16:1026): three plane waves
        # 60 degrees apart make a triangular lattice, so the rate repeats one
        # vertex spacing away along the orientation and at 60 and 120 degrees to it.
        for angle in (0.0, np.pi / 3.0, 2.0 * np.pi / 3.0):
            shift = spacing * np.array([np.cos(theta + angle), np.sin(theta + angle)])
            np.testing.assert_allclose(truth.rate_hz(points + shift)[row], base, rtol=1e-9, atol=1e-9)
        # Same model: a vertex fires at the peak rate, the centre of a lattice
        # triangle (spacing / sqrt(3) from a vertex, 30 degrees off the axis) at zero.
        vertex = truth.grid_phase_cm[row]
        hole = vertex + spacing / np.sqrt(3.0) * np.array([np.cos(theta + np.pi / 6), np.sin(theta + np.pi / 6)])
        rates = truth.rate_hz(np.vstack([vertex, hole]))[row]
        np.testing.assert_allclose(rates, [truth.peak_rate_hz[row], 0.0], atol=1e-9)


def test_announced_unit_ids_are_tetrode_style(arena_run):
    session, messages = arena_run
    announce = next(m for m in messages if isinstance(m, SourceAnnounce) and m.source == SPIKE_SOURCE)
    ids = announce.unit_ids
    np.testing.assert_array_equal(ids, session.ground_truth().unit_ids)
    assert ids.min() >= 101 and np.all((ids % 100 >= 1) & (ids % 100 <= SETTINGS.units_per_tetrode))
    camera = next(m for m in messages if isinstance(m, SourceAnnounce) and m.source == TRACKER_SOURCE)
    assert announce.clock != camera.clock
    _, spike_unit = _spikes(messages)
    assert set(np.unique(spike_unit)) <= set(ids.tolist())


# -- tracker, clocks and message order -----------------------------------------------


def test_tracker_clock_offset_and_drift_are_recoverable_from_sync_pulses(arena_run):
    _, messages = arena_run
    acq = {m.pulse_id: m.t_s for m in messages if isinstance(m, SyncPulse) and m.source == SPIKE_SOURCE}
    trk = {m.pulse_id: m.t_s for m in messages if isinstance(m, SyncPulse) and m.source == TRACKER_SOURCE}
    assert acq.keys() == trk.keys() and len(acq) >= 150
    ids = sorted(acq)
    intervals = np.diff([acq[i] for i in ids])
    assert intervals.min() >= 0.8 - 1e-4 and intervals.max() <= 1.2 + 1e-4
    # numpy.polyfit as the reference least-squares line t_tracker = offset + (1 + drift) t_acq.
    slope, intercept = np.polyfit([acq[i] for i in ids], [trk[i] for i in ids], 1)
    assert abs((slope - 1.0) * 1e6 - SETTINGS.tracker_drift_ppm) < 3.0
    assert abs(intercept - SETTINGS.tracker_offset_s) < 2e-4


def test_tracker_frames_are_noisy_with_lost_frames_on_their_own_clock(arena_run):
    session, messages = arena_run
    truth = session.ground_truth()
    frames = [m for m in messages if isinstance(m, TrackerFrames) and m.source == TRACKER_SOURCE]
    t_trk = np.concatenate([m.t_s for m in frames])
    xy = np.concatenate([m.xy_cm for m in frames])
    quality = np.concatenate([m.quality for m in frames])
    assert np.all(np.diff(t_trk) > 0)
    np.testing.assert_allclose(np.diff(t_trk), 1.0 / SETTINGS.tracker_rate_hz, rtol=1e-9)
    lost = quality == 0
    assert np.all(np.isnan(xy[lost])) and np.all(np.isfinite(xy[~lost]))
    # 1% random losses plus dropouts of 0.1-0.5 s every ~60 s.
    assert 0.005 < lost.mean() < 0.05
    t_acq = (t_trk - truth.tracker_offset_s) / (1.0 + truth.tracker_drift_ppm * 1e-6)
    true_t, true_xy = _truth(messages)
    ref = np.column_stack([np.interp(t_acq, true_t, true_xy[:, i]) for i in (0, 1)])
    err = (xy - ref)[~lost & (t_acq < true_t[-1])]
    # numpy's sample standard deviation against the configured 0.5 cm noise,
    # within a few percent for tens of thousands of frames.
    np.testing.assert_allclose(err.std(axis=0), SETTINGS.tracker_noise_cm, rtol=0.05)


def test_each_source_is_in_data_time_order_with_consecutive_seq(arena_run):
    _, messages = arena_run
    assert [type(m) for m in messages[:3]] == [SourceAnnounce] * 3
    for source in (SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE):
        own = [m for m in messages if m.source == source]
        assert [m.seq for m in own] == list(range(len(own)))
        times = np.concatenate([np.atleast_1d(m.t_s) for m in own if not isinstance(m, SourceAnnounce)])
        assert np.all(np.diff(times) >= 0), source
    kinds = {(type(m), m.source) for m in messages}
    # Heartbeats come from the spike source only: PROTOCOL.md asks them of spike sources.
    assert (Heartbeat, SPIKE_SOURCE) in kinds
    assert not {(Heartbeat, s) for s in (TRACKER_SOURCE, TRUTH_SOURCE)} & kinds


def test_position_heartbeats_come_when_asked():
    settings = dataclasses.replace(SETTINGS, position_heartbeats=True)
    chunks = list(SimulatedSession(TRACK, settings, seed=3).chunks(until_s=0.2))
    for chunk in chunks[1:]:
        beats = {m.source for m in chunk.messages if isinstance(m, Heartbeat)}
        assert beats == {SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE}
    with pytest.raises(ValueError, match="position_heartbeats"):
        SimulationSettings.from_dict({"position_heartbeats": 1})


def test_heartbeats_every_tick_and_generation_in_chunks():
    session = SimulatedSession(TRACK, SETTINGS, seed=3)
    chunks = list(session.chunks(until_s=1.0))
    assert chunks[0].t_end_s == 0.0 and all(isinstance(m, SourceAnnounce) for m in chunks[0].messages)
    ends = np.array([c.t_end_s for c in chunks[1:]])
    np.testing.assert_allclose(np.diff(ends), SETTINGS.tick_s)
    assert ends[-1] == pytest.approx(1.0)
    for chunk in chunks[1:]:
        beats = [m for m in chunk.messages if isinstance(m, Heartbeat) and m.source == SPIKE_SOURCE]
        assert len(beats) == 1 and beats[0].t_s == pytest.approx(chunk.t_end_s)


def test_a_seed_gives_the_same_session_however_it_is_split():
    settings = dataclasses.replace(SETTINGS, n_place_cells=5)
    whole = list(SimulatedSession(ARENA, settings, seed=7).messages(until_s=4.0))
    session = SimulatedSession(ARENA, settings, seed=7)
    parts = list(session.messages(until_s=1.5)) + list(session.messages(until_s=4.0))
    assert len(whole) == len(parts)
    for a, b in zip(whole, parts):
        assert type(a) is type(b) and a.source == b.source and a.seq == b.seq
        if isinstance(a, (SpikeBatch, TrackerFrames)):
            np.testing.assert_array_equal(a.t_s, b.t_s)
    other = list(SimulatedSession(ARENA, settings, seed=8).messages(until_s=4.0))
    assert _spikes(other)[0].size != _spikes(whole)[0].size or not np.array_equal(_spikes(other)[0], _spikes(whole)[0])
