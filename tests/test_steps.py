"""Which steps close when, and spike intake by unit id (decoder.session.steps)."""

import numpy as np
import pytest

from decoder.inference.decoding import BayesDecoder
from decoder.session.steps import MAX_STEPS_PER_MESSAGE, DecodingSteps, StepSchedule
from decoder.space.environments import LinearTrack


def _counters():
    return {"unknown_units": 0, "late_spikes": 0, "steps_skipped": 0}


def _steps(unit_ids, step_s=0.02, lateness_s=0.0):
    track = LinearTrack((0, 0), (60, 0), bin_cm=5)
    rates = np.random.default_rng(0).gamma(0.7, 4.0, (len(unit_ids), track.n_bins)) + 0.01
    decoder = BayesDecoder(rates, track, track.valid_mask, 0.1, prior="state_space", random_walk_sd_cm=5.0)
    return DecodingSteps(decoder, np.array(unit_ids), StepSchedule(step_s, lateness_s), _counters())


def test_steps_close_once_in_order_after_the_lateness():
    sched = StepSchedule(step_s=0.02, allowed_lateness_s=0.005)
    sched.start_at(1.003)
    assert sched.due(1.02) == []          # 1.02 + lateness not reached
    assert sched.due(1.026) == [51]
    assert sched.due(1.026) == []
    assert sched.due(1.1) == [52, 53, 54]
    assert sched.step_end_s(54) == pytest.approx(1.08)


def test_schedule_does_nothing_before_start():
    assert StepSchedule(0.02, 0.0).due(100.0) == []


def test_spikes_go_to_the_row_of_their_unit_whatever_the_ids():
    # Common practice: a rig's unit ids are labels; decoding must not depend on their values or spacing.
    tight, wide = _steps([3, 1, 2]), _steps([3 * 10**12, 10**12, 2 * 10**12])
    rng = np.random.default_rng(1)
    for steps in (tight, wide):
        steps.schedule.start_at(0.0)
    for k in range(1, 60):
        t = np.sort(rng.uniform((k - 1) * 0.02, k * 0.02, rng.integers(0, 8)))
        ids = rng.integers(1, 5, t.size)             # unit 4 is unknown
        tight.take_spikes(t, ids)
        wide.take_spikes(t, ids * 10**12)
        for a, b in zip(*(s.due(k * 0.02) for s in (tight, wide))):
            (ta, sa), (tb, sb) = tight.decode(a), wide.decode(b)
            assert ta == tb and sa.n_spikes == sb.n_spikes
            np.testing.assert_array_equal(sa.posterior, sb.posterior)
    assert tight.counters == wide.counters and tight.counters["unknown_units"] > 0


def test_late_spikes_are_counted_and_still_held():
    steps = _steps([7])
    steps.schedule.start_at(0.0)
    assert steps.due(0.1) == [1, 2, 3, 4, 5]
    steps.take_spikes(np.array([0.05, 0.15]), np.array([7, 7]))
    assert steps.counters["late_spikes"] == 1 and len(steps.window) == 2


def test_a_message_closes_at_most_so_many_steps():
    steps = _steps([7])
    steps.schedule.start_at(0.0)
    ks = steps.due((MAX_STEPS_PER_MESSAGE + 20) * 0.02 + 1e-6)
    assert len(ks) == MAX_STEPS_PER_MESSAGE and ks[-1] == MAX_STEPS_PER_MESSAGE + 20
    assert steps.counters["steps_skipped"] == 20


def test_a_unit_named_twice_feeds_its_last_row_as_before():
    # Our own rule, kept from the lookup table it replaces: the last row given for a unit takes its spikes.
    steps = _steps([4, 9, 4])
    steps.schedule.start_at(0.0)
    steps.take_spikes(np.array([0.01, 0.02]), np.array([4, 9]))
    held_rows = steps.window._row[steps.window._start:steps.window._stop]
    assert held_rows.tolist() == [2, 1]
