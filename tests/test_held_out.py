"""The held-out spikes behind the temperature fit (decoder.encoding.held_out).

References: the decoder's own step convention (step k holds the spikes of
``((k - 1) step_s, k step_s]``, decoder.session.steps) and a count made
independently with numpy.histogram; the spikes are invented.
"""

import numpy as np

from decoder.encoding.held_out import HeldOutSpikes


def test_counts_per_step_match_a_histogram_of_the_same_spikes():
    rng = np.random.default_rng(0)
    t = rng.uniform(0.0, 10.0, 5000)
    ids = rng.choice([4, 11, 30], t.size)
    held = HeldOutSpikes()
    for part in np.array_split(rng.permutation(t.size), 300):   # any order, many batches
        held.add(t[part], ids[part])
    ends, counts = held.step_counts(0.02, np.array([30, 4, 11, 99]))
    assert ends[0] > 0 and ends[-1] <= t.max()
    # Source: numpy.histogram over the steps' edges, right-closed as the decoder's steps are.
    for col, unit in enumerate([30, 4, 11]):
        expected = np.array([np.count_nonzero((t[ids == unit] > e - 0.02) & (t[ids == unit] <= e)) for e in ends])
        np.testing.assert_array_equal(counts[:, col], expected)
        assert counts[:, col].sum() == np.histogram(t[ids == unit], bins=[ends[0] - 0.02, ends[-1]])[0][0]
    assert not counts[:, 3].any()   # a unit that never fired


def test_memory_is_bounded_by_time_and_by_count_and_only_whole_steps_come_back():
    held = HeldOutSpikes(keep_s=1.0, max_spikes=1000)
    t = np.arange(0.0005, 10.0, 0.001)     # 1 kHz for 10 s
    for chunk in np.array_split(t, 100):
        held.add(chunk, np.zeros(chunk.size, np.int64))
    ends, counts = held.step_counts(0.1, np.array([0]))
    # Our own bounds: at most max_spikes kept, and no step from before the first dropped spike.
    assert counts.sum() <= 1000 and np.all(counts == 100)
    assert ends[-1] <= t[-1] and ends[0] - 0.1 >= t[-1] - 1.0 - 1e-9


def test_non_finite_times_are_left_out():
    held = HeldOutSpikes()
    held.add(np.array([0.01, np.nan, np.inf, 0.05]), np.array([1, 1, 1, 1]))
    ends, counts = held.step_counts(0.02, np.array([1]))
    assert ends.tolist() == [0.02, 0.04] and counts[:, 0].tolist() == [1, 0]


def test_marked_spikes_come_back_step_by_step_with_their_marks():
    """Marks kept beside their spikes: each step's spikes and marks are those a brute-force selection finds."""
    rng = np.random.default_rng(1)
    t = rng.uniform(0.0, 4.0, 2000)
    groups = rng.choice([2, 5], t.size)
    marks = rng.normal(100.0, 20.0, (t.size, 4)).astype(np.float32)
    narrow = groups == 5
    held = HeldOutSpikes()
    for part in np.array_split(rng.permutation(t.size), 50):
        wide = part[~narrow[part]]
        held.add(t[wide], groups[wide], marks[wide])
        thin = part[narrow[part]]
        held.add(t[thin], groups[thin], marks[thin][:, :2])   # a group of two channels
    ends, index, ids, got = held.step_spikes(0.05)
    first, last = held.step_range(0.05)
    assert ends.tolist() == (np.arange(first, last + 1) * 0.05).tolist()
    # Source: the decoder's step convention, step k holds ((k - 1) step_s, k step_s] (decoder.session.steps),
    # applied spike by spike; narrower marks padded with zeros, as the live window pads them.
    expected = np.zeros((t.size, 4), np.float32)
    expected[~narrow] = marks[~narrow]
    expected[narrow, :2] = marks[narrow, :2]
    for i, end in enumerate(ends):
        inside = (t > end - 0.05) & (t <= end)
        order = np.argsort(t[inside])
        np.testing.assert_array_equal(ids[index == i], groups[inside][order])
        np.testing.assert_array_equal(got[index == i], expected[inside][order])
    assert np.all(np.diff(index) >= 0)


def test_the_steps_asked_narrow_the_counts_to_those_of_another_buffer():
    held = HeldOutSpikes()
    t = np.arange(0.005, 2.0, 0.01)
    held.add(t, np.zeros(t.size, np.int64))
    ends, counts = held.step_counts(0.1, np.array([0]), steps=(5, 12))
    # Steps 5..12 of 0.1 s, ten spikes each (one every 10 ms).
    assert np.allclose(ends, np.arange(5, 13) * 0.1) and counts[:, 0].tolist() == [10] * 8
    # Steps beyond what the buffer holds whole are not invented.
    ends, _ = held.step_counts(0.1, np.array([0]), steps=(15, 40))
    assert np.allclose(ends, np.arange(15, 20) * 0.1)
