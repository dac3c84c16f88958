"""Output frames (placeloop -> subscribers) and control replies: fields to bytes and back.

An ``event`` (a trigger fired) and a ``state`` (the decoder after one step)
are declared once, as a table of fields (Python name, wire key, value type);
the writers :func:`encode_event` / :func:`encode_state` and the reader
:func:`decode_output` both follow it. Subscribers ignore keys they do not
know, so that a newer placeloop may add optional keys (PROTOCOL.md, section 11).
"""

from __future__ import annotations

import itertools
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from decoder.messages import describe
from rig_adapters.wire.framing import (
    MAX_OUTPUT_FRAME_BYTES,
    OUTPUT_LIMITS,
    PROTOCOL_VERSION,
    ProtocolError,
    pack,
    read_kind,
    require,
    unpack,
)

#: Output kinds, placeloop -> subscribers.
OUTPUT_KINDS = ("event", "state")

#: Kind of a reply on the control socket.
REPLY_KIND = "reply"

_F32 = np.dtype("<f4")


@dataclass(frozen=True)
class _Field:
    """One key of an output message: Python name, wire key, value type."""

    name: str
    key: str
    type: str
    required: bool = True


_EVENT_FIELDS = (
    _Field("source", "src", "name"),
    _Field("seq", "seq", "count"),
    _Field("event_id", "id", "count"),
    _Field("zone", "zone", "zone"),
    _Field("rule", "rule", "name"),
    _Field("t_s", "t", "time"),
    _Field("map_xy_cm", "map", "xy"),
    _Field("mean_xy_cm", "mean", "xy"),
    _Field("zone_mass", "mass", "mass"),
    _Field("tracked_xy_cm", "pos", "xy"),
    _Field("wall_received_s", "rx_wall", "time"),
    _Field("wall_decoded_s", "dec_wall", "time"),
    _Field("wall_sent_s", "tx_wall", "time"),
)

_STATE_FIELDS = (
    _Field("source", "src", "name"),
    _Field("seq", "seq", "count"),
    _Field("t_s", "t", "time"),
    _Field("state", "state", "name"),
    _Field("armed", "armed", "flag"),
    _Field("map_xy_cm", "map", "xy"),
    _Field("mean_xy_cm", "mean", "xy"),
    _Field("tracked_xy_cm", "pos", "xy"),
    _Field("hpd95_size", "hpd", "real"),
    _Field("peak_prob", "peak", "real"),
    _Field("zone_masses", "zones", "masses"),
    _Field("n_spikes", "nspk", "count"),
    _Field("posterior", "post", "posterior", required=False),
    _Field("grid_shape", "shape", "shape", required=False),
    _Field("stats", "stats", "stats", required=False),
    _Field("ripples", "rip", "ripples", required=False),
)

_OUTPUT_FIELDS = {"event": _EVENT_FIELDS, "state": _STATE_FIELDS}


def _check_value(f: _Field, value: Any) -> Any:
    """Validate one output value; return it in plain wire form (posterior as an array)."""

    def bad(expected: str) -> ProtocolError:
        return ProtocolError("bad_field", f"{f.name} ({f.key!r}) must be {expected}, got {describe(value)}")

    def number(x: Any) -> bool:
        return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))

    if f.type == "name":
        if not isinstance(value, str) or not value:
            raise bad("a non-empty string")
        return value
    if f.type == "zone":
        # Empty for an event of a ripple rule, which has no zone (PROTOCOL.md, section 8).
        if not isinstance(value, str):
            raise bad("a zone name, or empty for a ripple event")
        return value
    if f.type == "mass":
        # NaN for an event of a ripple rule, which no decoding step made.
        if not number(value) or math.isinf(value):
            raise bad("a posterior mass, NaN for a ripple event")
        return float(value)
    if f.type == "count":
        if not isinstance(value, (int, np.integer)) or isinstance(value, (bool, np.bool_)) or value < 0:
            raise bad("a non-negative integer")
        return int(value)
    if f.type == "flag":
        if not isinstance(value, (bool, np.bool_)):
            raise bad("true or false")
        return bool(value)
    if f.type in ("time", "real"):
        if not number(value) or not math.isfinite(value):
            raise bad("a finite number")
        return float(value)
    if f.type == "xy":
        if isinstance(value, (bytes, str, dict)):
            raise bad("an (x, y) pair in cm")
        try:
            xy = [float(c) for c in value]
        except (TypeError, ValueError, OverflowError):
            raise bad("an (x, y) pair in cm") from None
        if len(xy) != 2 or any(math.isinf(c) for c in xy):
            raise bad("an (x, y) pair in cm, NaN where unknown")
        return xy
    if f.type == "masses":
        if not isinstance(value, dict) or not all(
            isinstance(k, str) and number(v) and math.isfinite(v) for k, v in value.items()
        ):
            raise bad("a map from zone name to posterior mass")
        return {k: float(v) for k, v in value.items()}
    if f.type == "stats":
        if not isinstance(value, dict) or not all(isinstance(k, str) and number(v) for k, v in value.items()):
            raise bad("a map from name to number")
        return {k: (int(v) if isinstance(v, (int, np.integer)) else float(v)) for k, v in value.items()}
    if f.type == "shape":
        if isinstance(value, (bytes, str, dict)):
            raise bad("a list of 1 to 3 positive integers")
        try:
            shape = [int(s) for s in value]
        except (TypeError, ValueError, OverflowError):
            raise bad("a list of 1 to 3 positive integers") from None
        if not 1 <= len(shape) <= 3 or any(s <= 0 for s in shape) or shape != list(value):
            raise bad("a list of 1 to 3 positive integers")
        return shape
    if f.type == "ripples":
        return _ripples_value(value)
    assert f.type == "posterior", f.type
    if isinstance(value, bytes):
        if len(value) % _F32.itemsize:
            raise ProtocolError("bad_array", f"'post' has {len(value)} bytes, not a whole number of float32 values")
        return np.frombuffer(value, dtype=_F32)
    try:
        p = np.asarray(value, dtype=np.float32)
    except (TypeError, ValueError, OverflowError):
        raise bad("an array of probabilities") from None
    if not 1 <= p.ndim <= 3:
        raise bad("an array of probabilities with 1 to 3 dimensions")
    return p


def _encode_output(kind: str, fields: dict) -> bytes:
    spec = _OUTPUT_FIELDS[kind]
    unknown = set(fields) - {f.name for f in spec}
    if unknown:
        raise ProtocolError("bad_field", f"{kind} has no field(s) {sorted(unknown)}; see PROTOCOL.md")
    m: dict[str, Any] = {"v": PROTOCOL_VERSION, "k": kind}
    for f in spec:
        if fields.get(f.name) is None:
            if f.required:
                raise ProtocolError("missing_field", f"an {kind} message needs {f.name}")
            continue
        m[f.key] = _check_value(f, fields[f.name])
    if "post" in m:
        p = m["post"]
        shape = m.setdefault("shape", list(p.shape))
        if math.prod(shape) != p.size:
            raise ProtocolError("length_mismatch", f"grid_shape {shape} does not hold the {p.size} posterior values")
        m["post"] = np.ascontiguousarray(p, dtype=_F32).tobytes()
    elif "shape" in m:
        raise ProtocolError("bad_field", "grid_shape was given without a posterior")
    if "rip" in m:
        m["rip"] = _ripples_to_wire(m["rip"])
    return pack(m)


def encode_event(**fields: Any) -> bytes:
    """Write an ``event`` frame: a trigger fired.

    Parameters
    ----------
    source : str
        Name of the placeloop instance publishing.
    seq : int
        Sequence number on the event stream, 0, 1, 2, ...
    event_id : int
        The trigger event's id, unique in the session.
    zone, rule : str
        The zone entered and the rule that fired.
    t_s : float
        Data time (acquisition seconds) of the decoding step.
    map_xy_cm, mean_xy_cm : (2,) floats
        Decoded maximum a posteriori and posterior-mean positions.
    zone_mass : float
        The zone's posterior mass, 0..1.
    tracked_xy_cm : (2,) floats
        Tracked position at ``t_s``, NaN when lost.
    wall_received_s, wall_decoded_s : float
        Wall-clock seconds at receipt of the message that closed the step
        and at the end of decoding.
    wall_sent_s : float, optional
        Wall-clock seconds at sending; taken now if not given.

    Returns
    -------
    bytes
    """
    fields.setdefault("wall_sent_s", time.time())
    return _encode_output("event", fields)


def encode_state(**fields: Any) -> bytes:
    """Write a ``state`` frame: the decoder after one step, for monitoring.

    Parameters
    ----------
    source : str
    seq : int
        Sequence number on the state stream.
    t_s : float
        Data time of the step, seconds.
    state : str
        Session state name.
    armed : bool
    map_xy_cm, mean_xy_cm, tracked_xy_cm : (2,) floats
        Positions in cm; the tracked one is NaN when lost.
    hpd95_size : float
        Size of the 95% highest-posterior-density region, cm² in an arena,
        cm on a track or graph.
    peak_prob : float
        Largest posterior probability of one bin.
    zone_masses : dict of str to float
        Posterior mass of each zone.
    n_spikes : int
        Spikes in the decoding window.
    posterior : ndarray, shape (n_bins,) or grid_shape, optional
        Sent as float32.
    grid_shape : sequence of int, optional
        ``(ny, nx)`` for an arena, ``(n_bins,)`` otherwise; defaults to the
        posterior's own shape.
    stats : dict of str to number, optional
        Counters and latency figures.
    ripples : dict, optional
        The ripple view (:func:`ripple_view`): the detector's envelope and
        thresholds and the newest candidate events' decoded sequences;
        PROTOCOL.md, section 8, gives its keys and limits.

    Returns
    -------
    bytes
    """
    return _encode_output("state", fields)


def decode_output(data: bytes) -> dict:
    """Read an ``event`` or ``state`` frame into a dict of Python names.

    Returns
    -------
    dict
        ``{"kind": "event" | "state", <name>: value, ...}`` with the names of
        :func:`encode_event` / :func:`encode_state`; positions as tuples,
        ``posterior`` as a float32 array of ``grid_shape`` (or None), absent
        optional fields as None.

    Raises
    ------
    ProtocolError
    """
    m = unpack(data, MAX_OUTPUT_FRAME_BYTES, OUTPUT_LIMITS)
    kind = read_kind(m, OUTPUT_KINDS)
    out: dict[str, Any] = {"kind": kind}
    for f in _OUTPUT_FIELDS[kind]:
        if f.key not in m:
            if f.required:
                raise ProtocolError("missing_field", f"an {kind!r} message needs the key {f.key!r}")
            out[f.name] = None
            continue
        if f.type == "posterior" and not isinstance(m[f.key], bytes):
            raise ProtocolError("bad_array", "'post' must be bin holding little-endian float32 values")
        value = _check_value(f, _ripples_from_wire(m[f.key]) if f.type == "ripples" else m[f.key])
        out[f.name] = tuple(value) if f.type in ("xy", "shape") else value
    if (out.get("posterior") is None) != (out.get("grid_shape") is None):
        raise ProtocolError("missing_field", "'post' and 'shape' travel together")
    if out.get("posterior") is not None:
        if math.prod(out["grid_shape"]) != out["posterior"].size:
            raise ProtocolError(
                "length_mismatch",
                f"'shape' {list(out['grid_shape'])} does not hold the {out['posterior'].size} values of 'post'",
            )
        out["posterior"] = out["posterior"].reshape(out["grid_shape"])
    return out


def encode_control_reply(ok: bool, **fields: Any) -> bytes:
    """Write a reply on the control socket.

    Parameters
    ----------
    ok : bool
        Whether the command was accepted.
    **fields
        Anything the command reports (plain values, numpy scalars or arrays).
        A refusal (``ok=False``) must carry ``error``, a sentence for the user.
    """
    if not isinstance(ok, (bool, np.bool_)):
        raise ProtocolError("bad_field", f"ok must be true or false, got {ok!r}")
    clash = {"v", "k", "ok"} & set(fields)
    if clash:
        raise ProtocolError("bad_field", f"reply fields may not be named {sorted(clash)}")
    if not ok and not isinstance(fields.get("error"), str):
        raise ProtocolError("missing_field", "a refusal (ok=False) needs error, a sentence saying why")
    return pack({"v": PROTOCOL_VERSION, "k": REPLY_KIND, "ok": bool(ok)} | fields)


def decode_control_reply(data: bytes) -> dict:
    """Read a control reply into ``{"ok": bool, **fields}``."""
    m = unpack(data, MAX_OUTPUT_FRAME_BYTES, OUTPUT_LIMITS)
    read_kind(m, (REPLY_KIND,))
    ok = require(m, "ok", REPLY_KIND)
    if not isinstance(ok, bool):
        raise ProtocolError("bad_field", f"'ok' must be true or false, got {ok!r}")
    if not ok and not isinstance(m.get("error"), str):
        raise ProtocolError("missing_field", "a refusal (ok false) needs 'error', a sentence saying why")
    return {key: value for key, value in m.items() if key not in ("v", "k")}


# ---------------------------------------------------------------------------
# The ripple view on the state stream (PROTOCOL.md, section 8, "rip")

#: Envelope values in one state frame at most (the detector keeps 8 s at 10 ms: 800).
RIPPLE_ENVELOPE_MAX = 2000
#: Candidate events in one state frame at most (the newest).
RIPPLE_EVENTS_MAX = 8
#: Content bins of one event in one state frame at most (its first).
RIPPLE_BINS_MAX = 200
#: Names of decided content rules, and zones in an event's log odds, of one event at most.
RIPPLE_NAMES_MAX = 64
#: Log odds beyond this size travel as this (a hypothesis without likelihood gives an infinite one).
RIPPLE_LOG_ODDS_MAX = 1000.0
#: A loop attaches the ripple view to a state frame at least this often (wall s) while frames flow.
RIPPLE_VIEW_PERIOD_S = 0.25
#: ... and sooner when an event begins or ends, but never twice within this (wall s).
RIPPLE_VIEW_MIN_GAP_S = 0.05

_RIPPLE_KEYS = (("threshold_sd", "thr"), ("end_sd", "end"), ("ready", "rdy"), ("t0_s", "t0"), ("step_s", "dt"),
                ("envelope_sd", "env"), ("n_events", "n"), ("events", "ev"))
_EVENT_KEYS = (("onset_s", "on"), ("offset_s", "off"), ("decided", "dec"), ("decision_s", "ds"), ("bins", "sq"),
               ("log_odds", "lo"))
_RIPPLE_NAMES = frozenset(name for name, _ in _RIPPLE_KEYS)
_EVENT_NAMES = frozenset(name for name, _ in _EVENT_KEYS)
#: Columns of an event's ``bins``: bin end (ms after the onset), MAP x and y (cm), spikes.
RIPPLE_BIN_COLUMNS = 4


def ripple_view(detector, events, n_events: int = RIPPLE_EVENTS_MAX, envelope_s: float = 6.0,
                cache: dict | None = None) -> dict | None:
    """The ``ripples`` field of a state frame, from the session's ripple stream.

    Parameters
    ----------
    detector : RippleDetector or None
        ``RippleStream.detector``; None (no LFP yet) gives None.
    events : sequence of ContentEvent
        ``RippleStream.events_``; the newest ``n_events`` are sent, each with
        its first ``RIPPLE_BINS_MAX`` content bins.
    envelope_s : float, default 6.0
        Data seconds of the envelope trace sent.
    cache : dict, optional
        Kept by the caller from view to view: an event is converted, checked
        and put in wire form once per state of it (its bins, decided
        content and offset), so a view costs little more than its newest
        event.

    Returns
    -------
    dict or None
        The Python names of :func:`encode_state`'s ``ripples``.
    """
    if detector is None:
        return None
    t0_s, envelope = detector.trace_.recent(envelope_s)
    newest = list(itertools.islice(reversed(events), min(n_events, RIPPLE_EVENTS_MAX)))[::-1]
    cache = {} if cache is None else cache
    if len(cache) > 4 * RIPPLE_EVENTS_MAX:
        cache.clear()
    out_events = []
    for e in newest:
        # An event only ever gains bins and decisions, and its offset comes once.
        key = (e.onset_s, len(e.sequence), len(e.decided or ()), math.isnan(e.offset_s))
        checked = cache.get(key)
        if checked is None:
            bins = np.array(e.sequence[:RIPPLE_BINS_MAX], np.float64).reshape(-1, RIPPLE_BIN_COLUMNS)
            bins[:, 0] = (bins[:, 0] - e.onset_s) * 1e3
            checked = cache[key] = _ripple_event({
                "onset_s": e.onset_s, "offset_s": e.offset_s, "decided": list(e.decided or ())[:RIPPLE_NAMES_MAX],
                "decision_s": e.decision_s, "bins": bins.astype(_F32),
                "log_odds": wire_log_odds(e.log_odds)})
        out_events.append(checked)
    return _ripples_value({"threshold_sd": detector.threshold_sd, "end_sd": detector.end_sd,
                           "ready": bool(detector.ready_), "t0_s": t0_s, "step_s": detector.trace_.step_s,
                           "envelope_sd": envelope[-RIPPLE_ENVELOPE_MAX:], "n_events": len(events),
                           "events": out_events})


def wire_log_odds(log_odds: list) -> np.ndarray:
    """An event's log odds (2 rows of n_zones) as the flat float32 vector ``lo``: towards row, then away row.

    The first ``RIPPLE_NAMES_MAX`` zones; sizes beyond ``RIPPLE_LOG_ODDS_MAX`` clipped to it, NaN kept;
    empty before the event's first bin.
    """
    if not log_odds:
        return np.zeros(0, _F32)
    a = np.array(log_odds, np.float64)[:, :RIPPLE_NAMES_MAX]
    return np.clip(a, -RIPPLE_LOG_ODDS_MAX, RIPPLE_LOG_ODDS_MAX).astype(_F32).ravel()


class _CheckedEvent(dict):
    """One event of a ripple view as :func:`_ripple_event` returns it; its wire form is made once."""

    _wire: dict | None = None

    def wire(self) -> dict:
        if self._wire is None:
            self._wire = {key: _wire_value(self[name]) for name, key in _EVENT_KEYS}
        return self._wire


class _CheckedRipples(dict):
    """A ripple view as :func:`_ripples_value` returns it: checked, so encoding it again checks nothing."""


def _wire_value(x: Any) -> Any:
    """Arrays as bin (little-endian, row-major); everything else as it is."""
    return np.ascontiguousarray(x).tobytes() if isinstance(x, np.ndarray) else x


def _bad_ripples(expected: str, value: Any) -> ProtocolError:
    return ProtocolError("bad_field", f"ripples ('rip') {expected}, got {describe(value)}")


def _f32(name: str, value: Any, limit: int, columns: int = 0) -> np.ndarray:
    """Float32 values, finite or NaN, from bin (little-endian float32) or a sequence.

    A vector of at most ``limit`` values; with ``columns``, a matrix of that
    many columns and at most ``limit`` rows (bin holds it row-major).
    """
    if isinstance(value, np.ndarray) and value.dtype == _F32:
        a = value  # as ripple_view builds it: no copy, no conversion
    elif isinstance(value, bytes):
        if len(value) % _F32.itemsize:
            raise ProtocolError("bad_array", f"ripples {name!r} has {len(value)} bytes, not whole float32 values")
        a = np.frombuffer(value, dtype=_F32)
    else:
        try:
            with np.errstate(over="ignore"):
                a = np.asarray(value, dtype=np.float32)
        except (TypeError, ValueError, OverflowError):
            raise _bad_ripples(f"{name!r} must be numbers", value) from None
    if columns:
        if a.ndim == 1 and a.size % columns == 0:
            a = a.reshape(-1, columns)
        if a.ndim != 2 or a.shape[1] != columns or a.shape[0] > limit:
            raise _bad_ripples(f"{name!r} must be at most {limit} rows of {columns} values", value)
    elif a.ndim != 1 or a.size > limit:
        raise _bad_ripples(f"{name!r} must be a vector of at most {limit} values", value)
    if np.isinf(a).any():
        raise _bad_ripples(f"{name!r} must hold float32 values, NaN where unknown, never infinite", value)
    return a


def _real(name: str, value: Any, finite: bool = False) -> float:
    if not isinstance(value, (int, float, np.integer, np.floating)) or isinstance(value, (bool, np.bool_)):
        raise _bad_ripples(f"{name!r} must be a number", value)
    try:
        x = float(value)
    except OverflowError:
        raise _bad_ripples(f"{name!r} must be a float", value) from None
    if math.isinf(x) or (finite and math.isnan(x)):
        raise _bad_ripples(f"{name!r} must be {'finite' if finite else 'a number or NaN'}", value)
    return x


def _ripple_event(e: Any) -> _CheckedEvent:
    if isinstance(e, _CheckedEvent):
        return e
    if not isinstance(e, dict) or not _EVENT_NAMES.issuperset(e):
        raise _bad_ripples("events must be maps of " + ", ".join(n for n, _ in _EVENT_KEYS), e)
    decided = e.get("decided", [])
    if not isinstance(decided, (list, tuple)) or len(decided) > RIPPLE_NAMES_MAX or not all(
            isinstance(d, str) and d for d in decided):
        raise _bad_ripples(f"'decided' must be at most {RIPPLE_NAMES_MAX} rule names", decided)
    bins = _f32("bins", e.get("bins", ()), RIPPLE_BINS_MAX, RIPPLE_BIN_COLUMNS)
    spikes = bins[:, 3]
    if not ((spikes >= 0) & (spikes == np.floor(spikes))).all():
        raise _bad_ripples("'bins' must hold a whole, non-negative spike count in its fourth column", value=spikes)
    odds = _f32("log_odds", e.get("log_odds", ()), 2 * RIPPLE_NAMES_MAX)
    if odds.size % 2:
        raise _bad_ripples("'log_odds' must hold two rows of one value per zone (towards, then away)", odds)
    return _CheckedEvent(onset_s=_real("onset_s", e.get("onset_s"), finite=True),
                         offset_s=_real("offset_s", e.get("offset_s", math.nan)), decided=list(decided),
                         decision_s=_real("decision_s", e.get("decision_s", math.nan)), bins=bins,
                         log_odds=odds)


def _ripples_value(value: Any) -> _CheckedRipples:
    """Validate a ripple view (Python names) and return it with arrays as float32."""
    if isinstance(value, _CheckedRipples):
        return value
    if not isinstance(value, dict) or not _RIPPLE_NAMES.issuperset(value):
        raise _bad_ripples("must be a map of " + ", ".join(n for n, _ in _RIPPLE_KEYS), value)
    events = value.get("events", [])
    if not isinstance(events, (list, tuple)) or len(events) > RIPPLE_EVENTS_MAX:
        raise _bad_ripples(f"'events' must be a list of at most {RIPPLE_EVENTS_MAX}", events)
    n_events = value.get("n_events", len(events))
    if not isinstance(n_events, (int, np.integer)) or isinstance(n_events, (bool, np.bool_)) or n_events < 0:
        raise _bad_ripples("'n_events' must be a non-negative integer", n_events)
    ready = value.get("ready", False)
    if not isinstance(ready, (bool, np.bool_)):
        raise _bad_ripples("'ready' must be true or false", ready)
    step_s = _real("step_s", value.get("step_s"), finite=True)
    if step_s <= 0:
        raise _bad_ripples("'step_s' must be positive", step_s)
    return _CheckedRipples(threshold_sd=_real("threshold_sd", value.get("threshold_sd"), finite=True),
                           end_sd=_real("end_sd", value.get("end_sd"), finite=True), ready=bool(ready),
                           t0_s=_real("t0_s", value.get("t0_s", math.nan)), step_s=step_s,
                           envelope_sd=_f32("envelope_sd", value.get("envelope_sd", ()), RIPPLE_ENVELOPE_MAX),
                           n_events=int(n_events), events=[_ripple_event(e) for e in events])


def _ripples_to_wire(value: _CheckedRipples) -> dict:
    """Python names to wire keys; float32 arrays as bin."""
    out = {key: _wire_value(value[name]) for name, key in _RIPPLE_KEYS if name != "events"}
    out["ev"] = [e.wire() for e in value["events"]]
    return out


def _ripples_from_wire(m: Any) -> dict:
    """Wire keys to Python names (unknown keys ignored, as everywhere on the output streams)."""
    if not isinstance(m, dict):
        raise _bad_ripples("must be a map", m)
    out = {name: m[key] for name, key in _RIPPLE_KEYS if key in m and name != "events"}
    events = m.get("ev", [])
    if not isinstance(events, list) or len(events) > RIPPLE_EVENTS_MAX:
        raise _bad_ripples(f"'ev' must be a list of at most {RIPPLE_EVENTS_MAX}", events)
    out["events"] = [{name: e[key] for name, key in _EVENT_KEYS if key in e} if isinstance(e, dict) else e
                     for e in events]
    return out
