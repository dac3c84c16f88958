"""Window binning and step scheduling (decoder.inference.binning)."""

import numpy as np
import pytest

from decoder.inference.binning import SpikeWindow, StepSchedule


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


def test_decoding_a_window_forgets_what_is_older_than_it():
    from decoder.inference.decoding import BayesDecoder
    from decoder.space.environments import LinearTrack

    env = LinearTrack((0, 0), (30, 0), bin_cm=10)
    decoder = BayesDecoder(np.array([[1.0, 5.0, 9.0]] * 3), env, np.ones(3, bool), window_s=0.1)
    win = SpikeWindow(3, 0.1)
    win.add(np.array([0.05, 0.15, 0.25]), np.array([0, 1, 2]))
    assert win.decode(decoder, 0.2).n_spikes == 1 and len(win) == 2
    assert win.decode(decoder, 0.3).n_spikes == 1 and len(win) == 1


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
    from decoder.inference.binning import window_counts, window_counts_numpy

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


def test_append_known_spikes_kernel_matches_its_numpy_twin():
    # Twin check (common practice here): ids inside, below and above the table, ids the table lacks, late spikes.
    from decoder.inference.binning import append_known_spikes, append_known_spikes_numpy

    table = np.array([3, -1, 0, 1, -1, 2], np.int64)      # units 10..15
    ids = np.array([10, 11, 12, 9, 16, 15, 13, -4, 10], np.int64)
    t = np.linspace(0.9, 1.3, ids.size)
    results = []
    for kernel in (append_known_spikes, append_known_spikes_numpy):
        held_t, held_rows = np.full(20, -7.0), np.full(20, -7, np.int64)
        stop, n_unknown, n_late = kernel(t, ids, table, 10, 1.0, held_t, held_rows, 3)
        results.append((stop, n_unknown, n_late, held_t.tolist(), held_rows.tolist()))
    assert results[0] == results[1]
    stop, n_unknown, n_late, held_t, held_rows = results[0]
    assert (stop, n_unknown) == (8, 4)
    assert held_rows[3:8] == [3, 0, 2, 1, 3] and held_rows[:3] == [-7] * 3 and held_rows[8:] == [-7] * 12
    assert held_t[3:8] == [t[0], t[2], t[5], t[6], t[8]]
    assert n_late == int(np.count_nonzero(t[[0, 2, 5, 6, 8]] <= 1.0))


def test_adding_by_unit_id_equals_adding_rows():
    # Two ways into the window (unit ids through a table, rows directly) must hold the same spikes.
    rng = np.random.default_rng(8)
    table = np.array([-1, 0, 1, 2, -1, 3], np.int64)      # units 5..10; 5 and 9 have no row
    by_id, by_row = SpikeWindow(4, 0.2), SpikeWindow(4, 0.2)
    late_total = unknown_total = 0
    for k in range(1, 400):
        t = np.sort(rng.uniform((k - 1) * 0.02, k * 0.02, rng.integers(0, 30)))
        if k % 5 == 0:
            t = t - 0.03          # late, and older than spikes already held
        ids = rng.integers(4, 12, t.size).astype(np.int64)
        n_unknown, n_late = by_id.add_units(t, ids, table, 5, (k - 2) * 0.02)
        j = ids - 5
        rows = np.where((j >= 0) & (j < table.size), table[np.clip(j, 0, table.size - 1)], -1)
        known = rows >= 0
        by_row.add(t[known], rows[known])
        assert n_unknown == int(np.count_nonzero(~known))
        assert n_late == int(np.count_nonzero(t[known] <= (k - 2) * 0.02))
        late_total += n_late
        unknown_total += n_unknown
        for window in (by_id, by_row):
            window.discard_before(k * 0.02 - 0.3)
        a, b = by_id.counts(k * 0.02 - 0.01), by_row.counts(k * 0.02 - 0.01)
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
    assert late_total > 0 and unknown_total > 0 and len(by_id) == len(by_row)