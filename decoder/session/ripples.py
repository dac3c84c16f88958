"""The session's LFP stream: chunks checked for continuity, ripples detected, ripple rules judged.

One LFP source (``[ripples] source``) on the spike source's clock. The first
chunk fixes the stream's sample rate and channel count; after it, each chunk
must begin where the previous one ended (within half a sample). What breaks
that is counted and never reaches the detector as if it were continuous:

* a gap (the chunk begins later): counted under ``lfp_gaps``; the detector
  restarts its filter and lets it settle before it detects again, so the
  step in the signal cannot pass for a ripple;
* an overlap (the chunk begins earlier: repeated or reordered data):
  refused, ``lfp_overlaps``;
* another sample rate or channel count: refused, ``lfp_rate_changes`` or
  ``lfp_shape_changes``; a first chunk the ``[ripples]`` settings cannot
  work with (a rate too low for the band, fewer channels than
  ``min_channels``): refused, ``lfp_unusable``; a source that restarts its sequence numbers starts
  a new stream (:meth:`RippleStream.restart`).

A detection while the tracked animal moves faster than ``max_speed_cm_s`` is
counted (``ripples_moving``) and reported, but judged by no rule.

Once a model is installed (:meth:`RippleStream.install_model`), every ripple
detected at rest also starts a candidate event whose content is decoded in
short bins from just before its onset (``decoder.session.replay_content``), fed with the
spike source's spikes (:meth:`RippleStream.take_spikes`) and, when a mark model decodes
beside the units, its checked marked spikes (:meth:`RippleStream.take_marks`), each bin decoded
once the spikes' watermark has passed its end and the LFP its start
(:meth:`RippleStream.content_due`, and after each chunk); the event ends at
its LFP offset (the envelope falling back), or at a gap in the LFP. Each
bin's measures are judged by the content rules (``TriggerBank.content``).
"""

from __future__ import annotations

import hashlib
import logging
import math
import struct
from collections import deque
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from decoder.config import RippleSettings
from decoder.encoding.mark_model import MarkModel
from decoder.encoding.place_model import PlaceModel
from decoder.session.replay_content import ContentBin, ReplayContent
from decoder.space.environments import Environment
from decoder.session.tracking import TrackHistory
from decoder.session.triggers import TriggerBank, TriggerEvent
from decoder.signals.lfp_chunk import LfpChunk
from decoder.signals.ripple_detector import RippleDetection, RippleDetector, RippleOffset

log = logging.getLogger(__name__)

#: Largest misalignment of a chunk's first sample that still counts as continuous, in samples.
_CONTINUITY_SAMPLES = 0.5
#: Candidate events kept for the session's summary (the newest; a few hours of rest hold thousands).
EVENTS_KEPT = 500


class RippleOutput(NamedTuple):
    """One detected ripple and what it triggered.

    Attributes
    ----------
    t_s : float
        Data time of the detection (``detection.detected_s``).
    detection : RippleDetection
    tracked_xy_cm : ndarray, shape (2,)
        Tracked position at ``t_s``; NaN when unknown.
    tracked_speed_cm_s : float
    moving : bool
        Whether the animal was faster than ``[ripples] max_speed_cm_s`` (or
        its speed unknown), so that no rule judged the ripple.
    events : tuple of TriggerEvent
    armed : bool
    """

    t_s: float
    detection: RippleDetection
    tracked_xy_cm: np.ndarray
    tracked_speed_cm_s: float
    moving: bool
    events: tuple[TriggerEvent, ...]
    armed: bool


class ContentOutput(NamedTuple):
    """One content bin of a candidate event and what it triggered.

    Attributes
    ----------
    t_s : float
        Data time of the bin's end.
    content : ContentBin
    tracked_xy_cm : ndarray of float64, shape (2,)
        The tracked position when the bin was judged (NaN when unknown): at ``t_s``, or at the
        ripple's detection for a bin that ended before it, which is also its events' time.
    events : tuple of TriggerEvent
    armed : bool
    """

    t_s: float
    content: ContentBin
    tracked_xy_cm: np.ndarray
    events: tuple[TriggerEvent, ...]
    armed: bool


@dataclass
class ContentEvent:
    """One candidate event whose content was decoded: the summary's row.

    Attributes
    ----------
    onset_s : float
        The detection's onset (data time).
    offset_s : float
        Its LFP offset; NaN until it comes (or when the LFP broke off first).
    n_bins : int
        Content bins decoded.
    decided : list of str
        The content rules that fired, in order (empty: none did).
    decision_s : float
        Data time of the first content rule's event (never before the detection); NaN for none.
    sequence : list of (float, float, float, int)
        The decoded sequence, one tuple per content bin: the bin's end (data
        time, s), its MAP position x and y (cm) and its spikes. For display
        (the monitor, the report); not in :meth:`as_dict`.
    log_odds : list of list of float
        The posterior log odds that the replay moves towards (first list) and
        away from (second list) each zone (``ContentBin.log_odds``, what the
        sequence rules judge): as of the decision (the bin whose events came
        first) once one is made, the newest bin's before; empty before the
        first bin.
    """

    onset_s: float
    offset_s: float = math.nan
    n_bins: int = 0
    decided: list[str] | None = None
    decision_s: float = math.nan
    sequence: list[tuple[float, float, float, int]] = field(default_factory=list)
    log_odds: list[list[float]] = field(default_factory=list)

    def as_dict(self) -> dict:
        """Plain JSON values: onset (s), duration and decision time after the onset (ms), log odds (None when unknown)."""
        def ms(t: float) -> float | None:
            return round(1e3 * (t - self.onset_s), 3) if math.isfinite(t) else None
        odds = [[round(v, 3) if math.isfinite(v) else None for v in row] for row in self.log_odds]
        return {"onset_s": self.onset_s, "duration_ms": ms(self.offset_s), "n_bins": self.n_bins,
                "decided": list(self.decided or ()), "decision_ms": ms(self.decision_s), "log_odds": odds}


class RippleStream:
    """The LFP source's chunks into ripple detections and ripple events.

    Parameters
    ----------
    settings : RippleSettings
    bank : TriggerBank
        The session's one bank: ripple rules meet the same caps as every rule.
    tracked : TrackHistory
        Tracked position and speed at a data time.

    Attributes
    ----------
    counters : dict of str to int
    detector : RippleDetector or None
        Made at the first chunk, from its rate and channel count.
    events_ : deque of ContentEvent
        The newest ``EVENTS_KEPT`` candidate events whose content was decoded.
    """

    def __init__(self, settings: RippleSettings, bank: TriggerBank, tracked: TrackHistory) -> None:
        self.settings = settings
        self.bank = bank
        self.tracked = tracked
        self.detector: RippleDetector | None = None
        self.counters = {name: 0 for name in ("lfp_chunks", "lfp_gaps", "lfp_overlaps", "lfp_rate_changes",
                                              "lfp_shape_changes", "lfp_unusable", "ripples", "ripples_moving",
                                              "events", "content_bins", "content_marks_over_cap")}
        self.content: ReplayContent | None = None
        self.events_: deque[ContentEvent] = deque(maxlen=EVENTS_KEPT)
        self._next_s = math.nan
        self._detected_s = -math.inf
        self._hash = hashlib.sha256()

    def take(self, chunk: LfpChunk, watermark_s: float) -> list[RippleOutput | ContentOutput]:
        """Check one chunk's continuity, detect, judge each ripple, and decode the content bins it completed.

        Parameters
        ----------
        chunk : LfpChunk
        watermark_s : float
            The session's data time (the spike stream's), for the LFP's lag.
        """
        det = self.detector
        if det is None:
            try:
                det = RippleDetector(chunk.rate_hz, chunk.n_channels, **self.settings.detector_kwargs())
            except ValueError as exc:  # a rate too low for the band, fewer channels than min_channels
                return self._refuse("lfp_unusable", f"{exc}; check the source against [ripples]")
            self.detector = det
        elif chunk.rate_hz != det.rate_hz:
            return self._refuse("lfp_rate_changes", f"sample rate {chunk.rate_hz:g} Hz, not {det.rate_hz:g} Hz")
        elif chunk.n_channels != det.n_channels:
            return self._refuse("lfp_shape_changes", f"{chunk.n_channels} channels, not {det.n_channels}")
        elif not math.isnan(self._next_s):
            off = (chunk.t_s - self._next_s) * det.rate_hz
            if off < -_CONTINUITY_SAMPLES:
                return self._refuse("lfp_overlaps", f"it begins {-off:.1f} samples before the previous one ended")
            if off > _CONTINUITY_SAMPLES:
                self.counters["lfp_gaps"] += 1
                log.warning("LFP gap of %.1f samples before t=%.4f s: the ripple filter restarts", off, chunk.t_s)
                det.restart()
                self._end_content()
        self._next_s = chunk.end_s
        self.counters["lfp_chunks"] += 1
        out: list[RippleOutput | ContentOutput] = []
        for d in det.process(chunk.t_s, chunk.samples_uv()):
            if isinstance(d, RippleOffset):
                self._close(d)
            else:
                out.append(self._judge(d, watermark_s))
        out.extend(self.content_due(watermark_s))
        return out

    def install_model(self, model: PlaceModel, environment: Environment, zone_masks: np.ndarray,
                      rate_floor_hz: float, marks: MarkModel | None = None, max_marks_per_bin: int = 2000) -> None:
        """Decode the content of the ripples to come with this fitted model (its rate maps, uniform prior).

        With ``marks`` (the fitted mark model the behavioural steps decode with), each content bin adds
        its marked spikes' terms, at most ``max_marks_per_bin`` of them (``[marks] max_spikes_per_step``).
        """
        s = self.settings
        self.content = ReplayContent.for_model(model.rate_maps_hz_, environment, model.visited_mask_, zone_masks,
                                               bin_s=s.content_bin_s, max_event_s=s.content_max_s,
                                               lead_s=s.content_lead_s, unit_ids=model.unit_ids_,
                                               rate_floor_hz=rate_floor_hz,
                                               min_spikes=s.content_min_spikes, marks=marks,
                                               max_marks_per_bin=max_marks_per_bin, **s.sequence_kwargs())

    def take_spikes(self, t_s: np.ndarray, unit_ids: np.ndarray) -> None:
        """Hold the spike source's spikes (times sorted, shape (n,) each) for content decoding."""
        if self.content is not None:
            self.content.take_spikes(t_s, unit_ids)

    def take_marks(self, batch: tuple[np.ndarray, np.ndarray, np.ndarray]) -> None:
        """Hold the spike source's checked marked spikes for content: times, mark model rows, marks (``MarkStream.take``)."""
        if self.content is not None:
            self.content.take_marks(*batch)

    def content_due(self, watermark_s: float) -> list[ContentOutput]:
        """Decode the content bins the spike stream's watermark closed, and judge each by the content rules."""
        content = self.content
        if content is None or not content.active:
            return []
        out = []
        h = self._hash
        for b in content.due(watermark_s, self._next_s):
            # A bin that ended before the ripple was detected is judged at the detection: its
            # events carry the data time at which they could be known, never an earlier one.
            t = max(b.t_s, self._detected_s)
            x, y, speed = self.tracked.at_xy(t)
            xy = np.array((x, y))
            lag = max(watermark_s - t, 0.0)
            events = tuple(self.bank.content(t, b.index, b.n_used, b.mean_mass, b.log_odds, xy, speed, lag))
            self.counters["content_bins"] += 1
            self.counters["content_marks_over_cap"] += b.n_marks_over_cap
            self.counters["events"] += len(events)
            record = self.events_[-1]
            record.n_bins += 1
            record.sequence.append((b.t_s, float(b.map_xy_cm[0]), float(b.map_xy_cm[1]), b.n_spikes))
            if not record.decided:
                record.log_odds = b.log_odds.tolist()
                if events:
                    record.decision_s = t
            record.decided = (record.decided or []) + [ev.rule for ev in events]
            h.update(struct.pack("<di", b.t_s, b.n_spikes))
            h.update(b.posterior.tobytes())
            for ev in events:
                h.update(f"{ev.event_id}|{ev.rule}|{ev.t_s!r}".encode())
            out.append(ContentOutput(b.t_s, b, xy, events, self.bank.armed))
        return out

    def restart(self) -> None:
        """The source restarted: the next chunk starts a new stream (rate and channels may differ)."""
        self.detector = None
        self._next_s = math.nan
        self._end_content()

    @property
    def digest(self) -> str:
        """Hex SHA-256 over every detection and ripple event, in order: a replay must reproduce it."""
        return self._hash.hexdigest()

    def status(self) -> dict:
        det = self.detector
        return {
            "source": self.settings.source,
            "counters": dict(self.counters),
            "baseline_ready": bool(det is not None and det.ready_),
            "digest": self.digest,
            "events": [e.as_dict() for e in self.events_],
        }

    def _refuse(self, counter: str, why: str) -> list[RippleOutput]:
        self.counters[counter] += 1
        log.warning("refused an LFP chunk from %r: %s", self.settings.source, why)
        return []

    def _end_content(self) -> None:
        """The LFP broke off: the event's offset will never come, so its bins end here."""
        if self.content is not None:
            self.content.end()

    def _close(self, d: RippleOffset) -> None:
        """A ripple's envelope fell back: its content bins end at the offset."""
        if self.content is not None and self.content.onset_s == d.onset_s:
            self.content.close(d.offset_s)
        if self.events_ and self.events_[-1].onset_s == d.onset_s:
            self.events_[-1].offset_s = d.offset_s
        self._hash.update(struct.pack("<dd", d.onset_s, d.offset_s))

    def _judge(self, d: RippleDetection, watermark_s: float) -> RippleOutput:
        t = d.detected_s
        x, y, speed = self.tracked.at_xy(t)
        xy = np.array((x, y))
        self.counters["ripples"] += 1
        limit = self.settings.max_speed_cm_s
        moving = limit != math.inf and not speed <= limit
        events: tuple[TriggerEvent, ...] = ()
        if moving:
            self.counters["ripples_moving"] += 1
        else:
            if self.content is not None:
                self.content.begin(d.onset_s, xy)
                self._detected_s = t
                self.events_.append(ContentEvent(d.onset_s))
            lag = max(watermark_s - t, 0.0) if math.isfinite(watermark_s) else 0.0
            events = tuple(self.bank.ripple(t, xy, speed, lag))
            self.counters["events"] += len(events)
        h = self._hash
        h.update(struct.pack("<ddd?", d.onset_s, d.detected_s, d.peak_sd, moving))
        for ev in events:
            h.update(f"{ev.event_id}|{ev.rule}|{ev.t_s!r}".encode())
        return RippleOutput(t, d, xy, speed, moving, events, self.bank.armed)
