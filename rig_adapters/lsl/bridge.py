"""Lab Streaming Layer streams republished on placeloop's wire protocol.

:class:`LslBridge` subscribes to LSL streams, found by name or type:

spikes
    One channel, one sample per spike: the unit id (any integer format),
    stamped with the spike's time. Irregular rate.
marks
    One stream per electrode group (tetrode, shank segment): one sample per
    spike, its mark in µV on each of the group's channels, so the stream's
    channel count (1 to 64) is the group's. Group ids are the streams'
    order, from 0; the spike source announces them (``groups``).
position
    Two or three channels, ``x, y[, heading]``, at the tracker's frame rate;
    lengths in cm unless the stream's ``desc/channels/channel/unit`` names
    another length, heading in radians (NaN where unknown).
lfp
    Up to 512 channels in µV at a regular rate, republished as ``lfp``
    chunks of source ``"lfp"``. Consecutive chunks are stamped end to end
    (LSL's stamps jitter by more than the half sample the protocol allows
    between chunks); a stamp later than the previous chunk's end by more
    than :data:`LFP_JOIN_S` (or :data:`LFP_GAP_SAMPLES` samples, if longer)
    is a gap, its missing samples counted ``lost``, and the chunks go on
    from that stamp; so does a clock that drifts from the nominal rate, once
    the drift passes that tolerance. Samples with a NaN are dropped (``refused``): the next chunk
    then starts after a gap, as the protocol asks.

and publishes them on one ZeroMQ PUB socket as a rig does (PROTOCOL.md):
an ``announce`` per source (repeated every :data:`ANNOUNCE_EVERY_S`),
``spikes`` batches and ``frames`` as they arrive, and spike-source
``heartbeat`` messages every ``heartbeat_s``. Both sources announce the
clock ``"lsl"``: every LSL timestamp is mapped onto the bridge machine's
LSL clock with LSL's own clock-offset estimates (``proc_clocksync``), so
the two streams share one acquisition clock and need no sync pulses.

A heartbeat promises that every spike stamped before it has been sent, so
it runs ``holdback_s`` behind the bridge's clock, the time LSL takes to
deliver a sample; spikes that still arrive stamped before the last
heartbeat are sent and counted (``late``; the decoder counts them too).

What is lost is reported, never hidden: frames missing from the position
stream's regular rate (``lost``), samples whose time went backwards
(``reordered``, dropped for frames), streams silent for ``stall_s``
(``stalls``, logged once per silence; the bridge then sends no heartbeat,
so the decoder's watchdog disarms), and a stream whose outlet closed: the
bridge looks for it again for ``rejoin_s`` and goes on if it comes back
with the same channels, else it stops with a sentence saying what changed.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, field

import numpy as np
import zmq

from decoder.messages import (MAX_BATCH, MAX_MARK_CHANNELS, MAX_MARK_UV, GroupAnnounce, Heartbeat, MarkedSpikes,
                              SourceAnnounce, SpikeBatch, TrackerFrames)
from decoder.signals.lfp_chunk import LFP_RATE_RANGE_HZ, MAX_LFP_CHANNELS, LfpChunk
from rig_adapters.wire import protocol

log = logging.getLogger(__name__)

__all__ = ["LslBridge", "BridgeError", "StreamCounts", "require_pylsl", "SPIKE_SOURCE", "TRACKER_SOURCE",
           "LSL_CLOCK", "LFP_SOURCE"]

SPIKE_SOURCE, TRACKER_SOURCE, LFP_SOURCE, LSL_CLOCK = "ephys", "tracker", "lfp", "lsl"

#: An LFP chunk stamped more than this many samples, and more than LFP_JOIN_S, after the previous
#: chunk's end starts after a gap.
LFP_GAP_SAMPLES = 1.5

#: Delivery jitter of LSL stamps absorbed when joining LFP chunks end to end (s); a few ms is common
#: practice for chunked outlets on one machine (from memory).
LFP_JOIN_S = 0.005

#: Data time per republished LFP chunk at most (s): a few ms arrive at a time, a burst is cut to this.
LFP_CHUNK_MAX_S = 0.05

#: Announcements are repeated this often (s), so a late subscriber learns the sources (PROTOCOL.md: <= 5 s).
ANNOUNCE_EVERY_S = 4.0

#: Nominal rate announced for the spike source (Hz); LSL spike streams are irregular, and the decoder uses none.
NOMINAL_SPIKE_RATE_HZ = 30000.0

#: Length units a position stream may name, in cm per unit.
_LENGTH_CM = {"cm": 1.0, "centimeters": 1.0, "centimetres": 1.0, "m": 100.0, "meters": 100.0, "metres": 100.0,
              "mm": 0.1, "millimeters": 0.1, "millimetres": 0.1}


class BridgeError(RuntimeError):
    """A stream cannot be found, has the wrong shape, or changed under the bridge."""


def require_pylsl():
    """The pylsl module, or a BridgeError saying what to install."""
    try:
        import pylsl
        import pylsl.util
    except (ImportError, RuntimeError) as exc:
        raise BridgeError(f"the LSL bridge needs pylsl and its library: pip install 'placeloop[lsl]' ({exc})") from None
    return pylsl


@dataclass
class StreamCounts:
    """What one LSL stream delivered and lost."""

    samples: int = 0
    sent: int = 0
    lost: int = 0
    late: int = 0
    reordered: int = 0
    refused: int = 0
    stalls: int = 0
    rejoins: int = 0
    silent: bool = False
    last_t: float = -math.inf
    next_t: float = field(default=-math.inf, repr=False)
    last_arrival_s: float = field(default=-math.inf, repr=False)


def _query(text: str) -> tuple[str, str]:
    """``name=X``, ``type=X`` or ``source_id=X``; plain text is a name."""
    key, sep, value = text.partition("=")
    if not sep:
        return "name", text
    if key not in ("name", "type", "source_id") or not value:
        raise BridgeError(f"a stream is chosen by NAME, name=NAME, type=TYPE or source_id=ID; got {text!r}")
    return key, value


class LslBridge:
    """Republish LSL spike or marks streams, a position stream and an LFP stream on a ZeroMQ PUB socket.

    Parameters
    ----------
    spikes, position : str or None
        The streams: a name, or ``type=...``, ``name=...``, ``source_id=...``;
        ``spikes`` None when only marks streams carry the spikes.
    pub_endpoint : str
        Where to bind the PUB socket that ``placeloop run --rig`` connects to.
    holdback_s : float, default 0.02
        Heartbeats run this far behind the bridge's LSL clock (s).
    heartbeat_s : float, default 0.01
        Heartbeat interval (s); a decoding step is 10-20 ms, and the protocol
        asks a heartbeat at least once per step.
    resolve_timeout_s : float, default 10.0
        How long to look for each stream at start (s).
    stall_s : float, default 2.0
        A stream silent this long is reported stalled (s).
    rejoin_s : float, default 5.0
        How long to look for a stream again after its outlet closed (s).
    cm_per_unit : float, optional
        Position scale, over the stream's own unit metadata.
    marks : sequence of str, optional
        One marks stream per electrode group, group ids in this order from 0.
    lfp : str, optional
        The LFP stream.
    """

    def __init__(self, spikes: str, position: str, pub_endpoint: str, holdback_s: float = 0.02,
                 heartbeat_s: float = 0.01, resolve_timeout_s: float = 10.0, stall_s: float = 2.0,
                 rejoin_s: float = 5.0, cm_per_unit: float | None = None, marks: tuple[str, ...] = (),
                 lfp: str | None = None) -> None:
        for name, value in (("holdback_s", holdback_s), ("heartbeat_s", heartbeat_s),
                            ("resolve_timeout_s", resolve_timeout_s), ("stall_s", stall_s), ("rejoin_s", rejoin_s)):
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise BridgeError(f"{name} must be a positive number of seconds, got {value!r}")
        self.pylsl = require_pylsl()
        if spikes is None and not marks:
            raise BridgeError("the bridge needs a spike stream (--spikes) or marks streams (--marks)")
        self.queries = {SPIKE_SOURCE: _query(spikes)} if spikes is not None else {}
        self.queries[TRACKER_SOURCE] = _query(position)
        #: Marks streams by key, each one electrode group: key -> group id.
        self.groups = {f"marks{i}": i for i in range(len(marks))}
        self.queries.update({f"marks{i}": _query(q) for i, q in enumerate(marks)})
        if lfp is not None:
            self.queries[LFP_SOURCE] = _query(lfp)
        self.pub_endpoint = pub_endpoint
        self.holdback_s, self.heartbeat_s = float(holdback_s), float(heartbeat_s)
        self.resolve_timeout_s, self.stall_s, self.rejoin_s = float(resolve_timeout_s), float(stall_s), float(rejoin_s)
        self.cm_per_unit = cm_per_unit
        self.counts = {key: StreamCounts() for key in self.queries}
        self.stop_requested = False
        self._seq = {SPIKE_SOURCE: 0, TRACKER_SOURCE: 0, LFP_SOURCE: 0}
        self._inlets: dict = {}
        self._channels: dict[str, int] = {}
        self._frame_rate_hz = 0.0
        self._lfp_rate_hz = 0.0
        self._scale_cm = 1.0
        self._last_heartbeat = -math.inf
        self.messages_sent = 0
        self.ended: str = ""

    # -- streams ------------------------------------------------------------------

    def _resolve(self, source: str, timeout_s: float):
        key, value = self.queries[source]
        found = self.pylsl.resolve_byprop(key, value, 1, timeout_s)
        if not found:
            return None
        if len(found) > 1:
            log.warning("%d LSL streams match %s=%r; using the first (%s on %s)", len(found), key, value,
                        found[0].name(), found[0].hostname())
        return found[0]

    def _open(self, source: str, info) -> None:
        """Check a stream's shape and open its inlet with LSL's clock synchronisation."""
        n = info.channel_count()
        what = f"the LSL stream {info.name()!r} ({self.queries[source][0]}={self.queries[source][1]!r})"
        if source in self._channels and self._channels[source] != n:
            raise BridgeError(f"{what} came back with {n} channels instead of {self._channels[source]}; check the "
                              "source and restart the bridge")
        numeric = (self.pylsl.cf_float32, self.pylsl.cf_double64, self.pylsl.cf_int8, self.pylsl.cf_int16,
                   self.pylsl.cf_int32, self.pylsl.cf_int64)
        flags = self.pylsl.proc_clocksync | self.pylsl.proc_monotonize
        if source in self.groups:
            if not 1 <= n <= MAX_MARK_CHANNELS or info.channel_format() not in numeric:
                raise BridgeError(f"{what} has {n} channels of {info.channel_format()}; a marks stream has 1 to "
                                  f"{MAX_MARK_CHANNELS} numeric channels, one per channel of its electrode group")
        elif source == LFP_SOURCE:
            rate, (lo, hi) = info.nominal_srate(), LFP_RATE_RANGE_HZ
            if not (1 <= n <= MAX_LFP_CHANNELS and lo <= rate <= hi) or info.channel_format() not in numeric:
                raise BridgeError(f"{what} has {n} channels at {rate:g} Hz; an LFP stream has 1 to {MAX_LFP_CHANNELS} "
                                  f"numeric channels at a regular rate of {lo:g} to {hi:g} Hz")
            # No proc_dejitter: its fit assumes no sample is missing, and would hide a gap the detector must see.
            self._lfp_rate_hz = float(rate)
        elif source == SPIKE_SOURCE:
            if n != 1:
                raise BridgeError(f"{what} has {n} channels; a spike stream has one, the unit id of each spike")
            if info.channel_format() not in (self.pylsl.cf_int8, self.pylsl.cf_int16, self.pylsl.cf_int32,
                                             self.pylsl.cf_int64):
                raise BridgeError(f"{what} does not carry integers; a spike stream carries the unit id of each spike")
        else:
            if n not in (2, 3):
                raise BridgeError(f"{what} has {n} channels; a position stream has x, y and optionally heading")
            self._frame_rate_hz = info.nominal_srate()
            self._scale_cm = self._position_scale(info, what)
        self._channels[source] = n
        self._inlets[source] = self.pylsl.StreamInlet(info, max_buflen=60, recover=False, processing_flags=flags)
        self._inlets[source].open_stream(timeout=self.resolve_timeout_s)

    def _position_scale(self, info, what: str) -> float:
        if self.cm_per_unit is not None:
            return float(self.cm_per_unit)
        unit = info.desc().child("channels").child("channel").child_value("unit").strip().lower()
        if not unit:
            log.warning("%s names no unit for x; taking cm (give --cm-per-unit otherwise)", what)
            return 1.0
        if unit not in _LENGTH_CM:
            raise BridgeError(f"{what} gives x in {unit!r}, not a length the bridge knows ({', '.join(_LENGTH_CM)}); "
                              "give the scale with --cm-per-unit")
        return _LENGTH_CM[unit]

    # -- the loop ------------------------------------------------------------------

    def run(self, duration_s: float | None = None, poll_s: float = 0.002) -> dict:
        """Resolve the streams, bind the socket and republish until stopped, a stream is gone, or ``duration_s``.

        Returns
        -------
        dict
            The report: per stream ``samples``, ``sent``, ``lost``, ``late``,
            ``reordered``, ``stalls``, ``rejoins``; ``messages_sent``; ``ended`` (why it stopped).

        Raises
        ------
        BridgeError
            A stream is not found at start, has the wrong shape, or came back changed.
        """
        for source in self.queries:
            info = self._resolve(source, self.resolve_timeout_s)
            if info is None:
                key, value = self.queries[source]
                raise BridgeError(f"no LSL stream with {key}={value!r} answered within {self.resolve_timeout_s:g} s; "
                                  "is its outlet running, on this network (and LSL's resolve scope)?")
            self._open(source, info)
        ctx = zmq.Context.instance()
        pub = ctx.socket(zmq.PUB)
        # Deep queue: a burst of spikes is never dropped by the socket; LINGER lets the last messages out at close.
        pub.setsockopt(zmq.SNDHWM, 100_000)
        pub.setsockopt(zmq.LINGER, 1000)
        try:
            pub.bind(self.pub_endpoint)
            log.info("bridging LSL streams to %s", self.pub_endpoint)
            self._loop(pub, duration_s, poll_s)
        finally:
            for inlet in self._inlets.values():
                inlet.close_stream()
            pub.close()
        return self.report()

    def _send(self, pub, cls, source: str, **fields) -> None:
        msg = cls(source=source, seq=self._seq[source], **fields)
        self._seq[source] += 1
        pub.send(protocol.encode(msg))
        self.messages_sent += 1

    def _announce(self, pub) -> None:
        self._send(pub, SourceAnnounce, SPIKE_SOURCE, kind="spikes", clock=LSL_CLOCK,
                   sample_rate_hz=NOMINAL_SPIKE_RATE_HZ, unit_ids=np.zeros(0, np.int64))
        if self.groups:
            self._send(pub, GroupAnnounce, SPIKE_SOURCE, group_ids=np.array(list(self.groups.values()), np.int64),
                       group_channels=np.array([self._channels[k] for k in self.groups], np.int64))
        self._send(pub, SourceAnnounce, TRACKER_SOURCE, kind="tracker", clock=LSL_CLOCK,
                   sample_rate_hz=self._frame_rate_hz if self._frame_rate_hz > 0 else 30.0)

    def _loop(self, pub, duration_s: float | None, poll_s: float) -> None:
        clock = self.pylsl.local_clock
        started = clock()
        next_announce = started
        while not self.stop_requested:
            now = clock()
            if duration_s is not None and now - started >= duration_s:
                self.ended = "duration"
                return
            if now >= next_announce:
                self._announce(pub)
                next_announce = now + ANNOUNCE_EVERY_S
            for source in self.queries:
                try:
                    samples, stamps = self._inlets[source].pull_chunk(timeout=0.0, max_samples=4096)
                except self.pylsl.util.LostError:
                    if not self._rejoin(source):
                        self.ended = f"the {source} stream's outlet closed"
                        log.warning("the LSL %s stream is gone and did not come back within %g s; stopping",
                                    source, self.rejoin_s)
                        return
                    continue
                if stamps:
                    self._forward(pub, source, np.asarray(samples), np.asarray(stamps, np.float64), now)
                self._watch(source, now)
            spiking = [c for k, c in self.counts.items() if k == SPIKE_SOURCE or k in self.groups]
            if not any(c.silent for c in spiking) and now - self._last_heartbeat >= self.heartbeat_s:
                t = now - self.holdback_s
                if t > self._last_heartbeat:
                    self._send(pub, Heartbeat, SPIKE_SOURCE, t_s=t)
                    self._last_heartbeat = t
            time.sleep(poll_s)

    def _forward(self, pub, source: str, samples: np.ndarray, t: np.ndarray, now: float) -> None:
        c = self.counts[source]
        c.samples += t.size
        c.last_arrival_s = now
        if c.silent:
            c.silent = False
            log.warning("the LSL %s stream is sending again", source)
        if source == SPIKE_SOURCE:
            c.late += int(np.count_nonzero(t < self._last_heartbeat))
            # proc_monotonize keeps times non-decreasing within a stream, as a spike batch must be.
            self._send(pub, SpikeBatch, SPIKE_SOURCE, t_s=t, unit_id=samples[:, 0].astype(np.int64))
            c.sent += t.size
            c.last_t = float(t[-1])
            return
        if source in self.groups:
            self._forward_marks(pub, source, samples, t)
            return
        if source == LFP_SOURCE:
            self._forward_lfp(pub, samples, t)
            return
        keep = np.concatenate([[t[0] > c.last_t], np.diff(t) > 0])
        c.reordered += int(np.count_nonzero(~keep))
        t, samples = t[keep], samples[keep].astype(np.float64)
        if t.size == 0:
            return
        if self._frame_rate_hz > 0:
            # Frames missing from the regular rate: a gap of k frame intervals lost k - 1 frames.
            previous = c.last_t if math.isfinite(c.last_t) else t[0]
            gaps = np.diff(np.concatenate([[previous], t])) * self._frame_rate_hz
            c.lost += int(np.sum(np.maximum(np.round(gaps) - 1, 0)))
        xy = samples[:, :2] * self._scale_cm
        heading = samples[:, 2] if samples.shape[1] == 3 else None
        self._send(pub, TrackerFrames, TRACKER_SOURCE, t_s=t, xy_cm=xy, head_dir_rad=heading)
        c.sent += t.size
        c.last_t = float(t[-1])

    def _forward_marks(self, pub, source: str, samples: np.ndarray, t: np.ndarray) -> None:
        c = self.counts[source]
        marks = samples.astype(np.float64)
        # A mark the wire refuses (NaN, beyond the amplitude limit) is dropped and counted, never the whole batch.
        ok = np.isfinite(marks).all(axis=1) & (np.abs(marks) <= MAX_MARK_UV).all(axis=1)
        c.refused += int(np.count_nonzero(~ok))
        t, marks = t[ok], marks[ok]
        if t.size == 0:
            return
        c.late += int(np.count_nonzero(t < self._last_heartbeat))
        for lo in range(0, t.size, MAX_BATCH // marks.shape[1]):
            hi = lo + MAX_BATCH // marks.shape[1]
            self._send(pub, MarkedSpikes, SPIKE_SOURCE, t_s=t[lo:hi], group_id=np.full(t[lo:hi].size,
                       self.groups[source], np.int64), marks_uv=marks[lo:hi].astype(np.float32))
        c.sent += t.size
        c.last_t = float(t[-1])

    def _forward_lfp(self, pub, samples: np.ndarray, t: np.ndarray) -> None:
        c, rate = self.counts[LFP_SOURCE], self._lfp_rate_hz
        x = samples.astype(np.float32)
        finite = np.isfinite(x).all(axis=1)
        c.refused += int(np.count_nonzero(~finite))
        tolerance_s = max(LFP_GAP_SAMPLES / rate, LFP_JOIN_S)
        # Segments of finite samples whose stamps run on without a jump; a dropped NaN sample forces a gap
        # before the next segment (PROTOCOL.md: send every sample, or leave a gap in time).
        jump = np.r_[False, np.diff(t) > 1.0 / rate + tolerance_s]
        starts = np.flatnonzero(finite & (jump | ~np.r_[False, finite[:-1]] | (np.arange(t.size) == 0)))
        per_chunk = max(1, min(int(LFP_CHUNK_MAX_S * rate), MAX_BATCH // x.shape[1]))
        for a in starts.tolist():
            b = a + 1
            while b < t.size and finite[b] and not jump[b]:
                b += 1
            forced = a > 0 and not finite[a - 1]
            t0 = float(t[a])
            if math.isfinite(c.next_t) and t0 - c.next_t > tolerance_s:
                c.lost += int(round((t0 - c.next_t) * rate))
            elif math.isfinite(c.next_t) and not forced:
                t0 = c.next_t
            for lo in range(a, b, per_chunk):
                hi = min(lo + per_chunk, b)
                self._send(pub, LfpChunk, LFP_SOURCE, t_s=t0 + (lo - a) / rate, rate_hz=rate,
                           samples=np.ascontiguousarray(x[lo:hi]))
            c.next_t = t0 + (b - a) / rate
            c.sent += b - a
        if not finite[-1]:
            c.next_t = -math.inf  # the next chunk starts at its own stamp, after the dropped samples
        c.last_t = float(t[-1])

    def _watch(self, source: str, now: float) -> None:
        c = self.counts[source]
        if c.last_arrival_s == -math.inf:
            c.last_arrival_s = now
        if not c.silent and now - c.last_arrival_s >= self.stall_s:
            c.silent = True
            c.stalls += 1
            log.warning("the LSL %s stream has sent nothing for %.1f s%s", source, now - c.last_arrival_s,
                        "; no heartbeats until it is back" if source == SPIKE_SOURCE else "")

    def _rejoin(self, source: str) -> bool:
        """The stream's outlet closed: look for it again; True if it is back with the same shape."""
        log.warning("the LSL %s stream's outlet closed; looking for it for %g s", source, self.rejoin_s)
        self._inlets.pop(source).close_stream()
        info = self._resolve(source, self.rejoin_s)
        if info is None:
            return False
        self._open(source, info)
        self.counts[source].rejoins += 1
        return True

    def report(self) -> dict:
        """Counts per stream and why the bridge stopped."""
        out = {source: {k: v for k, v in vars(c).items() if k not in ("last_arrival_s", "silent", "last_t", "next_t")}
               for source, c in self.counts.items()}
        out["messages_sent"] = self.messages_sent
        out["ended"] = self.ended or "stopped"
        return out
