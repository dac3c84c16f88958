"""Validation of the typed input messages (decoder.messages)."""

import numpy as np
import pytest

from decoder.messages import (
    MAX_BATCH,
    ControlCommand,
    Heartbeat,
    MessageError,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)


def test_spike_batch_arrays_are_typed_and_read_only():
    batch = SpikeBatch("ephys", 3, [0.1, 0.2], [101, 102])
    assert batch.t_s.dtype == np.float64 and batch.unit_id.dtype == np.int64
    with pytest.raises(ValueError):
        batch.t_s[0] = 1.0


@pytest.mark.parametrize(
    "t_s, unit_id, words",
    [
        ([0.1, np.nan], [1, 2], "NaN or infinite"),
        ([0.1, np.inf], [1, 2], "NaN or infinite"),
        ([0.2, 0.1], [1, 2], "must not decrease"),
        ([0.1, 0.2], [1], "has 1"),
        ([[0.1]], [1], "one-dimensional"),
        ([0.1], [1.5], "whole numbers"),
    ],
)
def test_spike_batch_rejects_bad_arrays_with_a_reason(t_s, unit_id, words):
    with pytest.raises(MessageError, match=words):
        SpikeBatch("ephys", 0, t_s, unit_id)


def test_oversized_batch_is_rejected():
    n = MAX_BATCH + 1
    with pytest.raises(MessageError, match="limit"):
        SpikeBatch("ephys", 0, np.zeros(n), np.zeros(n, np.int64))


def test_lost_frames_become_nan_with_quality_zero():
    frames = TrackerFrames("cam", 0, [1.0, 1.02], [[np.nan, 3.0], [4.0, 5.0]])
    assert np.all(np.isnan(frames.xy_cm[0])) and frames.quality.tolist() == [0, 1]
    frames = TrackerFrames("cam", 0, [1.0], [[4.0, 5.0]], quality=[0])
    assert np.all(np.isnan(frames.xy_cm[0]))


def test_infinite_position_is_an_error_not_a_lost_frame():
    with pytest.raises(MessageError, match="infinite"):
        TrackerFrames("cam", 0, [1.0], [[np.inf, 0.0]])


def test_scalar_messages_validate():
    assert Heartbeat("ephys", 1, 2).t_s == 2.0
    assert SyncPulse("ephys", 1, 2.5, 7).pulse_id == 7
    with pytest.raises(MessageError):
        Heartbeat("ephys", -1, 2.0)
    with pytest.raises(MessageError):
        SyncPulse("ephys", 1, float("nan"), 7)
    with pytest.raises(MessageError, match="command"):
        ControlCommand("ctl", 0, "launch")
    with pytest.raises(MessageError, match="repeated"):
        SourceAnnounce("ephys", 0, "spikes", "acq", 30000.0, [1, 1])
    with pytest.raises(MessageError, match="source"):
        Heartbeat("", 0, 1.0)


@pytest.mark.parametrize(
    "xy, quality",
    [([[4.0, 5.0]], None), ([[4.0, 5.0]], [7]), ([[np.nan, 5.0]], None), ([[4.0, 5.0]], [0]), ([[4.0, np.nan]], [9])],
)
def test_single_float64_frame_matches_the_general_path(xy, quality):
    # The one-frame fast path must store what the general path stores: lost
    # frames NaN with quality 0 (the rule in the TrackerFrames docstring).
    q = None if quality is None else np.array(quality, np.uint8)
    fast = TrackerFrames("cam", 0, np.array([1.5]), np.array(xy, np.float64), quality=q)
    general = TrackerFrames("cam", 0, [1.5], xy, quality=quality)  # lists take the general path
    for name in ("t_s", "xy_cm", "quality"):
        a, b = getattr(fast, name), getattr(general, name)
        np.testing.assert_array_equal(a, b)
        assert a.dtype == b.dtype and not a.flags.writeable
    assert fast.head_dir_rad is None


@pytest.mark.parametrize(
    "t_s, xy, words",
    [([np.nan], [[1.0, 2.0]], "NaN or infinite"), ([1.0], [[np.inf, 2.0]], "infinite coordinate")],
)
def test_single_float64_frame_keeps_the_error_messages(t_s, xy, words):
    with pytest.raises(MessageError, match=words):
        TrackerFrames("cam", 0, np.array(t_s), np.array(xy))


@pytest.mark.parametrize(
    "t",
    [[], [1.0], [1.0, 1.0, 2.0], [2.0, 1.0], [1.0, np.nan], [np.inf], [-np.inf, 0.0], [0.0, 1.0, 0.5, 2.0]],
)
def test_spike_time_check_matches_its_numpy_twin(t):
    # Twin check (common practice here): the compiled check and numpy's isfinite + neighbour comparison agree.
    from decoder.messages import finite_non_decreasing, finite_non_decreasing_numpy

    arr = np.asarray(t, dtype=np.float64)
    assert finite_non_decreasing(arr) == finite_non_decreasing_numpy(arr)


def test_spike_batch_keeps_wire_arrays_and_widens_int32_ids():
    t = np.frombuffer(np.array([0.1, 0.2]).tobytes())
    u = np.frombuffer(np.array([3, 4], np.int32).tobytes(), dtype=np.int32)
    batch = SpikeBatch(source="ephys", seq=0, t_s=t, unit_id=u)
    assert batch.t_s is t                       # read-only float64 off the wire: kept as it is
    assert batch.unit_id.dtype == np.int64 and batch.unit_id.tolist() == [3, 4]
    assert not batch.unit_id.flags.writeable


@pytest.mark.parametrize(
    "t, x, y, q",
    [(1.0, 2.0, 3.0, None), (1.0, 2.0, 3.0, 9), (1.0, np.nan, 3.0, None), (1.0, 2.0, 3.0, 0), (1.0, np.nan, 3.0, 7)],
)
def test_one_frame_from_scalars_equals_the_constructor(t, x, y, q):
    a = TrackerFrames.one("tracker", 3, t, x, y, q)
    b = TrackerFrames("tracker", 3, np.array([t]), np.array([[x, y]]), None, None if q is None else np.array([q]))
    for name in ("t_s", "xy_cm", "quality"):
        u, v = getattr(a, name), getattr(b, name)
        np.testing.assert_array_equal(u, v)
        assert u.dtype == v.dtype and u.shape == v.shape and not u.flags.writeable
    assert (a.source, a.seq, a.head_dir_rad) == (b.source, b.seq, b.head_dir_rad)


@pytest.mark.parametrize("t, x, q", [(np.inf, 1.0, None), (1.0, np.inf, None), (1.0, 1.0, 300), (1.0, 1.0, -1)])
def test_one_frame_from_scalars_refuses_what_the_constructor_refuses(t, x, q):
    with pytest.raises(MessageError):
        TrackerFrames.one("tracker", 3, t, x, 2.0, q)
