"""Tracked and true positions on the spike clock (decoder.session.positions)."""

import math

import numpy as np
import pytest

from decoder.config import SourceSettings
from decoder.messages import SyncPulse, TrackerFrames
from decoder.session.clock import ClockMismatchError
from decoder.session.positions import MAX_PENDING_FRAMES, Positions
from decoder.session.streams import SpikeWatermark

SOURCES = SourceSettings(spikes="ephys", tracker="tracker", truth="truth")


class Learner:
    """Records what a learning model would be given."""

    def __init__(self):
        self.frames = []

    def update_frames(self, t_s, xy_cm):
        self.frames.append((np.array(t_s), np.array(xy_cm)))


def _positions(watermark=None):
    watermark = SpikeWatermark(max_jump_s=5.0) if watermark is None else watermark
    return Positions(SOURCES, {"frames_dropped_unaligned": 0, "frames_dropped_ahead": 0}, watermark)


def _sync(positions, source, seq, pulse_id, t_s, learner=None):
    positions.add_sync(SyncPulse(source, seq, t_s, pulse_id), learner)


def test_frames_of_unannounced_sources_are_on_the_spike_clock():
    # PROTOCOL.md (our own): without announcements both clocks are taken to be one.
    positions, learner = _positions(), Learner()
    positions.add_frames(TrackerFrames("tracker", 0, [1.0, 1.02], [[5.0, 6.0], [7.0, 8.0]]), learner)
    positions.add_frames(TrackerFrames.one("truth", 0, 1.0, 4.0, 4.0), learner)
    assert positions.tracked.position_at(1.01) == (5.0, 6.0)
    assert positions.truth.position_at(1.01) == (4.0, 4.0)
    # Only tracked frames teach the model; the truth is for scoring.
    assert len(learner.frames) == 1 and learner.frames[0][0].tolist() == [1.0, 1.02]


def test_frames_on_another_clock_wait_for_its_fit_then_go_in_mapped_in_order():
    positions, learner = _positions(), Learner()
    positions.announce("ephys", "acq")
    positions.announce("tracker", "camera")
    positions.add_frames(TrackerFrames("tracker", 0, [10.0, 10.5], [[1.0, 1.0], [2.0, 2.0]]), learner)
    positions.add_frames(TrackerFrames.one("tracker", 1, 11.0, 3.0, 3.0), learner)
    assert len(positions.pending) == 2 and positions.tracked.newest_t_s == -math.inf
    # Two pulses: the camera clock reads 100 s less and runs 200 ppm slow against the acquisition.
    for pulse_id, t_camera in enumerate([10.0, 20.0]):
        _sync(positions, "tracker", pulse_id, pulse_id, t_camera, learner)
        _sync(positions, "ephys", pulse_id, pulse_id, 100.0 + t_camera * (1 + 2e-4), learner)
    assert positions.pending == []
    # Source: the straight-line clock model t_ref = offset + (1 + drift) t of decoder.session.clock,
    # exact through two pulses (least squares on two points is the line through them).
    expected = [100.0 + t * (1 + 2e-4) for t in (10.0, 10.5, 11.0)]
    np.testing.assert_allclose(np.concatenate([f[0] for f in learner.frames]), expected, rtol=0, atol=1e-9)
    assert positions.tracked.position_at(expected[1] + 0.01) == (2.0, 2.0)


def test_frames_beyond_the_held_limit_are_dropped_and_counted():
    positions = _positions()
    positions.announce("ephys", "acq")
    positions.announce("tracker", "camera")
    for seq in range(MAX_PENDING_FRAMES + 3):
        positions.add_frames(TrackerFrames.one("tracker", seq, float(seq), 1.0, 1.0), None)
    assert len(positions.pending) == MAX_PENDING_FRAMES
    assert positions.counters["frames_dropped_unaligned"] == 3


def test_a_pulse_off_the_fit_raises_and_a_forgotten_clock_holds_frames_again():
    positions = _positions()
    positions.announce("ephys", "acq")
    positions.announce("tracker", "camera")
    for pulse_id in range(3):
        _sync(positions, "tracker", pulse_id, pulse_id, float(pulse_id))
        _sync(positions, "ephys", pulse_id, pulse_id, 50.0 + pulse_id)
    _sync(positions, "tracker", 3, 3, 3.0)
    with pytest.raises(ClockMismatchError):
        _sync(positions, "ephys", 3, 3, 53.5)       # 0.5 s off a fit good to 4 ms
    positions.forget_clock("tracker")
    positions.add_frames(TrackerFrames.one("tracker", 9, 4.0, 1.0, 1.0), None)
    assert len(positions.pending) == 1


def test_frames_too_far_past_the_spike_clock_are_dropped_not_poisoning_the_rest():
    # A frame stamped 1000 s ahead would otherwise be the newest frame, and every later
    # frame "out of order" (issue 17); times are on the spike clock after alignment.
    watermark = SpikeWatermark(max_jump_s=5.0)
    positions, learner = _positions(watermark), Learner()
    positions.add_frames(TrackerFrames.one("tracker", 0, 1000.0, 1.0, 1.0), learner)   # before any spike: no clock yet
    assert positions.tracked.newest_t_s == 1000.0
    positions, learner = _positions(watermark), Learner()
    watermark.advance(10.0)
    positions.add_frames(TrackerFrames("tracker", 0, [10.0, 14.0, 1010.0], [[1.0, 1.0], [2.0, 2.0], [3.0, 3.0]]),
                         learner)
    positions.add_frames(TrackerFrames.one("tracker", 1, 1010.02, 3.0, 3.0), learner)
    positions.add_frames(TrackerFrames.one("tracker", 2, 14.5, 4.0, 4.0), learner)
    assert positions.counters["frames_dropped_ahead"] == 2
    assert positions.tracked.position_at(14.6) == (4.0, 4.0) and positions.tracked.out_of_order == 0
    # The learning model is given the kept frames only.
    assert [f[0].tolist() for f in learner.frames] == [[10.0, 14.0], [14.5]]
