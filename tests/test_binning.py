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


def test_window_counts_kernel_matches_its_numpy_twin():
    # Twin check (common practice here): the compiled kernel and the plain numpy one agree exactly.
    from decoder.binning import window_counts, window_counts_numpy

    rng = np.random.default_rng(4)
    t = np.sort(rng.uniform(0, 2, 500))
    rows = rng.integers(0, 30, t.size).astype(np.int64)
    for start, stop, t_end in [(0, 500, 1.0), (100, 400, 0.7), (0, 0, 1.0), (250, 500, 1.99), (0, 500, -1.0)]:
        a = window_counts(t, rows, start, stop, t_end, 0.2, 30)
        b = window_counts_numpy(t, rows, start, stop, t_end, 0.2, 30)
        for x, y in zip(a, b):
            assert x.dtype == y.dtype
            np.testing.assert_array_equal(x, y)


def test_window_survives_many_compactions_and_late_batches():
    rng = np.random.default_rng(5)
    n_units, window_s = 7, 0.2
    win = SpikeWindow(n_units, window_s)
    held_t, held_rows = np.zeros(0), np.zeros(0, np.int64)
    for k in range(1, 2000):
        t = np.sort(rng.uniform((k - 1) * 0.02, k * 0.02, rng.integers(0, 40)))
        if k % 7 == 0:
            t = t - 0.03          # a late batch, older than spikes already held
        rows = rng.integers(0, n_units, t.size)
        win.add(t, rows)
        held_t, held_rows = np.concatenate([held_t, t]), np.concatenate([held_rows, rows])
        fired, counts = win.counts(k * 0.02 - 0.05)
        dense = np.zeros(n_units)
        dense[fired] = counts
        np.testing.assert_array_equal(dense, _reference_counts(held_t, held_rows, k * 0.02 - 0.05, window_s, n_units))
        win.discard_before(k * 0.02 - 0.05 - window_s)
        keep = held_t > k * 0.02 - 0.05 - window_s
        held_t, held_rows = held_t[keep], held_rows[keep]
    assert len(win) == held_t.size


def test_rows_of_units_kernel_matches_its_numpy_twin():
    # Twin check (common practice here): ids inside, below and above the table, and ids the table lacks.
    from decoder.binning import rows_of_units, rows_of_units_numpy

    table = np.array([3, -1, 0, 1, -1, 2], np.int64)      # units 10..15
    ids = np.array([10, 11, 12, 9, 16, 15, 13, -4, 10], np.int64)
    rows, n_unknown = rows_of_units(ids, table, 10)
    twin_rows, twin_unknown = rows_of_units_numpy(ids, table, 10)
    np.testing.assert_array_equal(rows, twin_rows)
    assert rows.tolist() == [3, -1, 0, -1, -1, 2, 1, -1, 3] and n_unknown == twin_unknown == 4
    assert rows_of_units(np.zeros(0, np.int64), table, 10)[0].size == 0
