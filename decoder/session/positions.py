"""Where the animal is on data time: tracked and true positions, brought onto the spike clock.

Tracker (and, on a simulated rig, truth) frames come stamped on their own
source's clock. A source announced on the spike source's clock, or either of
them unannounced, is taken to share it (PROTOCOL.md); any other waits for its
clock fit from sync pulses (:class:`~decoder.session.clock.ClockAligner`),
its frames held until then, so that no frame is placed on a guessed time.

When the session decodes head direction (``[sources] tracked_value =
"heading"``, set by a heading ring), a frame's place in these histories is
its heading ``hd`` as a point on the ring (``decoder.space.headings``): a
frame without a heading (no ``hd``, NaN, or a lost frame) is an unknown
heading, counted as ``frames_heading_unknown``.
"""

from __future__ import annotations

from bisect import bisect_right

import numpy as np

from decoder.config import SourceSettings
from decoder.encoding.place_model import PlaceModel
from decoder.messages import SyncPulse, TrackerFrames
from decoder.session.clock import ClockAligner, ClockFit
from decoder.session.streams import SpikeWatermark
from decoder.session.tracking import TrackHistory
from decoder.space.headings import heading_points_cm

#: Tracker frames held while waiting for the first clock fit; beyond it
#: frames are dropped (counted as ``frames_dropped_unaligned``).
MAX_PENDING_FRAMES = 5000


class Positions:
    """Tracked and true position histories on the spike clock.

    Parameters
    ----------
    sources : SourceSettings
        Which source is the spike clock, the tracker and the truth.
    counters : dict of str to int
        The session's counters; ``frames_dropped_unaligned`` and
        ``frames_dropped_ahead`` are counted here.
    watermark : SpikeWatermark
        The spike stream's data time: a frame further past it than its
        time-jump limit is dropped, so that one corrupt stamp cannot hide
        every later frame as out of order.

    Attributes
    ----------
    tracked, truth : TrackHistory
        Frames of the tracker and of the truth source, on the spike clock.
    clock : ClockAligner
        One clock fit per source from the sync pulses.
    pending : list of TrackerFrames
        Frames waiting for their source's first clock fit, in arrival order.
    """

    def __init__(self, sources: SourceSettings, counters: dict[str, int], watermark: SpikeWatermark) -> None:
        self._spike_source = sources.spikes
        self._truth_source = sources.truth
        self.counters = counters
        self.watermark = watermark
        self.clock = ClockAligner(sources.spikes, tolerance_s=sources.clock_tolerance_s)
        self._heading = sources.tracked_value == "heading"
        if self._heading:
            counters.setdefault("frames_heading_unknown", 0)
        self.tracked = TrackHistory(on_ring=self._heading)
        self.truth = TrackHistory(on_ring=self._heading)
        self.pending: list[TrackerFrames] = []
        self._clock_of: dict[str, str] = {}

    def announce(self, source: str, clock: str) -> None:
        """Note which clock ``source`` stamps its messages on."""
        self._clock_of[source] = clock

    def forget_clock(self, source: str) -> None:
        """A restarted source may restart its clock: its clock fit no longer holds."""
        self.clock.forget(source)

    def add_frames(self, msg: TrackerFrames, learner: PlaceModel | None) -> None:
        """Frames into their history on the spike clock, or held until their clock is fitted.

        Parameters
        ----------
        msg : TrackerFrames
            From the tracker or the truth source.
        learner : PlaceModel or None
            The model learning, given the tracked frames on the spike clock too (None when not learning).
        """
        fit = self._fit(msg.source)
        if fit is None:
            if len(self.pending) >= MAX_PENDING_FRAMES:
                self.counters["frames_dropped_unaligned"] += msg.t_s.size
            else:
                self.pending.append(msg)
            return
        self._apply(msg, fit, learner)

    def add_sync(self, msg: SyncPulse, learner: PlaceModel | None) -> None:
        """A sync pulse; held frames whose clocks are all fitted now go in, in arrival order.

        Raises
        ------
        ClockMismatchError
            When the pulse disagrees with the source's clock fit (the caller disarms).
        """
        self.clock.add_pulse(msg.source, msg.pulse_id, msg.t_s)
        if self.pending and all(self._fit(m.source) is not None for m in self.pending):
            held, self.pending = self.pending, []
            for frames in held:
                self._apply(frames, self._fit(frames.source), learner)

    def _fit(self, source: str) -> ClockFit | bool | None:
        """True when ``source`` runs on the spike clock, its clock fit when aligned, else None."""
        spikes = self._clock_of.get(self._spike_source)
        other = self._clock_of.get(source)
        if spikes is None or other is None or spikes == other:
            return True
        return self.clock.fit(source)

    def _apply(self, msg: TrackerFrames, fit: ClockFit | bool, learner: PlaceModel | None) -> None:
        # Frames read one way, as Python floats: nearly every message carries one frame, and
        # numpy's per-call cost on one-element arrays was most of the work.
        t_ref = msg.t_s.tolist()
        if fit is not True:
            to_reference = fit.to_reference
            t_ref = [to_reference(t) for t in t_ref]
        xy = self._heading_points(msg) if self._heading else msg.xy_cm
        latest_s = self.watermark.latest_s()
        if t_ref and t_ref[-1] > latest_s:
            # Times within a message are sorted (decoder.messages): the frames to drop are the last ones.
            keep = bisect_right(t_ref, latest_s)
            self.counters["frames_dropped_ahead"] += len(t_ref) - keep
            if keep == 0:
                return
            t_ref, xy = t_ref[:keep], xy[:keep]
        history = self.truth if msg.source == self._truth_source else self.tracked
        add_one = history.add_one
        for t, (x, y) in zip(t_ref, xy.tolist()):
            add_one(t, x, y)
        if learner is not None and history is self.tracked:
            learner.update_frames(np.array(t_ref), xy)

    def _heading_points(self, msg: TrackerFrames) -> np.ndarray:
        """The frames' headings as ring points (n, 2); NaN where the frame is lost or its heading unknown."""
        n = msg.t_s.size
        if msg.head_dir_rad is None:
            self.counters["frames_heading_unknown"] += n
            return np.full((n, 2), np.nan)
        hd = np.where(msg.quality > 0, msg.head_dir_rad, np.nan)
        self.counters["frames_heading_unknown"] += int(np.count_nonzero(np.isnan(hd)))
        return heading_points_cm(hd)
