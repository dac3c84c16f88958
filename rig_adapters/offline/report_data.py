"""What a session report is drawn from: one replay pass kept to what the figures need, and a sweep's result.

:func:`gather_session` replays a recorded session through the same pipeline
as ``placeloop replay`` and keeps a bounded :class:`SessionTrace` (evenly
thinned steps, the first minute step by step, posteriors only at events),
the live run's latency stamps and the fitted model, in a
:class:`SessionRecord`. :func:`load_sweep` reads a ``placeloop sweep``
result for the trade-off section.
"""

from __future__ import annotations

import copy
import json
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from decoder.config import ExperimentConfig
from decoder.encoding.place_model import ModelFileError, PlaceModel
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.session.ripples import ContentEvent
from decoder.space.environments import Arena, Environment
from rig_adapters.sessions.recorder import FITTED_MODEL_SIDECAR, INITIAL_MODEL_SIDECAR
from rig_adapters.sessions.replay import replay_session, session_config
from rig_adapters.sessions.summary import LatencySeries
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_EVENTS

log = logging.getLogger(__name__)

#: Event posteriors kept at most, evenly spread over the session's events.
MAX_EVENT_PANELS = 48

#: Decoded steps kept at most for the trajectory and error figures, evenly spread.
TRACE_SAMPLES = 4000

#: The first seconds of decoding kept step by step, drawn in detail when the session is long (s).
EXCERPT_S = 60.0

#: Session notices (fitted, armed, disarmed, ...) listed at most.
MAX_NOTICES = 200


class _EvenSample:
    """Every ``stride``-th item of a stream; the stride doubles whenever more than ``cap`` are kept.

    The kept items stay evenly spaced over everything offered so far, and
    memory stays bounded however long the stream runs.
    """

    def __init__(self, cap: int) -> None:
        self.cap = cap
        self.stride = 1
        self.seen = 0
        self.items: list = []

    def take(self) -> bool:
        """Count one more item of the stream; True when it is to be kept (then :meth:`keep` it)."""
        due = self.seen % self.stride == 0
        self.seen += 1
        return due

    def keep(self, item) -> None:
        self.items.append(item)
        if len(self.items) > self.cap:
            # Kept items sit at multiples of the stride; every other one sits at multiples of twice it.
            self.items = self.items[::2]
            self.stride *= 2


@dataclass(frozen=True)
class EventSnapshot:
    """What the report shows of one event: the posterior at its step and the positions.

    Attributes
    ----------
    event_id : int
    rule, zone : str
    t_s : float
        Data time of the step that fired (s).
    zone_mass : float
    posterior : ndarray of float32, shape (n_bins,)
    map_xy_cm, tracked_xy_cm, true_xy_cm : ndarray, shape (2,)
    far_from_zone : bool
        The pipeline's judgement: the animal was known to be farther than
        the false margin from the zone.
    """

    event_id: int
    rule: str
    zone: str
    t_s: float
    zone_mass: float
    posterior: np.ndarray
    map_xy_cm: np.ndarray
    tracked_xy_cm: np.ndarray
    true_xy_cm: np.ndarray
    far_from_zone: bool


class SessionTrace:
    """Keeps, from the pipeline's outputs, only what the report draws.

    Feed every output to :meth:`add` in order.

    Attributes
    ----------
    steps : _EvenSample
        Tuples ``(t_s, tracked x, y, MAP x, y, true x, y, error_cm)``.
    excerpt : list
        The same tuples for every step of the first ``excerpt_s`` of decoding.
    excerpt_s : float
        Length of the excerpt, s: ``EXCERPT_S`` when the trace was made.
    events : _EvenSample of EventSnapshot
    event_times_s : list of float
        Data time of every event (s), for the trajectory's tick marks.
    notices : list of (t_s, kind, text)
    """

    def __init__(self) -> None:
        self.steps = _EvenSample(TRACE_SAMPLES)
        self.excerpt: list[tuple] = []
        self.excerpt_s = EXCERPT_S
        self.events = _EvenSample(MAX_EVENT_PANELS)
        self.event_times_s: list[float] = []
        self.notices: list[tuple[float, str, str]] = []
        self.notices_dropped = 0
        self.first_step_s: float | None = None
        self.last_step_s: float | None = None

    def add(self, out: StepOutput | LearningProgress | Notice) -> None:
        if isinstance(out, StepOutput):
            self._add_step(out)
        elif isinstance(out, Notice):
            if len(self.notices) < MAX_NOTICES:
                self.notices.append((out.t_s, out.kind, _describe_notice(out.detail)))
            else:
                self.notices_dropped += 1

    def _add_step(self, out: StepOutput) -> None:
        if self.first_step_s is None:
            self.first_step_s = out.t_s
        self.last_step_s = out.t_s
        sampled = self.steps.take()
        in_excerpt = out.t_s - self.first_step_s <= self.excerpt_s
        if sampled or in_excerpt:
            row = (out.t_s, *out.tracked_xy_cm, *out.step.map_xy_cm, *out.true_xy_cm, out.error_cm)
            if sampled:
                self.steps.keep(row)
            if in_excerpt:
                self.excerpt.append(row)
        for event, far in zip(out.events, out.false_events):
            self.event_times_s.append(event.t_s)
            if self.events.take():
                self.events.keep(EventSnapshot(
                    event.event_id, event.rule, event.zone, event.t_s, float(event.zone_mass),
                    np.asarray(out.step.posterior, np.float32).copy(), np.array(out.step.map_xy_cm, float),
                    np.array(out.tracked_xy_cm, float), np.array(out.true_xy_cm, float), bool(far),
                ))

    def step_arrays(self, excerpt: bool = False) -> dict[str, np.ndarray]:
        """The kept steps (or the excerpt's) as arrays.

        Returns
        -------
        dict
            ``t_s (n,)``, ``tracked``, ``decoded``, ``true`` ``(n, 2)`` in cm, ``error_cm (n,)``.
        """
        a = np.array(self.excerpt if excerpt else self.steps.items, dtype=np.float64).reshape(-1, 8)
        return {"t_s": a[:, 0], "tracked": a[:, 1:3], "decoded": a[:, 3:5], "true": a[:, 5:7], "error_cm": a[:, 7]}


@dataclass
class LiveStamps:
    """The live run's wall-clock stamps on each event it sent, per stage (ms)."""

    received_to_decoded_ms: list[float] = field(default_factory=list)
    decoded_to_sent_ms: list[float] = field(default_factory=list)
    received_to_sent_ms: list[float] = field(default_factory=list)
    unreadable: int = 0

    def add(self, payload: bytes) -> None:
        try:
            event = protocol.decode_output(payload)
        except protocol.ProtocolError as exc:
            self.unreadable += 1
            log.warning("an event record of the log cannot be read (%s); its latency is left out", exc)
            return
        if event["kind"] != "event":
            return
        rx, dec, tx = event["wall_received_s"], event["wall_decoded_s"], event["wall_sent_s"]
        self.received_to_decoded_ms.append((dec - rx) * 1e3)
        self.decoded_to_sent_ms.append((tx - dec) * 1e3)
        self.received_to_sent_ms.append((tx - rx) * 1e3)

    @property
    def n(self) -> int:
        return len(self.received_to_sent_ms)


@dataclass
class SessionRecord:
    """Everything the report is drawn from.

    Attributes
    ----------
    log_dir : Path
    config : ExperimentConfig
    summary : dict
        The same keys as ``placeloop replay --summary``.
    trace : SessionTrace
    live : LiveStamps
    decode_ms : LatencySeries
        Decoding time per step measured in this replay (ms), every sample kept.
    behaviour_latency_ms : ndarray, shape (n_hits,)
        Zone entry to event, for every entry that got one (ms).
    model : PlaceModel or None
        The fitted model: the replay's own, else the live run's sidecar.
    model_source : str
    header : dict
        The log's file header.
    records_read : int
    damage : str or None
    clean_close : bool
    wall_span_s : float or None
        Wall-clock time between the first and the last input received live (s).
    overrides : dict
    content_events : list of ContentEvent
        The replay's candidate events whose content was decoded, with their
        decoded sequences (the newest ``decoder.session.ripples.EVENTS_KEPT``).
    """

    log_dir: Path
    config: ExperimentConfig
    summary: dict
    trace: SessionTrace
    live: LiveStamps
    decode_ms: LatencySeries
    behaviour_latency_ms: np.ndarray
    model: PlaceModel | None
    model_source: str
    header: dict
    records_read: int
    damage: str | None
    clean_close: bool
    wall_span_s: float | None
    overrides: dict = field(default_factory=dict)
    content_events: list[ContentEvent] = field(default_factory=list)


def gather_session(log_dir: str | Path, config: ExperimentConfig | None = None,
                   model: PlaceModel | None = None, overrides: dict | None = None) -> SessionRecord:
    """Replay a session once and keep what the report needs.

    The replay is the one of :func:`rig_adapters.sessions.replay.replay_session`: the
    recorded input bytes, in order, through :class:`Ingest` into a fresh
    :class:`Pipeline`, so the summary is the replay's. The same pass reads
    the live run's event records for their latency stamps.

    Parameters
    ----------
    log_dir : path
        The session directory (or its log file).
    config : ExperimentConfig, optional
        Settings to replay with; the recorded config by default.
    model : PlaceModel, optional
        Decode with this model from the start instead of learning.
    overrides : dict, optional
        The settings changed from the recorded config, only listed in the
        report: ``config`` must already carry them.

    Returns
    -------
    SessionRecord

    Raises
    ------
    LogFormatError
        If the file is not a session log this version can read, or no config
        is given and none lies beside the log.
    """
    log_dir = Path(log_dir)
    session_dir = log_dir if log_dir.is_dir() else log_dir.parent
    config = config or session_config(session_dir)
    initial = model
    if initial is None and (session_dir / INITIAL_MODEL_SIDECAR).exists():
        initial = PlaceModel.load(session_dir / INITIAL_MODEL_SIDECAR)
    trace = SessionTrace()
    live = LiveStamps()
    walls: list[float] = []

    def read_record(record) -> None:
        if record.type == "output" and record.channel == CHANNEL_EVENTS:
            live.add(record.payload)
        elif record.type == "input":
            if not walls:
                walls.append(record.wall_s)
            walls[1:] = [record.wall_s]

    result = replay_session(log_dir, config=config, model=model, on_output=trace.add, on_record=read_record,
                            keep_latency_samples=True)
    if result.damage:
        log.warning("the report covers the log up to its damage: %s", result.damage)
    pipeline, latency, summary = result.pipeline, result.latency, result.summary
    visits = copy.deepcopy(pipeline.visits)
    visits.result()
    fitted, source = _fitted_model(pipeline, initial, session_dir)
    return SessionRecord(
        log_dir=session_dir,
        config=config,
        summary=summary,
        trace=trace,
        live=live,
        decode_ms=latency.decode_ms,
        behaviour_latency_ms=np.asarray(visits.latencies_s, np.float64) * 1e3,
        model=fitted,
        model_source=source,
        header=result.header,
        records_read=result.records_read,
        damage=result.damage,
        clean_close=result.clean_close,
        wall_span_s=walls[-1] - walls[0] if walls else None,
        overrides=dict(overrides or {}),
        content_events=list(pipeline.ripples.events_),
    )


def _fitted_model(pipeline: Pipeline, initial: PlaceModel | None,
                  session_dir: Path) -> tuple[PlaceModel | None, str]:
    """The model to draw and where it came from: the replay's, else the live run's sidecar."""
    model = pipeline.model
    if model is not None and model is initial:
        return model, "the model the session started with (--model or initial_model.npz)"
    # Learned attributes exist only after fit (a session cut short may still be learning).
    if model is not None and hasattr(model, "rate_maps_hz_"):
        return model, "loaded by a load_model command" if pipeline.model_is_loaded else "fitted in this replay"
    sidecar = session_dir / FITTED_MODEL_SIDECAR
    if sidecar.exists():
        try:
            return PlaceModel.load(sidecar), f"the live run's {FITTED_MODEL_SIDECAR}"
        except (ModelFileError, OSError) as exc:
            log.warning("cannot read %s: %s", sidecar, exc)
            return None, f"{FITTED_MODEL_SIDECAR} is unreadable: {exc}"
    return None, "no fitted model: the session had not fitted one where the log ends"


def _describe_notice(detail: dict) -> str:
    """One line of a notice's plain figures (a readiness is shortened to its scalars)."""
    flat = {}
    for key, value in detail.items():
        if isinstance(value, dict):
            flat.update({k: v for k, v in value.items() if isinstance(v, (int, float, str)) and v is not None})
        elif isinstance(value, (int, float, str)):
            flat[key] = value
    return ", ".join(f"{k} {format_figure(v)}" for k, v in flat.items())


def format_figure(value, digits: int = 3) -> str:
    """A figure for people: integers as they are, other numbers to ``digits`` significant digits."""
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(value):
            return "–"
        return f"{value:.{digits}g}" if abs(value) < 10 ** digits else f"{value:.0f}"
    return str(value)


# ---------------------------------------------------------------------------
# Sweep results


#: The sweep figure every trade-off panel has on its x axis.
SWEEP_X_FIGURE = "median_error_cm"

#: The figures set against it when the sweep does not name the ones its front compares.
SWEEP_DEFAULT_FIGURES = ("false_events", "behaviour_latency_p50_ms", "added_latency_p99_ms")

#: Further figures listed in the sweep's table, after the front's, when the sweep has them.
SWEEP_TABLE_EXTRAS = ("hits", "entries", "triggers", "added_latency_p99_ms", "damaged", "failed")

#: Axis labels of the sweep figures the report knows; others are labelled with their names.
SWEEP_LABELS = {
    "median_error_cm": "median decoding error (cm)",
    "added_latency_p50_ms": "added latency p50 (ms)",
    "added_latency_p99_ms": "added latency p99 (ms)",
    "behaviour_latency_p50_ms": "behavioural latency p50 (ms)",
    "misses": "missed zone entries (count)",
    "false_events": "false events (count)",
}


def load_sweep(path: str | Path) -> dict:
    """Read a sweep's JSON result and check its shape.

    Parameters
    ----------
    path : path
        The file written by ``placeloop sweep``: ``{"rows": [{"setting":
        {name: value}, "figures": {name: number}, "front": bool}, ...], ...}``.

    Returns
    -------
    dict
        The document, with ``rows`` checked.

    Raises
    ------
    ValueError
        If the file is not JSON or has no list of rows with settings and figures.
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise ValueError(f"sweep file {path} is not JSON ({exc}); pass the file written by placeloop sweep") from None
    rows = doc.get("rows") if isinstance(doc, dict) else None
    if not isinstance(rows, list):
        raise ValueError(f"sweep file {path} has no list 'rows'; pass the file written by placeloop sweep")
    for i, row in enumerate(rows):
        if not isinstance(row, dict) or not isinstance(row.get("figures"), dict):
            raise ValueError(f"sweep file {path}: row {i} has no 'figures' table")
        if not isinstance(row.get("setting", {}), dict):
            raise ValueError(f"sweep file {path}: row {i} has a 'setting' that is not a table of name: value")
    return doc


def finite_number(value) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def sweep_figures(sweep: dict) -> list[str]:
    """The figures set against the median error: those the sweep's front compared, where numbers exist."""
    rows = sweep["rows"]
    wanted = [f for f in (sweep.get("front_figures") or SWEEP_DEFAULT_FIGURES) if f != SWEEP_X_FIGURE]
    return [f for f in wanted if any(finite_number(r["figures"].get(f)) is not None for r in rows)]



# ---------------------------------------------------------------------------
# Replay content

#: Candidate events listed at most in the report's table of replay content (the newest).
MAX_CONTENT_EVENTS = 50


def content_event_rows(summary: dict, odds_at: tuple[int, int] | None = None) -> list[tuple[str, ...]]:
    """The newest candidate events of a session's summary as the report's table rows, in text.

    Each row: onset (s of data time), duration (ms, onset to the LFP offset),
    decided content (the content rules that fired, or "none") and the
    decision time (ms after the onset); with ``odds_at`` (row: 0 towards,
    1 away; zone index), the event's log odds there (``ContentEvent.as_dict``:
    at the decision, else at the last bin). Empty when the session decoded no
    replay content.
    """
    events = ((summary.get("ripples") or {}).get("events") or [])[-MAX_CONTENT_EVENTS:]
    rows = []
    for e in events:
        row = (format_figure(e.get("onset_s"), 6), format_figure(e.get("duration_ms")),
               ", ".join(e.get("decided") or []) or "none", format_figure(e.get("decision_ms")))
        if odds_at is not None:
            odds = e.get("log_odds") or []
            value = odds[odds_at[0]][odds_at[1]] if len(odds) == 2 and odds_at[1] < len(odds[0]) else None
            row += (format_figure(value),)
        rows.append(row)
    return rows


def deciding_rule(rules: tuple, decided: tuple[str, ...], zone_names: list[str]) -> tuple[str, int, int] | None:
    """The sequence rule whose log odds an event's panel and row show: name, row (0 towards, 1 away), zone index.

    The first sequence rule among ``decided``, else the config's first
    sequence rule; None without sequence rules.
    """
    sequence = [r for r in rules if r.kind in ("replay_towards", "replay_away")]
    chosen = next((r for name in decided for r in sequence if r.name == name), sequence[0] if sequence else None)
    if chosen is None:
        return None
    return chosen.name, 0 if chosen.kind == "replay_towards" else 1, zone_names.index(chosen.zone)


#: Candidate events whose decoded sequences the report draws at most (the session's first).
MAX_SEQUENCE_PANELS = 24


def kendall_tau_b(x: np.ndarray, y: np.ndarray) -> float:
    """Kendall's tau-b of two equally long vectors; NaN for fewer than two pairs or a constant vector.

    ``(concordant - discordant) / sqrt((n0 - n_x)(n0 - n_y))`` over all pairs,
    with ``n0 = n (n - 1) / 2`` and ``n_x``, ``n_y`` the pairs tied in x and
    in y (Kendall 1945, Biometrika 33:239; the definition
    ``scipy.stats.kendalltau`` computes by default). O(n²): an event has tens
    of bins.
    """
    x, y = np.asarray(x, np.float64), np.asarray(y, np.float64)
    n = x.size
    if n < 2:
        return math.nan
    i, j = np.triu_indices(n, 1)
    sx, sy = np.sign(x[j] - x[i]), np.sign(y[j] - y[i])
    n0 = n * (n - 1) / 2
    denominator = math.sqrt((n0 - np.count_nonzero(sx == 0)) * (n0 - np.count_nonzero(sy == 0)))
    return float((sx * sy).sum() / denominator) if denominator > 0 else math.nan


@dataclass(frozen=True)
class EventSequence:
    """One candidate event's decoded sequence as the report draws it.

    Attributes
    ----------
    onset_s : float
        The detection's onset (data time).
    duration_ms : float
        Onset to the LFP offset; NaN when the offset never came.
    bin_ms : ndarray of float64, shape (n_bins,)
        Each content bin's end, ms after the onset (the first bins may end
        before it: the event starts where its population burst began).
    positions : ndarray of float64, shape (n_series, n_bins)
        The bins' MAP positions: one row along a track or graph (cm) or a
        heading ring (deg); x and y (cm) in an arena.
    n_spikes : ndarray of int64, shape (n_bins,)
    used : ndarray of bool, shape (n_bins,)
        Bins with at least ``[ripples] content_min_spikes`` spikes, those the content measures cover.
    decided : tuple of str
        The content rules that fired, each once, in order.
    decision_ms : float
        The first content rule's event, ms after the onset; NaN for none.
    tau_linear : float
        Kendall's tau-b of the used bins' times and linear MAP positions;
        NaN in an arena or with fewer than two used bins.
        Descriptive: no rule judges it.
    log_odds_zones : dict of str to (float, float)
        Per zone, the posterior log odds that the replay moves towards it and
        away from it (``ContentEvent.log_odds``, what the sequence rules
        judge): at the decision once one was made, at the last bin otherwise.
    """

    onset_s: float
    duration_ms: float
    bin_ms: np.ndarray
    positions: np.ndarray
    n_spikes: np.ndarray
    used: np.ndarray
    decided: tuple[str, ...]
    decision_ms: float
    tau_linear: float
    log_odds_zones: dict


def event_sequences(events: list[ContentEvent], environment: Environment, zone_names: list[str],
                    min_spikes: int, limit: int = MAX_SEQUENCE_PANELS) -> list[EventSequence]:
    """The first ``limit`` candidate events with at least one content bin, as :class:`EventSequence`."""
    out = []
    for e in events:
        if len(out) >= limit:
            break
        if not e.sequence:
            continue
        rows = np.array(e.sequence, np.float64)
        xy = rows[:, 1:3]
        if isinstance(environment, Arena):
            positions = xy.T.copy()
        else:
            lin = np.full(len(rows), np.nan)
            finite = np.all(np.isfinite(xy), axis=1)
            if finite.any():
                lin[finite] = environment.linearize(xy[finite])
            positions = lin[None, :]
        n_spikes = rows[:, 3].astype(np.int64)
        used = n_spikes >= min_spikes
        tau = math.nan
        if positions.shape[0] == 1:
            ok = used & np.isfinite(positions[0])
            tau = kendall_tau_b(rows[ok, 0], positions[0, ok])
        out.append(EventSequence(
            onset_s=e.onset_s, duration_ms=1e3 * (e.offset_s - e.onset_s), bin_ms=1e3 * (rows[:, 0] - e.onset_s),
            positions=positions, n_spikes=n_spikes, used=used, decided=tuple(dict.fromkeys(e.decided or ())),
            decision_ms=1e3 * (e.decision_s - e.onset_s), tau_linear=tau,
            log_odds_zones=dict(zip(zone_names, zip(*e.log_odds))) if e.log_odds else {},
        ))
    return out
