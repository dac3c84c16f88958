"""``placeloop import``: an NWB recording as a placeloop session log.

The recording's sorted units and tracked position become the messages a
live rig would have sent, in the order it would have sent them: the
sources' announcements, then per ``batch_s`` of data time one spike batch,
the tracker frames of that stretch and a heartbeat from the spike source; with ``--marks`` the
spike source also announces its electrode groups and sends the marked
spikes of each stretch, and with ``--lfp`` an ``"lfp"`` source sends the
series in chunks of a few ms, each with the batch in which its last sample
was taken.
Both sources run on the file's own clock (seconds from its
``session_start_time``), so no sync pulses are needed, and the log's receive
times are ``session_start_time`` plus data time. The part of the session to
learn from becomes the control requests an experiment script would have
sent (``start_learning`` where each learning interval starts,
``stop_learning`` where it ends, ``fit`` at the end of the last), so a
replay learns, fits and decodes exactly there.

Beside the log goes a config skeleton for the user to complete: the
environment guessed from the positions (marked as guessed), default model
and decoder settings, and no zones or rules.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from decoder.config import parse_config
from decoder.messages import (ControlCommand, GroupAnnounce, Heartbeat, MarkedSpikes, SourceAnnounce, SpikeBatch,
                              TrackerFrames)
from decoder.signals.lfp_chunk import LfpChunk
from rig_adapters.exchange.nwb_reading import NwbImportError, NwbRecording, read_recording
from rig_adapters.exchange.session_writing import write_session_log

log = logging.getLogger(__name__)

__all__ = ["ImportResult", "import_nwb", "learning_intervals", "guess_environment", "session_messages",
           "SPIKE_SOURCE", "TRACKER_SOURCE", "LFP_SOURCE", "BATCH_S", "LFP_CHUNK_S"]

#: Source names of the imported session; the config skeleton's [sources] defaults and its [ripples] source.
SPIKE_SOURCE, TRACKER_SOURCE, LFP_SOURCE = "ephys", "tracker", "lfp"

#: Data time per LFP chunk (s): an acquisition system sends a few ms at a time (PROTOCOL.md, lfp).
LFP_CHUNK_S = 0.004

#: Data time covered by one spike batch and closed by one heartbeat (s): a rig sends a batch every
#: 10-20 ms (PROTOCOL.md, heartbeats at least once per decoding step).
BATCH_S = 0.02

#: The spike source's announced sample rate (Hz). NWB spike times carry no rate, and the decoder uses none.
NOMINAL_SPIKE_RATE_HZ = 30000.0

#: Bin sizes the skeleton chooses from (cm), the one nearest to the environment's longest side / 40.
_BIN_CHOICES_CM = (1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 7.5, 10.0)


@dataclass(frozen=True)
class ImportResult:
    """What an import wrote and decided."""

    log_dir: Path
    start_s: float
    stop_s: float
    learn_intervals_s: tuple[tuple[float, float], ...]
    learn_source: str
    environment: dict
    n_units: int
    n_spikes: int
    n_frames: int
    notes: tuple[str, ...]
    n_marked_spikes: int = 0
    n_groups: int = 0
    n_lfp_chunks: int = 0


def learning_intervals(recording: NwbRecording, start_s: float, stop_s: float,
                       learn_s: tuple[float, float] | None = None, learn_epoch: str | None = None,
                       learn_trials: tuple[int, int] | None = None) -> tuple[list[tuple[float, float]], str]:
    """The part of the session to learn from, clipped to ``[start_s, stop_s]``.

    At most one of the choices may be given. Without any: the file's first
    epoch when it has two or more, else the first half of the time range.

    Parameters
    ----------
    recording : NwbRecording
    start_s, stop_s : float
        The imported time range (s).
    learn_s : (float, float), optional
        One interval in the file's seconds.
    learn_epoch : str, optional
        Epochs whose tags include this word, or the epoch of this row number (0-based).
    learn_trials : (int, int), optional
        Trials ``first`` to ``last - 1`` by row (a Python slice).

    Returns
    -------
    intervals : list of (start_s, stop_s)
        Sorted, merged, non-empty.
    source : str
        How they were chosen, for the user.
    """
    given = [c is not None for c in (learn_s, learn_epoch, learn_trials)]
    if sum(given) > 1:
        raise NwbImportError("choose the learning part one way only: --learn-s, --learn-epoch or --learn-trials")
    if learn_s is not None:
        raw, source = [tuple(learn_s)], f"--learn-s {learn_s[0]:g}:{learn_s[1]:g}"
    elif learn_epoch is not None:
        rows = recording.epochs
        if learn_epoch.isdigit() and int(learn_epoch) < len(rows):
            raw = [rows[int(learn_epoch)][:2]]
        else:
            raw = [r[:2] for r in rows if learn_epoch in r[2]]
        if not raw:
            tags = sorted({t for r in rows for t in r[2]})
            raise NwbImportError(f"{recording.path}: no epoch is tagged {learn_epoch!r} or has that row number; "
                                 f"the file has {len(rows)} epochs with tags {tags or 'none'}")
        source = f"epochs {learn_epoch!r}"
    elif learn_trials is not None:
        chosen = recording.trials[slice(*learn_trials)]
        if not chosen:
            raise NwbImportError(f"{recording.path}: trials {learn_trials[0]}:{learn_trials[1]} select nothing; "
                                 f"the file has {len(recording.trials)} trials")
        raw, source = [r[:2] for r in chosen], f"trials {learn_trials[0]}:{learn_trials[1]}"
    elif len(recording.epochs) >= 2:
        raw, source = [recording.epochs[0][:2]], "the file's first epoch"
    else:
        raw, source = [(start_s, start_s + (stop_s - start_s) / 2)], "the first half of the time range"
    merged: list[list[float]] = []
    for a, b in sorted((max(a, start_s), min(b, stop_s)) for a, b in raw):
        if b <= a:
            continue
        if merged and a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    if not merged:
        raise NwbImportError(f"the learning part ({source}) lies outside the imported range "
                             f"{start_s:g}-{stop_s:g} s; widen --start-s/--stop-s or choose another part")
    if merged[-1][1] >= stop_s:
        log.warning("the learning part reaches the end of the imported range: nothing is left to decode")
    return [(a, b) for a, b in merged], source


def guess_environment(xy_cm: np.ndarray, dims: int) -> dict:
    """An ``[environment]`` table that covers the tracked positions: a guess for the user to check.

    A 1-D series, or positions whose narrow side is under a tenth of the
    long one, give a linear track along the long side; positions that leave
    the corners of their bounding square empty give a circle; anything
    else the bounding rectangle. The bin is the longest side / 40 rounded
    to a common size; a margin of one bin goes around.

    Parameters
    ----------
    xy_cm : ndarray, shape (n, 2)
        NaN rows are ignored.
    dims : int
        1 or 2, the position series' dimensions.

    Returns
    -------
    dict
        Keys as in a config's ``[environment]`` table.
    """
    xy = xy_cm[np.isfinite(xy_cm).all(axis=1)]
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    extent = np.maximum(hi - lo, 1e-6)
    longest = float(extent.max())
    bin_cm = min(_BIN_CHOICES_CM, key=lambda b: abs(b - longest / 40))
    margin = bin_cm
    if dims == 1 or extent.min() < 0.1 * longest:
        axis = int(np.argmax(extent))
        mid = (lo + hi) / 2
        start, end = mid.copy(), mid.copy()
        start[axis], end[axis] = lo[axis] - margin, hi[axis] + margin
        return {"kind": "linear_track", "start_cm": _pair(start), "end_cm": _pair(end), "bin_cm": bin_cm,
                "max_distance_cm": float(max(10.0, extent[1 - axis] / 2 + margin))}
    centre = (lo + hi) / 2
    radius = float(extent.max() / 2)
    in_circle = np.hypot(*(xy - centre).T) <= radius * 1.02
    if extent.min() > 0.9 * longest and in_circle.mean() > 0.99:
        return {"kind": "circle", "center_cm": _pair(centre), "radius_cm": round(radius + margin, 1), "bin_cm": bin_cm}
    return {"kind": "rectangle", "origin_cm": _pair(lo - margin), "width_cm": round(float(extent[0]) + 2 * margin, 1),
            "height_cm": round(float(extent[1]) + 2 * margin, 1), "bin_cm": bin_cm}


def _pair(v: np.ndarray) -> list[float]:
    return [round(float(v[0]), 1), round(float(v[1]), 1)]


def _toml_value(value) -> str:
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(float(value))


def config_skeleton(recording: NwbRecording, environment: dict, learn: list, learn_source: str, arm: bool) -> str:
    """The TOML config written beside an imported log: valid as it stands, to be completed by the user."""
    env_lines = "\n".join(f"{k} = {_toml_value(v)}" for k, v in environment.items())
    parts = ", ".join(f"{a:g}-{b:g} s" for a, b in learn)
    return f"""\
# Config skeleton written by `placeloop import` for {recording.path.name}
# (NWB identifier {recording.identifier!r}). It replays as it stands; complete it before a sweep or a
# dry run: check the environment, then add [[zones]] and [[rules]].
#
# GUESSED from the tracked positions ({recording.position_name}): the environment's kind, its
# size and the bin size below. Check them against the real apparatus.
#
# The learning part ({learn_source}: {parts}) is in the log as control requests
# (start_learning, stop_learning, fit{", arm" if arm else ""}), as an experiment script sends them; [session] learn_s
# stays 0. A replay never drives hardware; an armed replay shows which events the rules would have fired.

[environment]  # GUESSED
{env_lines}

[model]
min_speed_cm_s = 3.0
smooth_cm = 5.0

[decoder]
window_s = 0.2
step_s = 0.02

[sources]
spikes = "{SPIKE_SOURCE}"
tracker = "{TRACKER_SOURCE}"

[session]
learn_s = 0.0
{_signal_tables(recording)}"""


def _signal_tables(recording: NwbRecording) -> str:
    out = ""
    if recording.marks is not None:
        out += (f"\n# Marks from the file's {recording.marks.source}: decoded clusterless (docs/CONFIG.md, [marks]).\n"
                "[marks]\nenabled = true\n")
    if recording.lfp is not None:
        out += (f"\n# LFP from the file's ElectricalSeries {recording.lfp.name!r}; add a [[rules]] of kind "
                f"\"ripple\" to act on ripples.\n[ripples]\nsource = \"{LFP_SOURCE}\"\n")
    return out


def session_messages(recording: NwbRecording, start_s: float, stop_s: float, learn: list,
                     batch_s: float = BATCH_S, arm: bool = True, lfp_chunk_s: float = LFP_CHUNK_S):
    """The recording's messages as a live rig sends them, as ``(t_end_s, messages)`` chunks.

    Parameters
    ----------
    recording : NwbRecording
    start_s, stop_s : float
        Data time to cover (s).
    learn : list of (start_s, stop_s)
        Learning intervals; their ends are chunk edges, so the control
        requests land on them exactly.
    batch_s : float
        Data time per spike batch and heartbeat (s).
    arm : bool
        Arm the triggers right after the fit, as a script choosing zones in a replay would.
    lfp_chunk_s : float
        Data time per LFP chunk (s), when the recording has an LFP.

    Yields
    ------
    (float, list of InputMessage)
    """
    seq = {SPIKE_SOURCE: 0, TRACKER_SOURCE: 0, LFP_SOURCE: 0, "operator": 0}

    def stamped(cls, source, **fields):
        msg = cls(source=source, seq=seq[source], **fields)
        seq[source] += 1
        return msg

    frame_t, xy, head = recording.frame_t_s, recording.frame_xy_cm, recording.frame_head_rad
    frame_rate = 1.0 / float(np.median(np.diff(frame_t))) if frame_t.size > 1 else 30.0
    marks = recording.marks
    announce = [stamped(SourceAnnounce, SPIKE_SOURCE, kind="spikes", clock="acquisition",
                        sample_rate_hz=NOMINAL_SPIKE_RATE_HZ, unit_ids=recording.unit_ids)]
    if marks is not None:
        announce.append(stamped(GroupAnnounce, SPIKE_SOURCE, group_ids=marks.group_ids,
                                group_channels=marks.group_channels))
    announce.append(stamped(SourceAnnounce, TRACKER_SOURCE, kind="tracker", clock="acquisition",
                            sample_rate_hz=frame_rate))
    yield 0.0, announce
    lfp = _lfp_chunks(recording.lfp, start_s, stop_s, lfp_chunk_s) if recording.lfp is not None else []
    lfp_ends = np.array([t + x.shape[0] / recording.lfp.rate_hz for t, x in lfp]) if lfp else np.zeros(0)
    width = marks.group_channels[marks.group_id] if marks is not None else None
    commands: dict[float, list[str]] = {}
    for i, (a, b) in enumerate(learn):
        commands.setdefault(a, []).append("start_learning")
        commands.setdefault(b, []).extend(["fit", "arm"][: 1 + arm] if i == len(learn) - 1 else ["stop_learning"])
    first = math.floor(start_s / batch_s) * batch_s
    grid = first + batch_s * np.arange(1, int(math.ceil((stop_s - first) / batch_s)) + 1)
    edges = np.unique(np.concatenate([grid[grid < stop_s], [stop_s], list(commands)]))
    edges = edges[edges > start_s]
    spikes, frames = recording.spike_t_s, frame_t
    s_lo = int(np.searchsorted(spikes, start_s, side="left"))
    f_lo = int(np.searchsorted(frames, start_s, side="left"))
    s_hi_all = np.searchsorted(spikes, edges, side="left")
    f_hi_all = np.searchsorted(frames, edges, side="left")
    m_t = marks.t_s if marks is not None else np.zeros(0)
    m_lo = int(np.searchsorted(m_t, start_s, side="left"))
    m_hi_all = np.searchsorted(m_t, edges, side="left")
    # An LFP chunk goes out with the batch during which its last sample was taken; the last batch takes the rest.
    l_hi_all = np.searchsorted(lfp_ends, edges, side="right")
    l_hi_all[-1:] = len(lfp)
    l_lo = 0
    pending = commands.get(start_s, [])
    for t1, s_hi, f_hi, m_hi, l_hi in zip(edges.tolist(), s_hi_all.tolist(), f_hi_all.tolist(), m_hi_all.tolist(),
                                          l_hi_all.tolist()):
        out = [stamped(ControlCommand, "operator", command=c) for c in pending]
        timed = []
        if s_hi > s_lo:
            timed.append((spikes[s_lo], stamped(SpikeBatch, SPIKE_SOURCE, t_s=spikes[s_lo:s_hi],
                                                unit_id=recording.spike_unit[s_lo:s_hi])))
        if f_hi > f_lo:
            timed.append((frames[f_lo], stamped(
                TrackerFrames, TRACKER_SOURCE, t_s=frames[f_lo:f_hi], xy_cm=xy[f_lo:f_hi],
                head_dir_rad=None if head is None else head[f_lo:f_hi])))
        if m_hi > m_lo:
            # One width per message (PROTOCOL.md, marks): groups of another channel count go in their own.
            for w in np.unique(width[m_lo:m_hi]).tolist():
                pick = m_lo + np.flatnonzero(width[m_lo:m_hi] == w)
                timed.append((m_t[pick[0]], stamped(MarkedSpikes, SPIKE_SOURCE, t_s=m_t[pick],
                                                    group_id=marks.group_id[pick], marks_uv=marks.marks_uv[pick, :w])))
        for t0, samples in lfp[l_lo:l_hi]:
            timed.append((t0, stamped(LfpChunk, LFP_SOURCE, t_s=t0, rate_hz=recording.lfp.rate_hz, samples=samples)))
        timed.sort(key=lambda item: item[0])
        out.extend(msg for _, msg in timed)
        out.append(stamped(Heartbeat, SPIKE_SOURCE, t_s=float(t1)))
        s_lo, f_lo, m_lo, l_lo = s_hi, f_hi, m_hi, l_hi
        # A request at an edge follows the heartbeat that brings data time to it.
        pending = commands.get(t1, [])
        if t1 == edges[-1]:
            out.extend(stamped(ControlCommand, "operator", command=c) for c in pending)
        yield t1, out


def _lfp_chunks(lfp, start_s: float, stop_s: float, chunk_s: float) -> list:
    """The LFP's runs within ``[start_s, stop_s)`` cut into chunks of ``chunk_s``, as ``(t0_s, samples)``."""
    per_chunk = max(1, int(round(chunk_s * lfp.rate_hz)))
    out = []
    for t0, x in lfp.runs:
        t = t0 + np.arange(x.shape[0]) / lfp.rate_hz
        lo, hi = np.searchsorted(t, [start_s, stop_s], side="left")
        out.extend((float(t[i]), x[i: min(i + per_chunk, hi)]) for i in range(int(lo), int(hi), per_chunk))
    return out


def import_nwb(path: str | Path, log_dir: str | Path, position: str | None = None, head_direction: str | None = None,
               cm_per_unit: float | None = None, start_s: float | None = None, stop_s: float | None = None,
               learn_s: tuple[float, float] | None = None, learn_epoch: str | None = None,
               learn_trials: tuple[int, int] | None = None, batch_s: float = BATCH_S, arm: bool = True,
               marks: bool = False, lfp: str | None = None, lfp_chunk_s: float = LFP_CHUNK_S) -> ImportResult:
    """Write the session log of an NWB recording, with a config skeleton beside it.

    Parameters are those of ``placeloop import`` (see :func:`read_recording`
    and :func:`learning_intervals`); ``start_s``/``stop_s`` limit the
    imported range (default: the spikes' and positions' common span).
    ``marks`` adds the file's marked spikes (``groups`` and ``marks``
    messages, and ``[marks] enabled`` in the skeleton); ``lfp`` names an
    ElectricalSeries sent as ``lfp`` chunks of ``lfp_chunk_s`` from source
    ``"lfp"`` (and ``[ripples] source`` in the skeleton).

    Returns
    -------
    ImportResult

    Raises
    ------
    NwbImportError
        With a sentence naming what is missing; no session directory is left behind.
    FileExistsError
        If ``log_dir`` exists.
    """
    if Path(log_dir).exists():
        raise FileExistsError(f"{log_dir} exists already; placeloop never overwrites a session. "
                              "Choose a new directory.")
    if not (isinstance(batch_s, (int, float)) and 0 < batch_s <= 1):
        raise NwbImportError(f"batch_s must be a positive number of seconds up to 1, got {batch_s!r}")
    if not (isinstance(lfp_chunk_s, (int, float)) and 0 < lfp_chunk_s <= 0.1):
        raise NwbImportError(f"lfp_chunk_s must be a positive number of seconds up to 0.1, got {lfp_chunk_s!r}")
    recording = read_recording(path, position=position, head_direction=head_direction, cm_per_unit=cm_per_unit,
                               marks=marks, lfp=lfp, start_s=start_s, stop_s=stop_s)
    seen = recording.frame_t_s[np.isfinite(recording.frame_xy_cm).all(axis=1)]
    spikes = np.concatenate([recording.spike_t_s[[0, -1]] if recording.spike_t_s.size else np.zeros(0),
                             recording.marks.t_s[[0, -1]] if recording.marks is not None else np.zeros(0)])
    lo = max(float(spikes.min()), float(seen[0]))
    hi = min(float(spikes.max()), float(seen[-1]))
    start = lo if start_s is None else max(float(start_s), lo)
    stop = hi if stop_s is None else min(float(stop_s), hi)
    if not stop > start:
        raise NwbImportError(f"{path}: the spikes ({spikes.min():g}-{spikes.max():g} s) and "
                             f"positions ({seen[0]:g}-{seen[-1]:g} s) share no time within the range asked for")
    learn, learn_source = learning_intervals(recording, start, stop, learn_s, learn_epoch, learn_trials)
    in_range = (recording.frame_t_s >= start) & (recording.frame_t_s < stop)
    environment = guess_environment(recording.frame_xy_cm[in_range], recording.position_dims)
    text = config_skeleton(recording, environment, learn, learn_source, arm)
    parse_config(text, "the config skeleton")  # a skeleton that does not load is a bug here, not the user's
    notes = list(recording.notes)
    if recording.has_waveforms and recording.marks is None:
        notes.append("the Units table has mean waveforms, one per unit: not marks; --marks reads per-spike features "
                     "(FeatureExtraction) or amplitudes")
    metadata = {
        "imported_from": str(Path(path).resolve()),
        "nwb_identifier": recording.identifier,
        "session_description": recording.session_description,
        "session_start_wall_s": recording.session_start_wall_s,
        "position_series": recording.position_name,
        "head_direction_series": recording.head_direction_name,
        "range_s": [start, stop],
        "learn_intervals_s": [list(p) for p in learn],
        "learn_source": learn_source,
        "armed_after_fit": arm,
        "subject": recording.subject,
        "marks": None if recording.marks is None else {
            "source": recording.marks.source, "groups": recording.marks.group_names,
            "channels": recording.marks.group_channels.tolist()},
        "lfp_series": None if recording.lfp is None else recording.lfp.name,
        "guessed": ["environment"],
        "notes": notes,
    }
    chunks = session_messages(recording, start, stop, learn, batch_s, arm, lfp_chunk_s)
    write_session_log(log_dir, text, chunks, metadata, recording.session_start_wall_s)
    n_spikes = int(np.count_nonzero((recording.spike_t_s >= start) & (recording.spike_t_s < stop)))
    n_marked = 0 if recording.marks is None else int(np.count_nonzero((recording.marks.t_s >= start)
                                                              & (recording.marks.t_s < stop)))
    n_lfp = 0 if recording.lfp is None else len(_lfp_chunks(recording.lfp, start, stop, lfp_chunk_s))
    return ImportResult(Path(log_dir), start, stop, tuple(learn), learn_source, environment,
                        int(recording.unit_ids.size), n_spikes, int(in_range.sum()), tuple(notes), n_marked,
                        0 if recording.marks is None else int(recording.marks.group_ids.size), n_lfp)
