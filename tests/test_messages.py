"""Validation of the typed input messages (decoder.messages)."""

import numpy as np
import pytest

from decoder.messages import (
    DESCRIBE_MAX_CHARS,
    MAX_BATCH,
    REASONS,
    ControlCommand,
    Heartbeat,
    MessageError,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
    describe,
    stored_frame,
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
        ([[0.1]], [1], "flat list of numbers"),
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
def test_one_frame_from_arrays_from_lists_and_from_scalars_is_stored_alike(xy, quality):
    # One rule (stored_frame) for every way a frame arrives: lost frames NaN with
    # quality 0 (the rule in the TrackerFrames docstring, common practice for trackers).
    q = None if quality is None else np.array(quality, np.uint8)
    from_arrays = TrackerFrames("cam", 0, np.array([1.5]), np.array(xy, np.float64), quality=q)
    from_lists = TrackerFrames("cam", 0, [1.5], xy, quality=quality)
    from_scalars = TrackerFrames.one("cam", 0, 1.5, xy[0][0], xy[0][1], None if quality is None else quality[0])
    for other in (from_lists, from_scalars):
        for name in ("t_s", "xy_cm", "quality"):
            a, b = getattr(from_arrays, name), getattr(other, name)
            np.testing.assert_array_equal(a, b)
            assert a.dtype == b.dtype and a.shape == b.shape and not b.flags.writeable
        assert other.head_dir_rad is None


@pytest.mark.parametrize(
    "t_s, xy, reason, words",
    [
        ([np.nan], [[1.0, 2.0]], "bad_time", "finite"),
        ([1.0], [[np.inf, 2.0]], "bad_field", "infinite coordinate"),
        ([1.0, 1.0], [[1.0, 2.0], [1.0, 2.0]], "bad_time", "must increase"),
        ([1.0], [[1.0, 2.0], [1.0, 2.0]], "length_mismatch", "has 2"),
    ],
)
def test_frames_are_refused_with_a_reason(t_s, xy, reason, words):
    with pytest.raises(MessageError, match=words) as info:
        TrackerFrames("cam", 0, np.array(t_s), np.array(xy))
    assert info.value.reason == reason


def test_stored_frame_is_the_rule_of_each_frame_of_a_batch():
    frames = [(1.0, 2.0, 3.0, None), (1.1, np.nan, 3.0, None), (1.2, 2.0, 3.0, 0), (1.3, 2.0, 3.0, 200)]
    batch = TrackerFrames("cam", 0, [f[0] for f in frames], [[f[1], f[2]] for f in frames],
                          quality=[1, 1, 0, 200])
    for i, frame in enumerate(frames):
        t, x, y, q = stored_frame(*frame)
        assert batch.t_s[i] == t and batch.quality[i] == q
        np.testing.assert_array_equal(batch.xy_cm[i], [x, y])


@pytest.mark.parametrize(
    "frame, reason",
    [
        ((np.inf, 1.0, 1.0, None), "bad_time"),
        ((1.0, -np.inf, 1.0, None), "bad_field"),
        ((1.0, 1.0, 1.0, 256), "bad_field"),
        ((1.0, 1.0, 1.0, -1), "bad_field"),
        ((1.0, 1.0, 1.0, True), "bad_field"),
        ((1.0, "1", 1.0, None), "bad_field"),
        (("1.0", 1.0, 1.0, None), "bad_field"),
    ],
)
def test_stored_frame_refuses_with_a_reason(frame, reason):
    with pytest.raises(MessageError) as info:
        stored_frame(*frame)
    assert info.value.reason == reason


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


@pytest.mark.parametrize("t, x, q", [(np.inf, 1.0, None), (1.0, np.inf, None), (1.0, 1.0, 300), (1.0, 1.0, -1)])
def test_one_frame_from_scalars_refuses_what_the_constructor_refuses(t, x, q):
    with pytest.raises(MessageError) as one:
        TrackerFrames.one("tracker", 3, t, x, 2.0, q)
    with pytest.raises(MessageError) as general:
        TrackerFrames("tracker", 3, [t], [[x, 2.0]], quality=None if q is None else [q])
    assert one.value.reason == general.value.reason


@pytest.mark.parametrize(
    "make",
    [
        lambda v: Heartbeat("ephys", v, 1.0),
        lambda v: Heartbeat(v, 1, 1.0),
        lambda v: Heartbeat("ephys", 1, v),
        lambda v: SyncPulse("sync", 1, 1.0, v),
        lambda v: SpikeBatch("ephys", 1, v, [1]),
        lambda v: SpikeBatch("ephys", 1, [0.1], v),
        lambda v: TrackerFrames("cam", 1, [1.0], v),
        lambda v: TrackerFrames.one("cam", 1, 1.0, v, 2.0),
        lambda v: SourceAnnounce("ephys", 0, v, "acq", 30000.0),
        lambda v: SourceAnnounce("ephys", 0, "spikes", "acq", v),
        lambda v: ControlCommand("ctl", 0, v),
        lambda v: ControlCommand("ctl", 0, "arm", {"zone": v}),
    ],
)
@pytest.mark.parametrize("kind", ["deep list", "huge map", "huge int", "long string"])
def test_hostile_values_give_a_short_message_error(make, kind):
    # A value nested 1,000 deep (Python's default recursion limit, from memory) made
    # repr() raise RecursionError; a 5,000-digit integer makes repr() raise ValueError
    # (Python's int-to-str limit of 4,300 digits, from memory). Common practice for
    # hostile-input tests: any such value gives the one exception, with a short message.
    deep: list = [1]
    for _ in range(5000):
        deep = [deep]
    value = {"deep list": deep, "huge map": {f"k{i}": [i] for i in range(100_000)},
             "huge int": 10**5000, "long string": "x" * 1_000_000}[kind]
    with pytest.raises(MessageError) as info:
        make(value)
    assert info.value.reason in REASONS
    assert len(str(info.value)) < 400


def test_describe_is_short_and_looks_one_level_deep():
    deep: list = []
    for _ in range(100_000):
        deep = [deep]
    assert describe(deep) == "[[1 items]]"
    assert describe([1, "a", [2, [3]], {"b": 1}, 5]) == "[1, 'a', [2 items], {1 entries}, ... (5 items)]"
    assert describe(2**5000) == "an integer of 5001 bits"
    assert len(describe("x" * 10**6)) <= DESCRIBE_MAX_CHARS
    assert describe(b"\x00" * 9) == "9 bytes"
    assert len(describe({str(i): i for i in range(10**5)})) <= DESCRIBE_MAX_CHARS


def test_integers_beyond_int64_are_refused_never_wrapped():
    # int64 holds -2**63 .. 2**63 - 1 (two's complement, 64 bits)
    for ids in ([2**63], [-1, 2**64 - 1], [1.0, 2.0**63], np.array([2**63], np.uint64)):
        with pytest.raises(MessageError) as info:
            SpikeBatch("ephys", 0, [0.1] * len(ids), ids)
        assert info.value.reason == "bad_field"
    with pytest.raises(MessageError):
        Heartbeat("ephys", 2**63, 1.0)
    assert Heartbeat("ephys", 2**63 - 1, 1.0).seq == 2**63 - 1


def test_the_callers_array_is_not_frozen():
    t = np.array([0.1, 0.2])
    SpikeBatch("ephys", 0, t, [1, 2])
    TrackerFrames("cam", 0, t, np.zeros((2, 2)))
    assert t.flags.writeable
