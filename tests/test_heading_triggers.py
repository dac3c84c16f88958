"""Triggers on heading: arcs as zones under the same rules and the same caps (decoder.session.triggers, judge)."""

import math

import numpy as np
import pytest

from decoder.config import SafetyCaps, TriggerRule
from decoder.session.judge import StepJudge
from decoder.session.triggers import StepInput, TriggerBank
from decoder.space.headings import HeadingRing, heading_point
from decoder.space.zones import ArcZone, zone_masks

RING = HeadingRing(6.0)
GOAL = ArcZone("goal", center_deg=90.0, half_width_deg=30.0)
MASKS = zone_masks([GOAL], RING)


def _posterior(heading_deg, kappa=40.0):
    theta = np.radians(RING.bin_centers_deg)
    p = np.exp(kappa * (np.cos(theta - math.radians(heading_deg)) - 1.0))
    return p / p.sum()


def _step(t_s, decoded_deg, tracked_deg):
    post = _posterior(decoded_deg)
    x, y = heading_point(math.radians(tracked_deg))
    return StepInput(t_s, MASKS @ post, MASKS[:, int(post.argmax())], np.array([x, y]),
                     np.array([GOAL.contains_point(x, y)]), 0.0, 0.0)


def _run(rules, decoded, tracked, caps=SafetyCaps(refractory_s=2.0)):
    bank = TriggerBank(rules, ["goal"], caps)
    bank.arm(0.0)
    events = []
    for k, (d, h) in enumerate(zip(decoded, tracked)):
        events += bank.step(_step(0.02 * (k + 1), d, h))
    return events


def test_mass_in_an_arc_for_k_steps():
    rule = TriggerRule("face_goal", "goal", mode="mass", min_mass=0.6, consecutive_steps=3)
    # Decoded at 90 deg: mass in 60..120 far above 0.6 (kappa 40: s.d. about 9 deg, common practice
    # for the von Mises' normal approximation, 1/sqrt(kappa) rad).
    events = _run([rule], [200.0, 90.0, 92.0, 95.0, 96.0], [90.0] * 5)
    assert [round(e.t_s, 2) for e in events] == [0.08]
    # Two steps in the arc are not three.
    assert _run([rule], [200.0, 90.0, 92.0, 200.0, 90.0], [90.0] * 5) == []


def test_map_in_the_arc_while_the_head_faces_away():
    rule = TriggerRule("compass_leads", "goal", mode="map", consecutive_steps=5, tracked="outside")
    # An armed bank needs an entry into the condition (decoder.session.triggers): one step outside first.
    decoded = [200.0] + [100.0] * 6
    # The head faces the goal: no event; it faces away (270 deg): one, after five steps.
    assert _run([rule], decoded, [100.0] * 7) == []
    events = _run([rule], decoded, [270.0] * 7)
    assert len(events) == 1 and events[0].rule == "compass_leads"
    # Judged never false by design: the head faces away on purpose.
    judge = StepJudge(RING, (GOAL,), MASKS, (rule,), false_margin_cm=45.0)
    assert not judge.is_false(events[0], np.array(heading_point(math.radians(270.0))))


def test_caps_beneath_heading_rules_and_false_events_by_degrees():
    rule = TriggerRule("face_goal", "goal", mode="mass", min_mass=0.6, consecutive_steps=1)
    # Into the arc every 0.5 s for 3 s (entries at 0.12, 0.62, ... s): a 1.9 s refractory interval
    # lets the first and the one 2 s later through, and no other.
    decoded = ([200.0] * 5 + [90.0] * 20) * 6
    events = _run([rule], decoded, [90.0] * len(decoded), SafetyCaps(refractory_s=1.9))
    assert [round(e.t_s, 2) for e in events] == [0.12, 2.12]
    judge = StepJudge(RING, (GOAL,), MASKS, (rule,), false_margin_cm=45.0)
    # The true heading 60 deg outside the arc (210 deg) is farther than the 45-degree margin: false;
    # 40 deg outside (160 deg) is within it, and across 0/360 (10 deg is 50 deg outside) false again.
    verdict = [judge.is_false(events[0], np.array(heading_point(math.radians(h)))) for h in (210.0, 160.0, 10.0)]
    assert verdict == [True, False, True]
    # The decoding error is the shortest turn, in degrees.
    error = judge.error_cm(np.array(heading_point(math.radians(350.0))), *heading_point(math.radians(20.0)))
    assert error == pytest.approx(30.0)
