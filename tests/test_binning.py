"""Holding spikes for decoding windows (decoder.inference.binning)."""

import numpy as np
import pytest

from decoder.inference.binning import SpikeWindow, append_known_spikes, append_known_spikes_numpy
from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import LinearTrack


def _reference_counts(t, rows, t_end, window_s, n_units):
    # Reference: numpy.histogram over units for the spikes in (t_end - W, t_end].
    inside = (t > t_end - window_s) & (t <= t_end)
    return np.histogram(rows[inside], bins=np.arange(n_units + 1))[0]


def _decoder(n_units, window_s):
    track = LinearTrack((0, 0), (60, 0), bin_cm=5)
    rates = np.random.default_rng(0).gamma(0.7, 4.0, (n_units, track.n_bins)) + 0.01
    return BayesDecoder(rates, track, track.valid_mask, window_s)


def _add(win, t, rows):
    """Rows given as their own unit ids: every spike is known."""
    ids = np.arange(win.n_units, dtype=np.int64)
    return win.add_units(np.asarray(t, np.float64), np.asarray(rows, np.int64), ids, ids, -np.inf)


def _assert_window_decodes_like(win, decoder, reference, t_end, counts):
    # Source: the decoder's contract (a window decodes as its spike counts do), against counts from numpy.
    step = win.decode(decoder, t_end)
    fired = np.flatnonzero(counts)
    expected = reference.decode(fired, counts[fired])
    assert step.n_spikes == int(counts.sum())
    np.testing.assert_array_equal(step.posterior, expected.posterior)


def test_windows_hold_the_histogram_counts_for_batches_in_any_order():
    rng = np.random.default_rng(1)
    n_units, window_s = 20, 0.2
    t = np.sort(rng.uniform(0, 5, 3000))
    rows = rng.integers(0, n_units, t.size)
    win = SpikeWindow(n_units, window_s)
    # Batches arrive out of order: the second half first, then the first half.
    half = t.size // 2
    _add(win, t[half:], rows[half:])
    _add(win, t[:half], rows[:half])
    decoder, reference = _decoder(n_units, window_s), _decoder(n_units, window_s)
    for t_end in np.arange(0.2, 5.0, 0.37):
        _assert_window_decodes_like(win, decoder, reference, t_end, _reference_counts(t, rows, t_end, window_s, n_units))


def test_decoding_a_window_forgets_what_is_older_than_it():
    env = LinearTrack((0, 0), (30, 0), bin_cm=10)
    decoder = BayesDecoder(np.array([[1.0, 5.0, 9.0]] * 3), env, np.ones(3, bool), window_s=0.1)
    win = SpikeWindow(3, 0.1)
    _add(win, [0.05, 0.15, 0.25], [0, 1, 2])
    assert win.decode(decoder, 0.2).n_spikes == 1 and len(win) == 2
    assert win.decode(decoder, 0.3).n_spikes == 1 and len(win) == 1


def test_window_is_half_open_on_the_left():
    win = SpikeWindow(1, 0.1)
    _add(win, [0.1, 0.2], [0, 0])
    # (0.1, 0.2] holds the spike at 0.2 only.
    assert win.decode(_decoder(1, 0.1), 0.2).n_spikes == 1


def test_bad_window_settings_are_refused():
    with pytest.raises(ValueError, match="n_units"):
        SpikeWindow(-1, 0.2)  # 0 is a window for a marks-only decoder
    with pytest.raises(ValueError, match="window_s"):
        SpikeWindow(3, 0.0)


def test_window_survives_many_compactions_and_late_batches():
    rng = np.random.default_rng(5)
    n_units, window_s = 7, 0.2
    win = SpikeWindow(n_units, window_s)
    decoder, reference = _decoder(n_units, window_s), _decoder(n_units, window_s)
    held_t, held_rows = np.zeros(0), np.zeros(0, np.int64)
    for k in range(1, 2000):
        t = np.sort(rng.uniform((k - 1) * 0.02, k * 0.02, rng.integers(0, 40)))
        if k % 7 == 0:
            t = t - 0.03          # a late batch, older than spikes already held
        rows = rng.integers(0, n_units, t.size)
        _add(win, t, rows)
        held_t, held_rows = np.concatenate([held_t, t]), np.concatenate([held_rows, rows])
        t_end = k * 0.02 - 0.05
        counts = _reference_counts(held_t, held_rows, t_end, window_s, n_units)
        _assert_window_decodes_like(win, decoder, reference, t_end, counts)
        keep = held_t > t_end - window_s
        held_t, held_rows = held_t[keep], held_rows[keep]
    assert len(win) == held_t.size


def test_append_known_spikes_kernel_matches_its_numpy_twin():
    # Twin check (common practice here): ids between, below and above the known ones, wide apart, late spikes.
    known_ids = np.array([10, 12, 13, 15, 10**15], np.int64)
    row_of_known = np.array([3, 0, 1, 2, 4], np.int64)
    ids = np.array([10, 11, 12, 9, 16, 15, 13, -4, 10, 10**15, 10**15 + 1, -(2**62)], np.int64)
    t = np.linspace(0.9, 1.3, ids.size)
    results = []
    for kernel in (append_known_spikes, append_known_spikes_numpy):
        held_t, held_rows = np.full(20, -7.0), np.full(20, -7, np.int64)
        stop, n_unknown, n_late = kernel(t, ids, known_ids, row_of_known, 1.0, held_t, held_rows, 3)
        results.append((stop, n_unknown, n_late, held_t.tolist(), held_rows.tolist()))
    assert results[0] == results[1]
    stop, n_unknown, n_late, held_t, held_rows = results[0]
    assert (stop, n_unknown) == (9, 6)
    assert held_rows[3:9] == [3, 0, 2, 1, 3, 4] and held_rows[:3] == [-7] * 3 and held_rows[9:] == [-7] * 11
    assert held_t[3:9] == [t[0], t[2], t[5], t[6], t[8], t[9]]
    assert n_late == int(np.count_nonzero(t[[0, 2, 5, 6, 8, 9]] <= 1.0))


def test_spikes_of_unknown_units_are_left_out_and_late_ones_counted():
    win = SpikeWindow(2, 0.2)
    known_ids, row_of_known = np.array([5, 9], np.int64), np.array([1, 0], np.int64)
    n_unknown, n_late = win.add_units(np.array([0.1, 0.2, 0.3]), np.array([9, 7, 5], np.int64),
                                      known_ids, row_of_known, 0.15)
    assert (n_unknown, n_late, len(win)) == (1, 1, 2)
