"""Judging steps against where the animal was (decoder.session.judge)."""

import math

import numpy as np

from decoder.config import TriggerRule
from decoder.session.judge import StepJudge
from decoder.session.triggers import TriggerEvent
from decoder.space.environments import Arena, LinearTrack
from decoder.space.zones import CircleZone, IntervalZone, zone_masks


def _event(rule, zone):
    return TriggerEvent(1, rule, zone, 10.0, 0.9, (0.0, 0.0), True)


def _arena_judge(margin_cm=5.0):
    arena = Arena.rectangle(100, 100, bin_cm=2)
    zones = (CircleZone("goal", (70.0, 70.0), 10.0),)
    rules = (TriggerRule("reward", "goal"), TriggerRule("probe", "goal", tracked="outside"))
    return StepJudge(arena, zones, zone_masks(list(zones), arena), rules, margin_cm)


def test_error_is_the_euclidean_distance_in_an_arena():
    judge = _arena_judge()
    # Source: Euclidean distance, a 3-4-5 right triangle.
    assert judge.error_cm(np.array([10.0, 20.0]), 13.0, 24.0) == 5.0
    assert math.isnan(judge.error_cm(np.array([10.0, 20.0]), math.nan, math.nan))


def test_error_on_a_track_runs_along_the_track():
    track = LinearTrack((0, 0), (100, 0), bin_cm=5)
    judge = StepJudge(track, (), np.zeros((0, track.n_bins), bool), (), 5.0)
    # Common practice: on a linear track the distance is the one along it; here the same as |dx|.
    assert judge.error_cm(np.array([12.5, 0.0]), 52.5, 0.0) == 40.0


def test_events_far_from_their_zone_are_false_and_near_ones_are_not():
    judge = _arena_judge(margin_cm=5.0)
    assert judge.zone_flags(70.0, 70.0) == [True] and judge.zone_flags(math.nan, math.nan) == [False]
    assert not judge.is_false(_event("reward", "goal"), np.array([70.0, 70.0]))    # inside
    assert not judge.is_false(_event("reward", "goal"), np.array([70.0, 83.0]))    # 3 cm out: within the margin
    assert judge.is_false(_event("reward", "goal"), np.array([20.0, 20.0]))        # far away
    # A rule meant to fire with the animal outside its zone is never judged false.
    assert not judge.is_false(_event("probe", "goal"), np.array([20.0, 20.0]))
    # An unknown or off-map position is not judged.
    assert not judge.is_false(_event("reward", "goal"), np.array([math.nan, math.nan]))
    assert not judge.is_false(_event("reward", "goal"), np.array([-50.0, 20.0]))


def test_near_zone_on_a_track_follows_the_track():
    track = LinearTrack((0, 0), (100, 0), bin_cm=5)
    zones = (IntervalZone("end", 90.0, 100.0),)
    judge = StepJudge(track, zones, zone_masks(list(zones), track), (TriggerRule("r", "end"),), 10.0)
    assert not judge.is_false(_event("r", "end"), np.array([82.5, 0.0]))
    assert judge.is_false(_event("r", "end"), np.array([42.5, 0.0]))
