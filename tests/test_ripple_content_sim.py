"""The simulator's replay content: place cells fire a compressed sequence of the path during each ripple."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.sparse.csgraph import shortest_path

from decoder.messages import SpikeBatch
from decoder.session.replay_content import zone_distances_cm
from decoder.space.environments import Arena, TrackGraph
from decoder.space.zones import CircleZone, zone_masks
from rig_adapters.sim.lfp import LfpSettings, LfpSynth
from rig_adapters.sim.replay_content import TOWARDS_SHARE
from rig_adapters.sim.settings import ReplaySettings, SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession

MAZE = TrackGraph([[0, 0], [60, 0], [120, 0], [0, 80], [60, 80], [120, 80]],
                  [[3, 0], [0, 1], [1, 2], [4, 1], [5, 2]], bin_cm=3.0)
BASE = dict(tick_s=0.02, mean_speed_cm_s=22.0, end_pause_s=[4.0, 10.0], n_place_cells=60,
            place_field_fwhm_cm=[15.0, 35.0], place_peak_hz=[5.0, 20.0], place_baseline_hz=0.1,
            lfp={"ripple_rate_hz": 2.0, "ripple_duration_s": [0.06, 0.1], "rest_speed_cm_s": 4.0})


def _session(replay: dict | None, seed: int = 4) -> tuple[SimulatedSession, np.ndarray, np.ndarray]:
    settings = dict(BASE, replay=replay) if replay is not None else dict(BASE)
    session = SimulatedSession(MAZE, SimulationSettings.from_dict(settings), seed=seed)
    t, u = [], []
    for msg in session.messages(until_s=30.0):
        if isinstance(msg, SpikeBatch):
            t.append(msg.t_s)
            u.append(msg.unit_id)
    return session, np.concatenate(t), np.concatenate(u)


@pytest.fixture(scope="module")
def sessions():
    return _session({"goal_fraction": 0.5}), _session(None)


def test_spikes_outside_ripples_are_unchanged(sessions):
    # The replay draws from a generator of its own: the rest of the session is the same, spike for spike.
    (with_replay, t1, u1), (_, t0, u0) = sessions
    ripples = with_replay.lfp.ripples
    assert len(ripples) >= 5

    def outside(t):
        inside = np.zeros(t.size, bool)
        for r in ripples:
            inside |= (t >= r.start_s - 1e-3) & (t <= r.end_s + 1e-3)
        return ~inside

    np.testing.assert_array_equal(t1[outside(t1)], t0[outside(t0)])
    np.testing.assert_array_equal(u1[outside(t1)], u0[outside(t0)])
    assert np.all(np.diff(t1) >= 0)  # still in time order on the wire


def test_replay_follows_its_path_at_ten_to_twenty_times_running_speed(sessions):
    (session, t, u), _ = sessions
    truth = session.ground_truth()
    place = {uid: c for uid, c, kind in zip(truth.unit_ids, truth.field_center_cm, truth.cell_type) if kind == "place"}
    near = []
    for rep in session.replay.replays:
        r = rep.ripple
        length = np.hypot(*np.diff(rep.path_xy_cm, axis=0).T).sum()
        # Path length over the ripple's span is the drawn speed, within two bins of rounding to bin centres.
        assert abs(length - rep.speed_cm_s * (r.end_s - r.start_s)) <= 2 * 1.5 * MAZE.bin_cm
        # 300-600 cm/s: 10-20x a rat's 20-40 cm/s running speed (common practice).
        assert 300.0 <= rep.speed_cm_s <= 600.0
        inside = (t >= r.start_s) & (t <= r.end_s)
        for ti, ui in zip(t[inside], u[inside]):
            if ui in place:
                near.append(np.hypot(*(place[ui] - rep.position_cm(np.array([ti]))[0])))
    # Replayed spikes come from cells whose field centre lies near the replayed position:
    # most within two field widths (fields of 15-35 cm full width at half maximum).
    assert np.median(near) < 25.0


def test_goal_replays_end_at_the_goal(sessions):
    (session, _, _), _ = sessions
    goal = np.array(session.settings.replay.goal_cm)
    for rep in session.replay.replays:
        if rep.to_goal:
            assert np.hypot(*(rep.path_xy_cm[-1] - goal)) <= MAZE.bin_cm


def test_the_content_a_replay_has_is_measured_along_the_track_as_the_rules_measure_it(sessions):
    # Distances along the maze from scipy's shortest paths over its nodes (an independent reference):
    # a point on the edge (a, b) is min(|p - a| + D[a, goal], |p - b| + D[b, goal]) from the goal node.
    (session, _, _), _ = sessions
    nodes = np.array([[0, 0], [60, 0], [120, 0], [0, 80], [60, 80], [120, 80]], float)
    edges = [[3, 0], [0, 1], [1, 2], [4, 1], [5, 2]]
    weights = np.zeros((6, 6))
    for a, b in edges:
        weights[a, b] = weights[b, a] = np.hypot(*(nodes[a] - nodes[b]))
    to_goal_node = shortest_path(weights, directed=False)[:, 3]  # the goal well (0, 80) is node 3

    def along(p):
        best = np.inf
        for a, b in edges:
            ab = nodes[b] - nodes[a]
            u = np.dot(p - nodes[a], ab) / np.dot(ab, ab)
            if -1e-9 <= u <= 1 + 1e-9 and abs(ab[0] * (p - nodes[a])[1] - ab[1] * (p - nodes[a])[0]) < 1e-6 * np.linalg.norm(ab):
                best = min(best, np.hypot(*(p - nodes[a])) + to_goal_node[a], np.hypot(*(p - nodes[b])) + to_goal_node[b])
        return best

    goal_bin = MAZE.bin_index(np.array([session.settings.replay.goal_cm]))[0]
    goal_mask = np.zeros((1, MAZE.n_bins), bool)
    goal_mask[0, goal_bin] = True
    rule_distance = zone_distances_cm(MAZE, goal_mask)[0]  # what the towards / away rules measure
    replays = session.replay.replays
    assert any(r.towards_goal and not r.to_goal for r in replays)  # a random path may move towards the goal
    for rep in replays:
        ends = rep.path_xy_cm[[0, -1]]
        offset = along(MAZE.bin_centers_cm[goal_bin])  # the goal bin's centre lies within a bin of the node
        for d_sim, p in zip(rep.goal_distance_cm, ends):
            assert d_sim == pytest.approx(along(p) - offset, abs=1e-6)
            assert d_sim == pytest.approx(rule_distance[MAZE.bin_index(p[None])[0]], abs=1e-6)
        first, last = rep.goal_distance_cm
        assert rep.towards_goal == (first - last >= TOWARDS_SHARE * rep.length_cm > 0)
        if rep.to_goal:
            assert rep.towards_goal


def test_a_zone_of_one_bins_radius_at_the_goal_is_the_goal_bin_the_truth_measures_from(sessions):
    # bench/ripples.py's goal zone: a circle of one bin's radius at the well. Its only bin is the one the
    # simulator measures every replay's goal distance from, so the rule's distance is the truth's (the
    # geometry of the maze: the 80 cm arm holds 27 bins of 80/27 cm, the last one's centre half of one
    # from the arm's end).
    (session, _, _), _ = sessions
    mask = zone_masks([CircleZone("goal", tuple(session.settings.replay.goal_cm), MAZE.bin_cm)], MAZE)
    assert np.flatnonzero(mask[0]).tolist() == MAZE.bin_index(np.array([[0.0, 80.0]])).tolist()
    np.testing.assert_allclose(MAZE.bin_centers_cm[mask[0]], [[0.0, 80.0 - 40.0 / 27.0]], atol=1e-9)
    distance = zone_distances_cm(MAZE, mask)[0]
    for rep in session.replay.replays:
        for d_sim, p in zip(rep.goal_distance_cm, rep.path_xy_cm[[0, -1]]):
            assert d_sim == pytest.approx(distance[MAZE.bin_index(p[None])[0]], abs=1e-6)


def test_bad_replay_settings_say_what_is_wrong():
    with pytest.raises(ValueError, match="speed_cm_s"):
        ReplaySettings(speed_cm_s=(0.0, 10.0))
    with pytest.raises(ValueError, match="unknown key"):
        ReplaySettings.from_dict({"speed": 3})
    with pytest.raises(ValueError, match="simulation.lfp"):
        SimulationSettings.from_dict(dict(BASE, lfp=None, replay={}))
    with pytest.raises(ValueError, match="track or maze"):
        SimulatedSession(Arena.circle((45, 45), 45, bin_cm=3), SimulationSettings.from_dict(dict(BASE, replay={})), 1)
    with pytest.raises(ValueError, match="off the track"):
        SimulatedSession(MAZE, SimulationSettings.from_dict(dict(BASE, replay={"goal_cm": [30, 40]})), 1)


def test_an_lfp_that_starts_at_rest_draws_ripples_from_the_start():
    settings = LfpSettings(rate_hz=1500.0, n_channels=2)
    synth = LfpSynth(settings, [7, 14])
    synth.block(np.zeros(int(1500.0 * 60)))  # a minute at rest, no run before it
    starts = np.array([r.start_s for r in synth.ripples])
    # A Poisson train at ripple_rate_hz (0.8 Hz) after rest_settle_s (0.5 s): about 48 ripples in the
    # minute less their durations and gaps; the first after the settling time, none before it.
    assert starts.size >= 25
    assert settings.rest_settle_s <= starts[0] < 10.0
