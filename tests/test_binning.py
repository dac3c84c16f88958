"""Window binning and step scheduling (decoder.binning)."""

import numpy as np
import pytest

from decoder.binning import SpikeWindow, StepSchedule


def _reference_counts(t, rows, t_end, window_s, n_units):
    # Reference: numpy.histogram over units for the spikes in (t_end - W, t_end].
    inside = (t > t_end - window_s) & (t <= t_end)
    return np.histogram(rows[inside], bins=np.arange(n_units + 1))[0]


def test_window_counts_match_numpy_histogram_for_batches_in_any_order():
    rng = np.random.default_rng(1)
    n_units, window_s = 20, 0.2
    t = np.sort(rng.uniform(0, 5, 3000))
    rows = rng.integers(0, n_units, t.size)
    win = SpikeWindow(n_units, window_s)
    # Batches arrive out of order: the second half first, then the first half.
    half = t.size // 2
    win.add(t[half:], rows[half:])
    win.add(t[:half], rows[:half])
    for t_end in np.arange(0.2, 5.0, 0.37):
        fired, counts = win.counts(t_end)
        dense = np.zeros(n_units)
        dense[fired] = counts
        np.testing.assert_array_equal(dense, _reference_counts(t, rows, t_end, window_s, n_units))


def test_discard_keeps_what_later_windows_need():
    win = SpikeWindow(3, 0.1)
    win.add(np.array([0.05, 0.15, 0.25]), np.array([0, 1, 2]))
    win.discard_before(0.15)
    assert len(win) == 1
    fired, counts = win.counts(0.3)
    assert fired.tolist() == [2] and counts.tolist() == [1.0]


def test_window_is_half_open_on_the_left():
    win = SpikeWindow(1, 0.1)
    win.add(np.array([0.1, 0.2]), np.array([0, 0]))
    # (0.1, 0.2] holds the spike at 0.2 only.
    assert win.counts(0.2)[1].tolist() == [1.0]


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


def test_bad_window_settings_are_refused():
    with pytest.raises(ValueError, match="n_units"):
        SpikeWindow(0, 0.2)
    with pytest.raises(ValueError, match="window_s"):
        SpikeWindow(3, 0.0)
