"""What the monitor's page shows, built from the loop's state and events streams: no sockets here.

:class:`SessionView` takes the frames as they arrive and answers each page
with one packet, ``[uint32 LE header length][UTF-8 JSON header][uint8
posterior]``: the header holds the figures of the newest state frame plus
what this page has not seen yet of the session's error trace and event list;
the posterior follows quantised to 0..255 of its own peak (``post_max`` in
the header), row-major as on the wire. :func:`readiness_verdict` says whether
the fitted model is ready to fire triggers, and why not.
"""

from __future__ import annotations

import bisect
import json
import logging
import math
import struct
from collections import deque
from typing import Any

import numpy as np

from decoder.config import ExperimentConfig
from decoder.encoding.calibration import MAX_TEMPERATURE
from decoder.space.environments import RING_RADIUS_CM, Arena, HeadingRing, TrackGraph
from rig_adapters.wire import protocol

log = logging.getLogger(__name__)

#: Data seconds of position history drawn as a trail behind each marker.
TRAIL_S = 1.5

#: Most points of a trail sent to the page.
TRAIL_POINTS = 40

#: Data seconds over which the rolling decoding error is the median.
ROLLING_ERROR_S = 10.0

#: Data seconds per point of the session's error trace.
TRACE_BIN_S = 1.0

#: Most points kept in the error trace (four hours at one per second).
TRACE_MAX_POINTS = 4 * 3600

#: Most events kept for the page's list.
EVENTS_KEPT = 500

#: Edges (ms) of the added-latency histogram: log-spaced, 0.05 ms to 500 ms,
#: with the counts below and above the range in the first and last bin.
LATENCY_EDGES_MS = np.geomspace(0.05, 500.0, 41)

#: Candidate ripple events kept for the ripple panel (the newest); all are counted.
RIPPLE_EVENTS_KEPT = 200

#: Candidate events whose decoded sequences the ripple panel draws (the newest).
RIPPLE_SEQUENCES_SHOWN = 6

#: How often (s) bad state frames are logged at most; all are counted.
BAD_FRAME_LOG_INTERVAL_S = 5.0

#: Readiness verdict: the least fraction of the environment's bins visited
#: (our choice: below it, zones and trajectories run through unmapped bins).
READY_MIN_COVERAGE = 0.8

#: Readiness verdict: the fewest spatially tuned units (our choice; population
#: decoders of position are usually run on some tens of place cells, from memory).
READY_MIN_TUNED_UNITS = 10

def _number(x: Any) -> float | None:
    """A finite float for JSON, None for NaN, infinity or absence."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _xy(xy: Any) -> list | None:
    if xy is None:
        return None
    out = [_number(c) for c in xy]
    return None if None in out else out


def _error_cm(stats: dict) -> float | None:
    """The step's decoding error; the loop sends a negative number when the true position is unknown."""
    error = _number(stats.get("error_cm"))
    return error if error is not None and error >= 0 else None


def environment_payload(config: ExperimentConfig) -> dict:
    """What the page needs to draw the environment and the zones.

    Parameters
    ----------
    config : ExperimentConfig

    Returns
    -------
    dict
        ``kind`` ("arena", "track" or "ring"), ``bin_cm``, ``n_bins``, ``hpd_unit``
        ("cm²", "cm" or "deg"), the environment's ``to_dict()`` under
        ``environment``, the zones' ``to_dict()`` under ``zones``, the
        names of the replay-content rules under ``content_rules``, and:

        - an arena: ``grid_shape`` [ny, nx], ``x_edges_cm`` (nx + 1),
          ``y_edges_cm`` (ny + 1), ``valid_mask`` (n_bins,) of 0/1 in
          row-major bin order, ``outline_cm`` the closed boundary ring;
        - a track or graph: ``linear_edges_cm`` (n_bins + 1),
          ``total_length_cm``, ``edge_starts_cm`` (linear position where
          each edge begins), ``outline_cm`` one [[x, y], [x, y]] per edge;
        - a heading ring: ``bin_edges_deg`` (n_bins + 1) and
          ``ring_radius_cm``, the radius of the ring its points lie on
          (``decoder.space.headings``).
    """
    env = config.environment
    out: dict[str, Any] = {
        "bin_cm": env.bin_cm,
        "n_bins": env.n_bins,
        "environment": env.to_dict(),
        "zones": [z.to_dict() for z in config.zones],
        "content_rules": [r.name for r in config.rules if r.kind.startswith("replay_")],
        "hpd_unit": "cm²" if env.ndim_spatial == 2 else ("deg" if isinstance(env, HeadingRing) else "cm"),
    }
    if isinstance(env, Arena):
        out.update(
            kind="arena",
            grid_shape=list(env.grid_shape),
            x_edges_cm=env.x_edges_cm.tolist(),
            y_edges_cm=env.y_edges_cm.tolist(),
            valid_mask=env.valid_mask.astype(int).tolist(),
            outline_cm=env.outline_cm().tolist(),
        )
    elif isinstance(env, TrackGraph):
        out.update(
            kind="track",
            linear_edges_cm=env.linear_edges_cm.tolist(),
            total_length_cm=env.total_length_cm,
            edge_starts_cm=np.concatenate([[0.0], np.cumsum(env.edge_lengths_cm)[:-1]]).tolist(),
            outline_cm=[seg.tolist() for seg in env.outline_cm()],
        )
    elif isinstance(env, HeadingRing):
        out.update(kind="ring", bin_edges_deg=env.linear_edges_cm.tolist(), ring_radius_cm=RING_RADIUS_CM)
    else:
        raise ValueError(f"the monitor cannot draw a {type(env).__name__}; use an Arena, LinearTrack, TrackGraph "
                         "or HeadingRing")
    return out


def quantise_posterior(posterior: np.ndarray) -> tuple[bytes, float]:
    """A posterior (or occupancy) map as bytes of 0..255 relative to its peak.

    Parameters
    ----------
    posterior : ndarray of float, any shape
        Non-negative; NaN counts as 0.

    Returns
    -------
    (bytes, float)
        ``prod(shape)`` bytes, row-major, ``round(255 * p / peak)``; and the
        peak itself (0 when the map is all zero).
    """
    p = np.nan_to_num(np.asarray(posterior, dtype=np.float32).ravel(), nan=0.0, posinf=0.0, neginf=0.0)
    peak = float(p.max()) if p.size else 0.0
    if peak <= 0.0:
        return bytes(p.size), 0.0
    q = np.rint(np.clip(p, 0.0, None) * (255.0 / peak)).astype(np.uint8)
    return q.tobytes(), peak


def pack_packet(header: dict, posterior_u8: bytes = b"") -> bytes:
    """``[uint32 LE header length][JSON header][posterior bytes]``."""
    text = json.dumps(header, separators=(",", ":"), allow_nan=False).encode()
    return struct.pack("<I", len(text)) + text + posterior_u8


def unpack_packet(data: bytes) -> tuple[dict, bytes]:
    """Inverse of :func:`pack_packet`: the header dict and the posterior bytes."""
    if len(data) < 4:
        raise ValueError(f"a monitor packet has at least 4 bytes, got {len(data)}")
    (n,) = struct.unpack_from("<I", data)
    if 4 + n > len(data):
        raise ValueError(f"the packet says its header has {n} bytes but only {len(data) - 4} follow")
    return json.loads(data[4 : 4 + n]), data[4 + n :]


def readiness_verdict(readiness: dict, state: str | None) -> dict:
    """Ready or not ready to fire triggers, and why, from the loop's readiness figures.

    Parameters
    ----------
    readiness : dict
        ``coverage`` (fraction of bins visited), ``n_spatial_units``,
        ``likelihood_temperature`` (fitted at fit time), any may be missing.
    state : str or None
        The session state of the newest frame.

    Returns
    -------
    dict
        ``ready`` (bool), ``reasons`` (list of str, empty when ready) and
        ``checked`` (the figures the verdict could judge).
    """
    reasons = []
    coverage = readiness.get("coverage")
    units = readiness.get("n_spatial_units")
    temperature = readiness.get("likelihood_temperature")
    if state == "learning":
        reasons.append("still learning: no model fitted yet")
    if coverage is None:
        reasons.append("coverage not reported yet")
    elif coverage < READY_MIN_COVERAGE:
        reasons.append(f"coverage {coverage:.2f} of bins, below {READY_MIN_COVERAGE:.2f}: learn longer")
    if units is None:
        reasons.append("tuned units not counted yet")
    elif units < READY_MIN_TUNED_UNITS:
        reasons.append(f"{units:.0f} spatially tuned units, fewer than {READY_MIN_TUNED_UNITS}")
    if temperature is not None and temperature >= MAX_TEMPERATURE:
        reasons.append(f"likelihood temperature at its limit ({temperature:g}): the model is overconfident "
                       "on held-out spikes")
    checked = [name for name, value in (("coverage", coverage), ("tuned units", units),
                                        ("likelihood temperature", temperature)) if value is not None]
    return {"ready": not reasons, "reasons": reasons, "checked": checked}


class SessionView:
    """Everything the page shows, built from the state frames as they arrive.

    Plain Python with no sockets, so that tests drive it with a list of
    frames. The posterior kept is only the newest; the running figures
    (error trace, events, latency histogram, trails) take every frame the
    monitor receives. Events come from the events stream (:meth:`add_event_bytes`),
    the one record of what fired.

    Parameters
    ----------
    config : ExperimentConfig
        For the environment (to linearise positions on a track) and the zones.
    """

    def __init__(self, config: ExperimentConfig) -> None:
        self.environment = config.environment
        self.is_track = isinstance(self.environment, TrackGraph)
        self.latest: dict | None = None
        self.version = 0
        self.frames_received = 0
        self.frames_missed = 0
        self.bad_frames = 0
        self.bad_reasons: dict[str, int] = {}
        self.last_frame_wall_s: float | None = None
        self._last_seq: dict[str, int] = {}
        self._trail: deque = deque()
        self._recent_errors: deque = deque()
        self.session_errors: list[float] = []
        self.trace: list[list] = []
        self._trace_bin: list = []
        self._trace_bin_start: float | None = None
        self.events: list[dict] = []
        self.events_dropped = 0
        self.latency_counts = np.zeros(len(LATENCY_EDGES_MS) - 1, dtype=np.int64)
        self.readiness: dict[str, float | None] = {}
        self._stats_key: tuple | None = None
        self._refreshes: deque = deque(maxlen=2)
        self._n_events = 0
        self._quantised: tuple[int, bytes, float] | None = None
        self._last_bad_log = -math.inf
        self.ripple_view: dict | None = None
        self.ripple_events: dict[float, dict] = {}
        self.ripple_events_seen = 0
        self._ripple_packet_cache: dict | None = None

    # -- input ---------------------------------------------------------------------

    def add_bytes(self, payload: bytes, wall_s: float) -> None:
        """Take one frame off the state stream; a bad one is counted and logged, never raised."""
        frame = self._read(payload, "state", wall_s)
        if frame is not None:
            self.add(frame, wall_s)

    def add_event_bytes(self, payload: bytes, wall_s: float) -> None:
        """Take one frame off the events stream; a bad one is counted and logged, never raised."""
        frame = self._read(payload, "event", wall_s)
        if frame is not None:
            self.add_event(frame)

    def _read(self, payload: bytes, kind: str, wall_s: float) -> dict | None:
        """The frame of ``kind`` in ``payload``, or None after counting why it is not one."""
        try:
            frame = protocol.decode_output(payload)
            if frame["kind"] != kind:
                stream = "state stream" if kind == "state" else "events stream"
                raise protocol.ProtocolError("unknown_kind", f"the {stream} carried an {frame['kind']!r} frame")
        except protocol.ProtocolError as exc:
            self._count_bad(exc, wall_s)
            return None
        return frame

    def _count_bad(self, exc: protocol.ProtocolError, wall_s: float) -> None:
        self.bad_frames += 1
        self.bad_reasons[exc.reason] = self.bad_reasons.get(exc.reason, 0) + 1
        if wall_s - self._last_bad_log >= BAD_FRAME_LOG_INTERVAL_S:
            self._last_bad_log = wall_s
            log.warning("dropped a bad frame (%d so far): %s", self.bad_frames, exc)

    def add(self, frame: dict, wall_s: float) -> None:
        """Take one decoded state frame (the dict of ``protocol.decode_output``)."""
        self.frames_received += 1
        self.last_frame_wall_s = wall_s
        self._note_refresh(frame, wall_s)
        last = self._last_seq.get(frame["source"])
        if last is not None and frame["seq"] > last + 1:
            self.frames_missed += frame["seq"] - last - 1
        self._last_seq[frame["source"]] = frame["seq"]
        stats = frame.get("stats") or {}
        t_s = frame["t_s"]
        self._add_trail(t_s, frame)
        for key in ("coverage", "n_spatial_units", "cv_error_cm", "learn_elapsed_s", "likelihood_temperature"):
            if key in stats and (frame["state"] == "learning" or key != "learn_elapsed_s"):
                self.readiness[key] = _number(stats[key])
        error = _error_cm(stats)
        if error is not None and frame["state"] == "decoding":
            self._add_error(t_s, error)
        added = _number(stats.get("added_ms"))
        if added is not None and added > 0:  # 0 until the loop has timed its first step
            i = min(max(bisect.bisect_right(LATENCY_EDGES_MS, added) - 1, 0), len(self.latency_counts) - 1)
            self.latency_counts[i] += 1
        if frame.get("ripples") is not None:
            self._add_ripples(frame["ripples"])
        self.latest = frame
        self.version += 1

    def _add_ripples(self, view: dict) -> None:
        """Keep the newest envelope and merge the frame's events (by onset) into the panel's list.

        Each frame repeats the newest events, so a frame the monitor missed
        costs nothing as long as a later one arrives before they scroll out.
        """
        self.ripple_view = view
        self._ripple_packet_cache = None
        for e in view["events"]:
            onset = e["onset_s"]
            if onset not in self.ripple_events:
                self.ripple_events_seen += 1
            self.ripple_events[onset] = self._ripple_event(e)
        if len(self.ripple_events) > RIPPLE_EVENTS_KEPT:
            for onset in sorted(self.ripple_events)[: len(self.ripple_events) - RIPPLE_EVENTS_KEPT]:
                del self.ripple_events[onset]

    def _ripple_event(self, e: dict) -> dict:
        """One candidate event for the page: its bins' times (ms after the onset) and decoded positions.

        On a track, graph or ring the position is the linear one (cm along
        the track, degrees of heading); in an arena, x and y.
        """
        bins = e["bins"].astype(np.float64)
        xy = bins[:, 1:3]
        finite = np.all(np.isfinite(xy), axis=1)
        if isinstance(self.environment, Arena):
            series = [xy[:, 0], xy[:, 1]]
        else:
            lin = np.full(len(xy), np.nan)
            if finite.any():
                lin[finite] = self.environment.linearize(xy[finite])
            series = [lin]
        offset = _number(e["offset_s"])
        decision = _number(e["decision_s"])
        return {
            "onset_s": e["onset_s"],
            "duration_ms": None if offset is None else round(1e3 * (offset - e["onset_s"]), 1),
            "decided": list(dict.fromkeys(e["decided"])),
            "decision_ms": None if decision is None else round(1e3 * (decision - e["onset_s"]), 1),
            "bin_ms": [_number(round(float(v), 2)) for v in bins[:, 0]],
            "positions": [[_number(round(float(v), 2)) for v in s] for s in series],
            "n_spikes": bins[:, 3].astype(int).tolist(),
            "log_odds": [[_number(round(float(v), 2)) for v in row] for row in e["log_odds"].reshape(2, -1)],
        }

    def _ripple_packet(self) -> dict | None:
        """The ripple panel's part of a packet: the envelope, its thresholds, event marks and the newest sequences."""
        view = self.ripple_view
        if view is None or self._ripple_packet_cache is not None:
            return self._ripple_packet_cache
        env = view["envelope_sd"]
        t0 = _number(view["t0_s"])
        t_end = None if t0 is None else t0 + env.size * view["step_s"]
        marks = [[o, e["duration_ms"]] for o, e in self.ripple_events.items()
                 if t0 is not None and t0 <= o <= t_end]
        newest = sorted(self.ripple_events)[-RIPPLE_SEQUENCES_SHOWN:]
        self._ripple_packet_cache = {
            "threshold_sd": view["threshold_sd"],
            "end_sd": view["end_sd"],
            "baseline_ready": view["ready"],
            "t0_s": t0,
            "step_s": view["step_s"],
            "envelope_sd": [_number(round(float(v), 3)) for v in env],
            "marks": marks,
            "events_seen": self.ripple_events_seen,
            "n_events": view["n_events"],
            "sequences": [self.ripple_events[o] for o in newest],
        }
        return self._ripple_packet_cache

    def _add_trail(self, t_s: float, frame: dict) -> None:
        self._trail.append((t_s, frame["tracked_xy_cm"], frame["map_xy_cm"]))
        while self._trail and self._trail[0][0] < t_s - TRAIL_S:
            self._trail.popleft()

    def _add_error(self, t_s: float, error_cm: float) -> None:
        self._recent_errors.append((t_s, error_cm))
        while self._recent_errors[0][0] < t_s - ROLLING_ERROR_S:
            self._recent_errors.popleft()
        self.session_errors.append(error_cm)
        if self._trace_bin_start is None:
            self._trace_bin_start = math.floor(t_s / TRACE_BIN_S) * TRACE_BIN_S
        if t_s >= self._trace_bin_start + TRACE_BIN_S:
            self._close_trace_bin()
            self._trace_bin_start = math.floor(t_s / TRACE_BIN_S) * TRACE_BIN_S
        self._trace_bin.append(error_cm)

    def _close_trace_bin(self) -> None:
        if self._trace_bin:
            self.trace.append([self._trace_bin_start + TRACE_BIN_S / 2, float(np.median(self._trace_bin))])
            self._trace_bin = []
            if len(self.trace) > TRACE_MAX_POINTS:
                del self.trace[: len(self.trace) - TRACE_MAX_POINTS]

    def add_event(self, frame: dict) -> None:
        """Take one event (the dict of ``protocol.decode_output``): the rule, zone and mass that fired.

        A ripple rule's event has an empty zone and no mass (NaN); it is
        kept with ``ripple`` set.
        """
        self._n_events += 1
        self.events.append({
            "n": self._n_events,
            "id": int(frame["event_id"]),
            "t_s": frame["t_s"],
            "rule": frame["rule"],
            "zone": frame["zone"] or None,
            "mass": _number(frame["zone_mass"]),
            "ripple": not frame["zone"],
            "map_xy_cm": _xy(frame["map_xy_cm"]),
            "tracked_xy_cm": _xy(frame["tracked_xy_cm"]),
        })
        if len(self.events) > EVENTS_KEPT:
            self.events_dropped += len(self.events) - EVENTS_KEPT
            del self.events[: len(self.events) - EVENTS_KEPT]

    # -- output --------------------------------------------------------------------

    def _note_refresh(self, frame: dict, wall_s: float) -> None:
        """Note when the loop's once-a-second figures change: the first frame after a refresh."""
        stats = frame.get("stats") or {}
        key = tuple(stats.get(k) for k in ("rate_spikes_hz", "rate_tracker_hz", "latency_p50_ms", "latency_p99_ms"))
        if key != self._stats_key:
            self._stats_key = key
            self._refreshes.append((wall_s, frame["t_s"]))

    def data_speed(self) -> float | None:
        """Data seconds per wall second between the loop's last two refreshes of its figures; None when unknown.

        The loop counts its input over the wall interval between two
        refreshes; measured over the same interval, the data speed turns
        those counts into counts per data second even when a loaded loop
        catches up in bursts.
        """
        if len(self._refreshes) < 2:
            return None
        (w0, t0), (w1, t1) = self._refreshes
        return (t1 - t0) / (w1 - w0) if w1 > w0 else None

    def input_rates(self, stats: dict) -> dict:
        """Input messages per second of data time, from the loop's counts per wall second.

        The loop counts each source's messages over about one wall second
        (``rate_spikes_hz``, ``rate_tracker_hz``); dividing by the data speed
        over that same interval (:meth:`data_speed`) gives messages per data second, the figure a rig's sampling rate is
        given in whatever the replay speed. None while data time stands still.
        """
        speed = self.data_speed()
        out = {"data_speed": speed}
        for role in ("spikes", "tracker"):
            wall_rate = _number(stats.get(f"rate_{role}_hz"))
            out[role] = wall_rate / speed if wall_rate is not None and speed and speed > 0 else None
        return out

    def rolling_error_cm(self) -> float | None:
        """Median decoding error over the last :data:`ROLLING_ERROR_S` of data time."""
        if not self._recent_errors:
            return None
        return float(np.median([e for _, e in self._recent_errors]))

    def _trails(self) -> dict:
        pts = list(self._trail)
        if len(pts) > TRAIL_POINTS:
            keep = np.linspace(0, len(pts) - 1, TRAIL_POINTS).round().astype(int)
            pts = [pts[i] for i in keep]
        tracked = [_xy(p[1]) for p in pts]
        decoded = [_xy(p[2]) for p in pts]
        return {"tracked": tracked, "decoded": decoded}

    def _linear(self, frame: dict) -> dict:
        xy = np.array([frame["tracked_xy_cm"], frame["map_xy_cm"], frame["mean_xy_cm"]], dtype=np.float64)
        finite = np.all(np.isfinite(xy), axis=1)
        lin = np.full(3, np.nan)
        if finite.any():
            lin[finite] = self.environment.linearize(xy[finite])
        return {"tracked": _number(lin[0]), "map": _number(lin[1]), "mean": _number(lin[2])}

    def packet(self, cursor: dict, wall_s: float) -> bytes:
        """The next packet for one page.

        Parameters
        ----------
        cursor : dict
            The page's own progress, ``{"trace": int, "event_n": int}``;
            updated in place so the next packet carries only what is new.
        wall_s : float
            Now, wall clock, for the age of the newest frame.
        """
        frame = self.latest
        self._close_stale_trace_bin(frame)
        trace_from = min(cursor.get("trace", 0), len(self.trace))
        new_events = [e for e in self.events if e["n"] > cursor.get("event_n", 0)]
        state = frame["state"] if frame is not None else None
        header: dict[str, Any] = {
            "monitor": {
                "frames_received": self.frames_received,
                "frames_missed": self.frames_missed,
                "bad_frames": self.bad_frames,
                "bad_reasons": dict(self.bad_reasons),
                "frame_age_s": None if self.last_frame_wall_s is None else round(wall_s - self.last_frame_wall_s, 3),
                "version": self.version,
            },
            "trace_from": trace_from,
            "trace": self.trace[trace_from:],
            "events": new_events,
            "events_dropped": self.events_dropped,
            "latency_edges_ms": None if cursor.get("edges_sent") else LATENCY_EDGES_MS.round(4).tolist(),
            "latency_counts": self.latency_counts.tolist(),
            "readiness": dict(self.readiness),
            "verdict": readiness_verdict(self.readiness, state),
            "rolling_error_cm": self.rolling_error_cm(),
            "session_error_cm": float(np.median(self.session_errors)) if self.session_errors else None,
            "n_errors": len(self.session_errors),
            "ripples": self._ripple_packet(),
            "frame": None,
        }
        cursor["trace"] = len(self.trace)
        cursor["edges_sent"] = True
        if new_events:
            cursor["event_n"] = new_events[-1]["n"]
        if frame is None:
            return pack_packet(header)
        stats = {k: _number(v) for k, v in (frame.get("stats") or {}).items()}
        stats["error_cm"] = _error_cm(stats)
        header["frame"] = {
            "t_s": frame["t_s"],
            "state": frame["state"],
            "armed": frame["armed"],
            "map_xy_cm": _xy(frame["map_xy_cm"]),
            "mean_xy_cm": _xy(frame["mean_xy_cm"]),
            "tracked_xy_cm": _xy(frame["tracked_xy_cm"]),
            "hpd95_size": _number(frame["hpd95_size"]),
            "peak_prob": _number(frame["peak_prob"]),
            "zone_masses": {k: _number(v) for k, v in (frame["zone_masses"] or {}).items()},
            "n_spikes": frame["n_spikes"],
            "stats": stats,
            "rates_per_data_s": self.input_rates(stats),
            "trails": self._trails(),
            "linear": self._linear(frame) if self.is_track else None,
            "post_shape": None,
            "post_max": None,
            "post_kind": "occupancy" if frame["state"] == "learning" else "posterior",
        }
        body = b""
        if frame.get("posterior") is not None:
            if self._quantised is None or self._quantised[0] != self.version:
                q, peak = quantise_posterior(frame["posterior"])
                self._quantised = (self.version, q, peak)
            _, body, peak = self._quantised
            header["frame"]["post_shape"] = list(frame["posterior"].shape)
            header["frame"]["post_max"] = peak
        return pack_packet(header, body)

    def _close_stale_trace_bin(self, frame: dict | None) -> None:
        """Close the open trace bin once the data time has moved past it (or decoding stopped)."""
        if frame is None or self._trace_bin_start is None:
            return
        if frame["t_s"] >= self._trace_bin_start + TRACE_BIN_S or frame["state"] != "decoding":
            self._close_trace_bin()
            self._trace_bin_start = math.floor(frame["t_s"] / TRACE_BIN_S) * TRACE_BIN_S
