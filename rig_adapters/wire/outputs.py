"""Output frames (placeloop -> subscribers) and control replies: fields to bytes and back.

An ``event`` (a trigger fired) and a ``state`` (the decoder after one step)
are declared once, as a table of fields (Python name, wire key, value type);
the writers :func:`encode_event` / :func:`encode_state` and the reader
:func:`decode_output` both follow it. Subscribers ignore keys they do not
know, so that a newer placeloop may add optional keys (PROTOCOL.md, section 11).
"""

from __future__ import annotations

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
        value = _check_value(f, m[f.key])
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
