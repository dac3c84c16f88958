"""Tests for decoder.session.triggers: rules, safety caps and the armed state.

Each test drives a TriggerBank with a hand-written list of StepInput and
checks every output. The rules under test are the documented semantics in
decoder/session/triggers.py; where a behaviour is a convention of closed-loop rigs
rather than a published result it is marked "common practice".
"""

import math

import numpy as np
import pytest

from decoder.session.triggers import (
    SafetyCaps,
    SessionCapError,
    StepInput,
    TriggerBank,
    TriggerEvent,
    TriggerRule,
)

STEP_S = 0.025
NAN_XY = (math.nan, math.nan)


def step(t_s, mass=0.0, *, map_in=None, xy=(5.0, 5.0), in_zone=False, speed=10.0, lag=0.01):
    """One step for a single-zone bank: posterior mass, MAP and tracked state."""
    return StepInput(
        t_s=t_s,
        zone_mass=[mass],
        map_zone=[mass >= 0.5 if map_in is None else map_in],
        tracked_xy_cm=xy,
        tracked_in_zone=[in_zone],
        tracked_speed_cm_s=speed,
        stream_lag_s=lag,
    )


def run(bank, masses, t0=0.0, **kwargs):
    """Feed masses at 25-ms steps from ``t0``; return the events and the next time."""
    events = []
    t = t0
    for mass in masses:
        t += STEP_S
        events += bank.step(step(t, mass, **kwargs))
    return events, t


def bank_for(rule=None, caps=None, armed_at=0.0):
    bank = TriggerBank([rule or TriggerRule("feed", zone="goal")], zone_names=["goal"], caps=caps)
    if armed_at is not None:
        bank.arm(armed_at)
    return bank


def test_fires_after_k_consecutive_steps_not_before():
    bank = bank_for(TriggerRule("feed", zone="goal", min_mass=0.8, consecutive_steps=3))
    events, _ = run(bank, [0.0, 0.9, 0.9, 0.5, 0.9, 0.9, 0.95])
    # k consecutive steps above threshold (common practice): the dip at step 4
    # restarts the count, so the first event is on the 3rd step of the second run.
    assert len(events) == 1
    assert events[0].t_s == pytest.approx(7 * STEP_S)
    assert events[0].zone_mass == pytest.approx(0.95)
    assert events[0].event_id == 1 and events[0].rule == "feed" and events[0].zone == "goal"


def test_threshold_is_inclusive():
    bank = bank_for(TriggerRule("feed", zone="goal", min_mass=0.8, consecutive_steps=1))
    events, _ = run(bank, [0.0, 0.8])
    assert len(events) == 1


def test_one_event_per_entry_and_rearm_on_exit():
    caps = SafetyCaps(refractory_s=0.01)
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=2), caps)
    dwell = [0.0] + [0.9] * 40
    events, t = run(bank, dwell)
    # Re-arm on exit (common practice): a long dwell gives one event, not one per step.
    assert len(events) == 1
    more, _ = run(bank, [0.1, 0.9, 0.9], t0=t)
    # Leaving the zone for one step and coming back is a new entry.
    assert len(more) == 1 and more[0].event_id == 2


def test_arming_never_fires_on_a_position_already_held():
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=2), armed_at=None)
    run(bank, [0.9, 0.9])
    bank.arm(0.06)
    events, t = run(bank, [0.9] * 10, t0=0.06)
    assert events == []
    events, _ = run(bank, [0.0, 0.9, 0.9], t0=t)
    assert len(events) == 1


def test_map_mode_uses_the_map_bin():
    bank = bank_for(TriggerRule("feed", zone="goal", mode="map", consecutive_steps=2))
    events = []
    for i, map_in in enumerate([False, True, True]):
        events += bank.step(step((i + 1) * STEP_S, 0.3, map_in=map_in))
    # The mass (0.3) is far below min_mass; only the MAP bin counts in "map" mode.
    assert len(events) == 1 and events[0].map_in_zone


def test_refractory_is_global_across_rules_and_in_data_time():
    rules = [TriggerRule("a", zone="left", consecutive_steps=1), TriggerRule("b", zone="right", consecutive_steps=1)]
    bank = TriggerBank(rules, zone_names=["left", "right"], caps=SafetyCaps(refractory_s=2.0))
    bank.arm(0.0)

    def two(t, left, right):
        return StepInput(t, [left, right], [False, False], (1.0, 1.0), [False, False], 10.0, 0.0)

    out = bank.step(two(0.5, 0.0, 0.0))
    out += bank.step(two(1.0, 0.9, 0.0))
    out += bank.step(two(1.5, 0.0, 0.9))  # other rule, 0.5 s later: refractory
    out += bank.step(two(2.9, 0.9, 0.0))  # 1.9 s after the event: refractory
    out += bank.step(two(3.0, 0.0, 0.9))  # exactly 2.0 s: allowed
    # One animal, one reward line (common practice): the refractory interval spans all rules.
    assert [(e.rule, e.t_s) for e in out] == [("a", 1.0), ("b", 3.0)]
    assert bank.counters["refractory"] == 2


def test_only_one_event_per_step():
    rules = [
        TriggerRule("a", zone="z", consecutive_steps=1),
        TriggerRule("b", zone="z", mode="map", consecutive_steps=1),
    ]
    bank = TriggerBank(rules, zone_names=["z"])
    bank.arm(0.0)
    bank.step(step(0.5, 0.0))
    events = bank.step(step(1.0, 0.9))
    assert [e.rule for e in events] == ["a"]
    assert bank.counters["refractory"] == 1


def test_per_minute_cap_is_a_sliding_window_in_data_time():
    caps = SafetyCaps(refractory_s=1.0, max_per_minute=3)
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=1), caps)
    fired = []
    for t in np.arange(1.0, 90.0, 5.0):  # an entry every 5 s
        fired += bank.step(step(t, 0.0))
        fired += bank.step(step(t + 0.5, 0.9))
    times = [e.t_s for e in fired]
    # Worked by hand: entries at 1.5, 6.5, 11.5 fire; the window (t - 60, t]
    # then holds 3 events until 61.5 s, when 1.5 leaves it; 61.5, 66.5 and
    # 71.5 fire as 1.5, 6.5 and 11.5 leave; 76.5 to 86.5 find 3 in the window.
    assert times == [1.5, 6.5, 11.5, 61.5, 66.5, 71.5]
    for t in times:
        assert sum(t - 60.0 < u <= t for u in times) <= 3
    assert bank.counters["per_minute_cap"] == 9 + 3  # 16.5 ... 56.5, then 76.5 ... 86.5


def test_session_cap_disarms_for_good():
    caps = SafetyCaps(refractory_s=0.01, max_per_minute=100, max_per_session=3)
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=1), caps)
    events, t = run(bank, [0.0, 0.9] * 6)
    assert [e.event_id for e in events] == [1, 2, 3]
    assert not bank.armed and bank.disarm_reason == "session_cap"
    assert bank.counters["session_cap"] == 3
    with pytest.raises(SessionCapError, match="session cap of 3"):
        bank.arm(t)
    assert run(bank, [0.0, 0.9], t0=t)[0] == []


def test_stall_disarms_until_armed_again():
    caps = SafetyCaps(refractory_s=0.1, stall_limit_s=0.5)
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=1), caps)
    assert bank.step(step(1.0, 0.0, lag=0.6)) == []
    assert not bank.armed and bank.disarm_reason == "stall" and bank.n_stalls == 1
    # Streams recover, but the bank stays disarmed: a human or script must re-arm.
    events, t = run(bank, [0.9, 0.0, 0.9], t0=1.0)
    assert events == [] and bank.counters["disarmed"] == 2
    bank.arm(t)
    events, _ = run(bank, [0.0, 0.9], t0=t)
    assert len(events) == 1


def test_unknown_lag_counts_as_a_stall():
    bank = bank_for()
    bank.step(step(1.0, 0.0, lag=math.nan))
    assert bank.disarm_reason == "stall"


def test_outside_rule_for_a_non_local_representation():
    rule = TriggerRule("remote", zone="goal", consecutive_steps=2, tracked="outside")
    bank = bank_for(rule)
    inside, _ = run(bank, [0.0, 0.9, 0.9, 0.9], in_zone=True)
    # The decoded position is in the goal while the animal is there too: a local representation, no event.
    assert inside == []
    bank2 = bank_for(rule)
    away, _ = run(bank2, [0.0, 0.9, 0.9], in_zone=False, xy=(80.0, 80.0))
    assert len(away) == 1 and away[0].tracked_xy_cm == (80.0, 80.0)


def test_inside_rule_needs_the_animal_in_the_zone():
    bank = bank_for(TriggerRule("here", zone="goal", consecutive_steps=1, tracked="inside"))
    assert run(bank, [0.0, 0.9], in_zone=False)[0] == []
    assert len(run(bank, [0.0, 0.9], t0=5.0, in_zone=True)[0]) == 1


@pytest.mark.parametrize("tracked", ["inside", "outside"])
def test_lost_tracked_position_never_satisfies_a_tracked_condition(tracked):
    bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1, tracked=tracked))
    for t0, in_zone in ((0.0, True), (5.0, False)):
        events, _ = run(bank, [0.0, 0.9, 0.0, 0.9], t0=t0, xy=NAN_XY, in_zone=in_zone)
        assert events == []


def test_unknown_speed_never_satisfies_a_speed_condition():
    for bounds in ({"min_speed_cm_s": 2.0}, {"max_speed_cm_s": 5.0}):
        bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1, **bounds))
        assert run(bank, [0.0, 0.9], speed=math.nan)[0] == []


def test_speed_bounds_are_inclusive():
    bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1, min_speed_cm_s=2.0, max_speed_cm_s=5.0))
    assert run(bank, [0.0, 0.9], speed=1.9)[0] == []
    assert run(bank, [0.0, 0.9], t0=3.0, speed=6.0)[0] == []
    assert len(run(bank, [0.0, 0.9], t0=6.0, speed=2.0)[0]) == 1
    assert len(run(bank, [0.0, 0.9], t0=9.0, speed=5.0)[0]) == 1


def test_any_rule_fires_while_tracking_is_lost():
    bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1))
    events, _ = run(bank, [0.0, 0.9], xy=NAN_XY)
    assert len(events) == 1 and all(math.isnan(v) for v in events[0].tracked_xy_cm)


def test_nan_mass_never_fires():
    bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1, min_mass=0.1))
    assert run(bank, [0.0, math.nan, math.nan])[0] == []


def test_disarmed_bank_never_fires():
    bank = bank_for(TriggerRule("r", zone="goal", consecutive_steps=1), armed_at=None)
    assert not bank.armed and bank.disarm_reason == "startup"
    events, t = run(bank, [0.0, 0.9] * 20)
    assert events == [] and bank.counters["disarmed"] == 20
    bank.arm(t)
    bank.disarm(t + 0.01, "operator")
    assert run(bank, [0.0, 0.9] * 5, t0=t + 0.01)[0] == []
    assert bank.status()["disarm_reason"] == "operator"


def test_caps_cannot_be_switched_off():
    # The loosest rule possible still sits beneath the default caps.
    greedy = TriggerRule("greedy", zone="goal", min_mass=1e-9, consecutive_steps=1)
    bank = TriggerBank([greedy], zone_names=["goal"])
    bank.arm(0.0)
    events, _ = run(bank, [0.0, 0.5] * 2400)  # two minutes of entries every 50 ms
    gaps = np.diff([e.t_s for e in events])
    assert np.all(gaps >= SafetyCaps().refractory_s - 1e-9)
    assert len(events) <= 2 * SafetyCaps().max_per_minute
    for bad in (
        {"refractory_s": 0},
        {"refractory_s": -1.0},
        {"refractory_s": math.inf},
        {"max_per_minute": 0},
        {"max_per_session": None},
        {"stall_limit_s": math.nan},
        {"max_per_minute": 2.5},
    ):
        with pytest.raises(ValueError, match="safety caps"):
            SafetyCaps(**bad)
    with pytest.raises(ValueError, match="SafetyCaps"):
        TriggerBank([greedy], zone_names=["goal"], caps={"refractory_s": 0})
    assert not hasattr(greedy, "refractory_s")


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"name": ""}, "non-empty name"),
        ({"zone": ""}, "zone must be"),
        ({"mode": "peak"}, "mode must be one of"),
        ({"tracked": "near"}, "tracked must be one of"),
        ({"min_mass": 0.0}, r"min_mass must be in \(0, 1\]"),
        ({"min_mass": 1.5}, r"min_mass must be in \(0, 1\]"),
        ({"consecutive_steps": 0}, "consecutive_steps"),
        ({"min_speed_cm_s": -1.0}, "non-negative"),
        ({"min_speed_cm_s": 5.0, "max_speed_cm_s": 2.0}, "must not exceed"),
    ],
)
def test_bad_rules_say_what_is_wrong(kwargs, message):
    with pytest.raises(ValueError, match=message):
        TriggerRule(**{"name": "r", "zone": "goal", **kwargs})


def test_bank_checks_its_inputs():
    rule = TriggerRule("r", zone="goal")
    with pytest.raises(ValueError, match="refers to zone 'goal'"):
        TriggerBank([rule], zone_names=["start"])
    with pytest.raises(ValueError, match="unique; repeated: r"):
        TriggerBank([rule, rule], zone_names=["goal"])
    bank = bank_for(rule)
    with pytest.raises(ValueError, match="2 zone values but the bank has 1"):
        bank.step(StepInput(1.0, [0.1, 0.2], [False, False], (0, 0), [False, False], 1.0, 0.0))
    with pytest.raises(ValueError, match="one value per zone"):
        StepInput(1.0, [0.1], [False, True], (0, 0), [False], 1.0, 0.0)
    with pytest.raises(ValueError, match="finite data time"):
        step(math.nan)


def test_status_and_event_are_plain_data():
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=1))
    (event,) = run(bank, [0.0, 0.9])[0]
    assert isinstance(event, TriggerEvent)
    assert event.to_dict() == {
        "event_id": 1,
        "rule": "feed",
        "zone": "goal",
        "t_s": 2 * STEP_S,
        "zone_mass": 0.9,
        "tracked_xy_cm": [5.0, 5.0],
        "map_in_zone": True,
    }
    status = bank.status()
    assert status["armed"] and status["n_events"] == 1 and status["session_events_left"] == 199
    assert set(status["counters"]) == {"disarmed", "refractory", "per_minute_cap", "session_cap"}


def test_time_going_back_disarms_and_keeps_the_caps():
    caps = SafetyCaps(refractory_s=2.0, max_per_minute=2)
    bank = bank_for(TriggerRule("feed", zone="goal", consecutive_steps=1), caps)
    fired = run(bank, [0.0, 0.9])[0]
    fired += bank.step(step(5.0, 0.0)) + bank.step(step(5.5, 0.9))
    assert len(fired) == 2
    # The acquisition restarts its clock: data time jumps back to 0.1 s.
    bank.step(step(0.1, 0.0))
    assert not bank.armed and bank.disarm_reason == "time_reversal"
    assert bank.status()["n_time_reversals"] == 1
    bank.arm(0.1)
    # Both recent events now count as just happened at 0.1 s: refractory
    # until 2.1 s, and the per-minute window stays full until 60.1 s.
    assert bank.step(step(0.5, 0.0)) + bank.step(step(1.0, 0.9)) == []
    assert bank.counters["refractory"] == 1
    assert bank.step(step(1.5, 0.0)) + bank.step(step(2.5, 0.9)) == []
    assert bank.counters["per_minute_cap"] == 1
    assert len(bank.step(step(60.0, 0.0)) + bank.step(step(60.2, 0.9))) == 1


def test_disarm_always_succeeds():
    bank = bank_for()
    bank.disarm(-math.inf, "")
    assert not bank.armed and bank.disarm_reason == "unspecified"
    with pytest.raises(ValueError, match="finite data time"):
        bank.arm(math.nan)
    assert not bank.armed


def test_bank_without_rules_never_fires():
    bank = TriggerBank([], zone_names=["goal"])
    bank.arm(0.0)
    assert run(bank, [0.0, 1.0, 1.0])[0] == []
    assert sum(bank.counters.values()) == 0
