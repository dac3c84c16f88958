"""The session report: one self-contained HTML file of figures about a recorded session.

``placeloop report LOG`` replays the session through the same pipeline as
``placeloop replay`` (one pass over the log, keeping only what the figures
need) and writes one HTML file with

- the session's figures (steps, decoding error, events, zone entries hit,
  missed and false, latency percentiles), and a banner when the log is
  damaged, saying where it stopped;
- tracked against decoded position over time (and the true one where the
  rig recorded it), and the decoding error over time;
- the posterior at each event, with the zone outlined;
- latency histograms per stage: the live run's own stamps where the log has
  them (receipt → decoded → sent), the decoding time per step measured in
  this replay, and the behavioural latency (zone entry → event);
- the rate maps of the units, best first by Skaggs information, with their
  figures;
- with ``--sweep``, the trade-off between decoding error and the other
  figures of a parameter sweep, the front highlighted.

Figures are PNG images drawn with matplotlib's Agg canvas and inlined as
base64 ``data:`` URIs; styles are inline. The file loads nothing from the
network and runs no script. Long sessions stay small: trajectories are
thinned to evenly spaced samples and posteriors are kept only at events.
"""

from __future__ import annotations

import argparse
import base64
import copy
import html
import io
import json
import logging
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import contourpy
import numpy as np
from matplotlib import colormaps
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from decoder.config import ConfigError, ExperimentConfig, load_config, parse_settings, with_overrides
from decoder.space.environments import Environment
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.wire import protocol
from rig_adapters.console import CAUTION, setup_logging
from rig_adapters.wire.ingest import CHANNEL_EVENTS
from rig_adapters.sessions.recorder import LogFormatError
from rig_adapters.sessions.recorder import FITTED_MODEL_SIDECAR, INITIAL_MODEL_SIDECAR
from rig_adapters.sessions.replay import replay_session, session_config
from rig_adapters.sessions.summary import LatencyLog, LatencySeries, jsonable

log = logging.getLogger(__name__)

#: Rate maps drawn at most (the best units by bits/spike); the table lists every unit.
MAX_RATE_MAPS = 48

#: Event posteriors kept at most, evenly spread over the session's events.
MAX_EVENT_PANELS = 48

#: Decoded steps kept at most for the trajectory and error figures, evenly spread.
TRACE_SAMPLES = 4000

#: The first seconds of decoding kept step by step, drawn in detail when the session is long (s).
EXCERPT_S = 60.0

#: Session notices (fitted, armed, disarmed, ...) listed at most.
MAX_NOTICES = 200

#: Resolution of the inlined figures (dots per inch).
FIGURE_DPI = 100

#: Line colours sampled from viridis, told apart by line style and marker as well.
TRACKED_COLOUR, DECODED_COLOUR, TRUE_COLOUR = "#440154", "#21918c", "#b5de2b"

CAUTION_TEXT = (
    "A report describes what the decoder did or would have done; it is no hardware interlock. "
    "Before arming settings chosen here, stay inside the approved animal-use protocol and local rules, "
    "and dry-run them on recorded or simulated data before a live animal."
)


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
        The same tuples for every step of the first ``EXCERPT_S`` of decoding.
    events : _EvenSample of EventSnapshot
    event_times_s : list of float
        Data time of every event (s), for the trajectory's tick marks.
    notices : list of (t_s, kind, text)
    """

    def __init__(self) -> None:
        self.steps = _EvenSample(TRACE_SAMPLES)
        self.excerpt: list[tuple] = []
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
        in_excerpt = out.t_s - self.first_step_s <= EXCERPT_S
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
    return ", ".join(f"{k} {_fmt(v)}" for k, v in flat.items())


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


def _number(value) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


# ---------------------------------------------------------------------------
# Figures


def _png(fig: Figure) -> str:
    """The figure as a ``data:`` URI of a PNG image."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=FIGURE_DPI, bbox_inches="tight", metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _is_arena(env: Environment) -> bool:
    return env.grid_shape is not None


def _linear_bin_centres_cm(env: Environment) -> np.ndarray:
    edges = env.linear_edges_cm
    return 0.5 * (edges[:-1] + edges[1:])


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Start and stop (exclusive) of each run of True."""
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    change = np.flatnonzero(np.diff(padded))
    return list(zip(change[::2], change[1::2]))


def _positions_over_time(trace: SessionTrace, env: Environment, has_truth: bool) -> str | None:
    """Tracked, decoded and true position against time: the whole session, and its start in detail when long."""
    if not trace.steps.items:
        return None
    if _is_arena(env):
        coords = [("x (cm)", lambda xy: xy[:, 0]), ("y (cm)", lambda xy: xy[:, 1])]
    else:
        coords = [("linear position (cm)", env.linearize)]
    views = [(trace.step_arrays(), "")]
    # Minutes of data squeeze single crossings into a few pixels; the start shows them step by step.
    if trace.last_step_s - trace.first_step_s > 2 * EXCERPT_S:
        views.append((trace.step_arrays(excerpt=True), f"first {EXCERPT_S:g} s of decoding, every step: "))
    fig = Figure(figsize=(10, (2.3 * len(coords) + 0.6) * len(views)))
    axes = fig.subplots(len(coords) * len(views), 1, squeeze=False, gridspec_kw={"hspace": 0.45})[:, 0]
    for v, (s, prefix) in enumerate(views):
        view_axes = axes[v * len(coords):(v + 1) * len(coords)]
        for ax, (label, coord) in zip(view_axes, coords):
            if has_truth:
                ax.plot(s["t_s"], coord(s["true"]), color=TRUE_COLOUR, lw=2.2, ls="-", label="true")
            ax.plot(s["t_s"], coord(s["tracked"]), color=TRACKED_COLOUR, lw=1.0, ls="-", label="tracked")
            ax.plot(s["t_s"], coord(s["decoded"]), color=DECODED_COLOUR, lw=0, marker=".", ms=2.5,
                    label="decoded (MAP)")
            ax.vlines(trace.event_times_s, 0, 1, transform=ax.get_xaxis_transform(), color="0.35", lw=0.6,
                      ls=":")
            ax.set_xlim(s["t_s"][0], s["t_s"][-1])
            ax.set_ylabel(label)
        view_axes[-1].set_xlabel(prefix + "data time (s); dotted lines: events")
    axes[0].legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=8, ncol=3, frameon=False)
    return _png(fig)


def _error_over_time(trace: SessionTrace) -> str | None:
    if not trace.steps.items:
        return None
    s = trace.step_arrays()
    ok = np.isfinite(s["error_cm"])
    if not np.any(ok):
        return None
    t, err = s["t_s"][ok], s["error_cm"][ok]
    fig = Figure(figsize=(10, 2.8))
    ax = fig.subplots()
    ax.plot(t, err, color=DECODED_COLOUR, lw=0, marker=".", ms=2, alpha=0.5, label="step")
    width = max(5, err.size // 100) | 1
    if err.size >= width:
        rolling = np.median(np.lib.stride_tricks.sliding_window_view(err, width), axis=1)
        ax.plot(t[width // 2: width // 2 + rolling.size], rolling, color=TRACKED_COLOUR, lw=1.6,
                label=f"running median of {width} kept steps")
    ax.axhline(np.median(err), color="0.3", lw=0.8, ls="--", label="median of kept steps")
    ax.set_xlabel("data time (s)")
    ax.set_ylabel("decoding error (cm)")
    ax.set_ylim(bottom=0)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=8, ncol=3, frameon=False)
    return _png(fig)


def _arena_image_kwargs(env: Environment) -> dict:
    return {
        "origin": "lower",
        "extent": (env.x_edges_cm[0], env.x_edges_cm[-1], env.y_edges_cm[0], env.y_edges_cm[-1]),
        "interpolation": "nearest",
        "vmin": 0.0,
        "vmax": 1.0,
    }


def _zone_outlines(config: ExperimentConfig, env: Environment, n: int = 240) -> dict[str, list[np.ndarray]]:
    """Each 2-D zone's boundary as lines of shape (m, 2) in cm, traced on a fine grid over the arena."""
    xs = np.linspace(env.x_edges_cm[0], env.x_edges_cm[-1], n)
    ys = np.linspace(env.y_edges_cm[0], env.y_edges_cm[-1], n)
    gx, gy = np.meshgrid(xs, ys)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    outlines = {}
    for zone in config.zones:
        inside = zone.contains(points, env).reshape(gx.shape).astype(np.float64)
        outlines[zone.name] = contourpy.contour_generator(gx, gy, inside).lines(0.5)
    return outlines


def _masked_grid(values: np.ndarray, mask: np.ndarray, shape: tuple[int, int]) -> np.ma.MaskedArray:
    return np.ma.masked_array(values.reshape(shape), ~mask.reshape(shape))


def _viridis_with_grey():
    """Viridis (colour-blind safe), with light grey for bins left out of the map."""
    return colormaps["viridis"].with_extremes(bad="0.88")


def _grid_of_axes(fig: Figure, n: int, ncols: int, hspace: float | None = None) -> np.ndarray:
    """An ``(nrows, ncols)`` grid of axes; those past the ``n``-th are hidden."""
    axes = fig.subplots(math.ceil(n / ncols), ncols, squeeze=False, gridspec_kw={"hspace": hspace})
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    return axes


def _small_multiples(fig: Figure, n: int, ncols: int, xlim: tuple[float, float], ylim: tuple[float, float],
                     xlabel: str, ylabel: str, yticks: tuple[float, ...] | None = None,
                     hspace: float = 0.35) -> list:
    """``n`` panels on one scale; only the outer ones carry ticks (at the limits) and the axis labels.

    ``hspace`` is the gap between rows as a fraction of a panel's height: line
    panels fill their box, so they need more room for the two-line titles.

    Fixed ticks keep dozens of panels cheap to draw; automatic tick placement
    would dominate the time of a report.
    """
    axes = _grid_of_axes(fig, n, ncols, hspace=hspace)
    nrows = axes.shape[0]
    panels = []
    for i, ax in enumerate(axes.ravel()[:n]):
        row, col = divmod(i, ncols)
        bottom = row == nrows - 1 or i + ncols >= n
        ax.set_xlim(*xlim)
        ax.set_ylim(*ylim)
        ax.set_xticks([xlim[0], xlim[1]] if bottom else [])
        ax.set_yticks((yticks if yticks is not None else [ylim[0], ylim[1]]) if col == 0 else [])
        ax.xaxis.set_major_formatter("{x:g}")
        ax.yaxis.set_major_formatter("{x:g}")
        ax.tick_params(labelsize=6, length=2, pad=1)
        if bottom:
            ax.set_xlabel(xlabel, fontsize=6.5, labelpad=1)
        if col == 0:
            ax.set_ylabel(ylabel, fontsize=6.5, labelpad=1)
        panels.append(ax)
    return panels


def _panel_limits(env: Environment) -> tuple[tuple[float, float], tuple[float, float] | None]:
    """x and y limits of a map panel (cm): the grid for an arena, the linear length for a track."""
    if _is_arena(env):
        return ((float(env.x_edges_cm[0]), float(env.x_edges_cm[-1])),
                (float(env.y_edges_cm[0]), float(env.y_edges_cm[-1])))
    edges = env.linear_edges_cm
    return (float(edges[0]), float(edges[-1])), None


def _event_posteriors(trace: SessionTrace, config: ExperimentConfig) -> str | None:
    events = trace.events.items
    if not events:
        return None
    env = config.environment
    ncols = min(6, len(events))
    nrows = math.ceil(len(events) / ncols)
    arena = _is_arena(env)
    fig = Figure(figsize=(1.9 * ncols + 1.0, (1.9 if arena else 1.5) * nrows + 0.8))
    xlim, ylim = _panel_limits(env)
    panels = _small_multiples(fig, len(events), ncols, xlim, ylim or (0.0, 1.05),
                              "x (cm)" if arena else "linear position (cm)",
                              "y (cm)" if arena else "posterior / its peak", None if arena else (0.0, 1.0),
                              hspace=0.35 if arena else 0.9)
    cmap = _viridis_with_grey()
    outlines = _zone_outlines(config, env) if arena else {}
    image = None
    for ax, ev in zip(panels, events):
        title = f"#{ev.event_id} {ev.zone}\nt={ev.t_s:.1f} s, mass {ev.zone_mass:.2f}"
        if ev.far_from_zone:
            title += " (far)"
        ax.set_title(title, fontsize=7)
        peak = float(ev.posterior.max()) or 1.0
        if arena:
            image = ax.imshow(_masked_grid(ev.posterior / peak, env.valid_mask, env.grid_shape), cmap=cmap,
                              **_arena_image_kwargs(env))
            ring = env.outline_cm()
            ax.plot(ring[:, 0], ring[:, 1], color="0.2", lw=0.6)
            for line in outlines[ev.zone]:
                ax.plot(line[:, 0], line[:, 1], color="white", lw=1.2)
            ax.plot(*ev.map_xy_cm, marker="x", color="white", ms=6, mew=1.5)
            ax.plot(*ev.tracked_xy_cm, marker="o", mfc="none", mec="#fde725", ms=6, mew=1.2)
            if np.all(np.isfinite(ev.true_xy_cm)):
                ax.plot(*ev.true_xy_cm, marker="+", color="#fde725", ms=7, mew=1.2)
            ax.set_aspect("equal")
        else:
            centres = _linear_bin_centres_cm(env)
            ax.plot(centres, ev.posterior / peak, color=DECODED_COLOUR, lw=1.0)
            zone = config.zones[config.zone_names().index(ev.zone)]
            edges = env.linear_edges_cm
            for a, b in _runs(zone.bin_mask(env)):
                ax.axvspan(edges[a], edges[b], color="0.85", zorder=0)
            lin = env.linearize(np.vstack([ev.map_xy_cm, ev.tracked_xy_cm, ev.true_xy_cm]))
            ax.axvline(lin[1], color=TRACKED_COLOUR, lw=1.0, ls="--")
            if np.isfinite(lin[2]):
                ax.axvline(lin[2], color="0.3", lw=1.0, ls=":")
    if arena:
        cbar = fig.colorbar(image, ax=panels, shrink=0.6, pad=0.02)
        cbar.set_label("posterior / its peak (probability ratio)", fontsize=7)
        cbar.ax.tick_params(labelsize=6)
        handles = [
            Line2D([], [], ls="", marker="x", color="0.2", mew=1.5, label="decoded (MAP)"),
            Line2D([], [], ls="", marker="o", mfc="none", mec="0.2", label="tracked"),
            Line2D([], [], ls="", marker="+", color="0.2", label="true"),
            Line2D([], [], color="0.2", lw=1.2, label="zone outline (white)"),
        ]
    else:
        handles = [
            Line2D([], [], color=DECODED_COLOUR, label="posterior"),
            Line2D([], [], color=TRACKED_COLOUR, ls="--", label="tracked"),
            Line2D([], [], color="0.3", ls=":", label="true"),
            Line2D([], [], color="0.85", lw=6, label="zone"),
        ]
    # The legend sits just above the top row's titles, whatever the number of rows.
    fig.subplots_adjust(top=1.0 - 0.45 / fig.get_figheight())
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=7, bbox_to_anchor=(0.5, 1.0))
    return _png(fig)


def _latency_histograms(record: SessionRecord) -> str | None:
    panels: list[tuple[str, np.ndarray, str]] = []
    live = record.live
    if live.n:
        panels += [
            ("live: receipt → decoded", np.asarray(live.received_to_decoded_ms), "events"),
            ("live: decoded → sent", np.asarray(live.decoded_to_sent_ms), "events"),
            ("live: receipt → sent", np.asarray(live.received_to_sent_ms), "events"),
        ]
    if len(record.decode_ms):
        panels.append(("this replay: decoding per step", np.asarray(record.decode_ms.values), "steps"))
    if record.behaviour_latency_ms.size:
        panels.append(("zone entry → event (data time)", record.behaviour_latency_ms, "zone entries"))
    if not panels:
        return None
    ncols = min(3, len(panels))
    fig = Figure(figsize=(3.4 * ncols, 2.6 * math.ceil(len(panels) / ncols) + 0.3))
    axes = _grid_of_axes(fig, len(panels), ncols)
    for ax, (title, values, what) in zip(axes.ravel(), panels):
        values = values[np.isfinite(values)]
        # A few outliers would squash the histogram of thousands of samples into one bar.
        hi = np.percentile(values, 99.5) if values.size >= 200 else values.max()
        clipped = int(np.count_nonzero(values > hi))
        ax.hist(np.minimum(values, hi), bins=40, color=DECODED_COLOUR, edgecolor="white", linewidth=0.3)
        for q, ls in ((50, "--"), (99, ":")):
            ax.axvline(np.percentile(values, q), color=TRACKED_COLOUR, lw=1.0, ls=ls)
        ax.set_title(title + (f"\n({clipped} above {hi:.3g} ms drawn at it)" if clipped else ""), fontsize=8)
        ax.set_xlabel("latency (ms); dashed p50, dotted p99", fontsize=7)
        ax.set_ylabel(f"count ({what})", fontsize=7)
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    return _png(fig)


def _unit_order(model: PlaceModel) -> np.ndarray:
    """Rows best first: most spatial information in bits per spike, NaN (silent units) last.

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993).
    An information-theoretic approach to deciphering the hippocampal code.
    Advances in Neural Information Processing Systems 5, 1030-1037.
    """
    bits = np.nan_to_num(np.asarray(model.info_bits_per_spike_, float), nan=-np.inf)
    return np.argsort(-bits, kind="stable")


def _rate_maps(model: PlaceModel, order: np.ndarray) -> str | None:
    rows = order[:MAX_RATE_MAPS]
    if rows.size == 0:
        return None
    env = model.environment
    arena = _is_arena(env)
    ncols = min(8, rows.size)
    nrows = math.ceil(rows.size / ncols)
    fig = Figure(figsize=(1.55 * ncols + 1.0, (1.65 if arena else 1.3) * nrows + 0.4))
    xlim, ylim = _panel_limits(env)
    panels = _small_multiples(fig, rows.size, ncols, xlim, ylim or (0.0, 1.05),
                              "x (cm)" if arena else "linear position (cm)",
                              "y (cm)" if arena else "rate / peak (Hz/Hz)", None if arena else (0.0, 1.0),
                              hspace=0.35 if arena else 0.9)
    cmap = _viridis_with_grey()
    image = None
    for ax, row in zip(panels, rows):
        rate = model.rate_maps_hz_[row]
        peak = float(model.peak_rate_hz_[row]) or 1.0
        ax.set_title(f"unit {model.unit_ids_[row]}\n{_fmt(model.info_bits_per_spike_[row])} b/spk, "
                     f"{peak:.1f} Hz", fontsize=6.5)
        if arena:
            image = ax.imshow(_masked_grid(rate / peak, model.visited_mask_, env.grid_shape), cmap=cmap,
                              **_arena_image_kwargs(env))
            ax.set_aspect("equal")
        else:
            ax.plot(_linear_bin_centres_cm(env), rate / peak, color=DECODED_COLOUR, lw=1.0)
    if arena:
        cbar = fig.colorbar(image, ax=panels, shrink=0.5, pad=0.02)
        cbar.set_label("rate / the unit's peak rate (Hz/Hz)", fontsize=7)
        cbar.ax.tick_params(labelsize=6)
    return _png(fig)


def _sweep_figures(sweep: dict) -> list[str]:
    """The figures set against the median error: those the sweep's front compared, where numbers exist."""
    rows = sweep["rows"]
    wanted = [f for f in (sweep.get("front_figures") or SWEEP_DEFAULT_FIGURES) if f != SWEEP_X_FIGURE]
    return [f for f in wanted if any(_number(r["figures"].get(f)) is not None for r in rows)]


def _trade_off(sweep: dict) -> str | None:
    rows = sweep["rows"]
    x_key = SWEEP_X_FIGURE
    panels = [(key, SWEEP_LABELS.get(key, key)) for key in _sweep_figures(sweep)]
    if not panels or not any(_number(r["figures"].get(x_key)) is not None for r in rows):
        return None
    x_label = SWEEP_LABELS[x_key]
    ncols = min(2, len(panels))
    fig = Figure(figsize=(4.6 * ncols, 3.6 * math.ceil(len(panels) / ncols)))
    axes = _grid_of_axes(fig, len(panels), ncols)
    for ax, (key, label) in zip(axes.ravel(), panels):
        for front in (False, True):
            pts = [(i, _number(r["figures"].get(x_key)), _number(r["figures"].get(key)))
                   for i, r in enumerate(rows) if bool(r.get("front")) == front]
            pts = [p for p in pts if p[1] is not None and p[2] is not None]
            if not pts:
                continue
            idx, xs, ys = zip(*pts)
            if front:
                ax.scatter(xs, ys, s=46, marker="D", color=DECODED_COLOUR, edgecolor="black", linewidth=0.8,
                           label="on the front", zorder=3)
                for i, x, y in pts:
                    ax.annotate(str(i), (x, y), xytext=(4, 4), textcoords="offset points", fontsize=7)
            else:
                ax.scatter(xs, ys, s=22, marker="o", facecolor="none", edgecolor=TRACKED_COLOUR, linewidth=0.9,
                           label="other settings", zorder=2)
        ax.set_xlabel(x_label)
        ax.set_ylabel(label)
        ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return _png(fig)


# ---------------------------------------------------------------------------
# HTML


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 1.5em auto; max-width: 72em;
       padding: 0 1em; color: #1a1a1a; line-height: 1.4; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.2em; border-bottom: 1px solid #bbb; padding-bottom: 0.2em; margin-top: 1.8em; }
.sub { color: #555; margin-top: 0; }
.damage { border: 2px solid #8a5a00; background: #fff4d6; padding: 0.6em 0.9em; margin: 1em 0; }
.damage strong { color: #6b4500; }
.caution { border-left: 4px solid #555; background: #f3f3f3; padding: 0.5em 0.9em; margin: 1em 0; font-size: 0.92em; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.2em 0.6em; text-align: left; vertical-align: top; }
th { background: #f0f0f0; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.figures { display: grid; grid-template-columns: repeat(auto-fill, minmax(20em, 1fr)); gap: 0 1.5em; }
img { max-width: 100%; height: auto; display: block; margin: 0.5em 0; }
.note { color: #444; font-size: 0.92em; }
.wide { overflow-x: auto; }
pre { background: #f6f6f6; padding: 0.6em; overflow-x: auto; font-size: 0.85em; }
"""


def _fmt(value, digits: int = 3) -> str:
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


def _lookup(summary: dict, path: str):
    value = summary
    for part in path.split("."):
        if not isinstance(value, dict):
            return None
        value = value.get(part)
    return value


def _figure_cell(key: str, value, unit: str = "") -> str:
    raw = html.escape(json.dumps(jsonable(value)), quote=True)
    text = _fmt(value) + (f" {unit}" if unit and value is not None else "")
    return f'<td class="num" data-figure="{html.escape(key)}" data-value="{raw}">{html.escape(text)}</td>'


def _figure_table(title: str, entries: list[tuple[str, str, object, str]]) -> str:
    rows = "".join(f"<tr><th>{html.escape(label)}</th>{_figure_cell(key, value, unit)}</tr>"
                   for label, key, value, unit in entries)
    return f"<div><h3>{html.escape(title)}</h3><table>{rows}</table></div>"


def _stage_table(record: SessionRecord) -> str:
    """Percentiles of every latency stage drawn below, one row each."""
    stages = [
        ("live: receipt → decoded", "live.received_to_decoded_ms", record.live.received_to_decoded_ms),
        ("live: decoded → sent", "live.decoded_to_sent_ms", record.live.decoded_to_sent_ms),
        ("live: receipt → sent", "live.received_to_sent_ms", record.live.received_to_sent_ms),
        ("this replay: decoding per step", "replay.decode_per_step_ms", record.decode_ms),
        ("zone entry → event (data time)", "replay.entry_to_event_ms", record.behaviour_latency_ms.tolist()),
    ]
    rows = []
    for label, key, values in stages:
        if not len(values):
            continue
        p = LatencyLog.percentiles(values)
        rows.append(f"<tr><th>{html.escape(label)}</th>{_figure_cell(key + '.n', p['n'])}"
                    + "".join(_figure_cell(f"{key}.{q}", p[q], "ms") for q in ("p50", "p99", "max")) + "</tr>")
    if not rows:
        return ""
    return ("<table><tr><th>stage</th><th>samples</th><th>p50</th><th>p99</th><th>max</th></tr>"
            + "".join(rows) + "</table>")


def _header_section(record: SessionRecord) -> str:
    s = record.summary
    trace = record.trace

    def entry(label: str, path: str, unit: str = "") -> tuple[str, str, object, str]:
        return label, path, _lookup(s, path), unit

    covered = None
    if trace.first_step_s is not None:
        covered = trace.last_step_s - trace.first_step_s
    decoding = [
        entry("decoded steps", "decode.steps"),
        ("decoded data time", "report.decoded_s", covered, "s"),
        entry("median decoding error", "decode.median_error_cm", "cm"),
        entry("90th percentile error", "decode.p90_error_cm", "cm"),
        entry("coverage at fit (fraction of bins)", "session.readiness.coverage"),
        entry("spatially tuned units at fit", "session.readiness.n_tuned_units"),
        entry("cross-validated median error at fit", "session.readiness.median_cv_error_cm", "cm"),
    ]
    behaviour = [
        entry("events", "triggers.count"),
        entry("events with the animal far from the zone", "triggers.false_count"),
        entry("zone entries", "behaviour.entries"),
        entry("entries hit", "behaviour.hits"),
        entry("entries missed", "behaviour.misses"),
        entry("false events (no entry)", "behaviour.false_events"),
        entry("repeat events (same entry)", "behaviour.repeat_events"),
        entry("entry → event p50", "behaviour.latency_ms.p50", "ms"),
        entry("entry → event p90", "behaviour.latency_ms.p90", "ms"),
        entry("entry → event max", "behaviour.latency_ms.max", "ms"),
    ]
    live = LatencyLog.percentiles(record.live.received_to_sent_ms)
    timing = [
        ("events sent live (in the log)", "live.events", record.live.n, ""),
        ("live receipt → sent p50", "live.received_to_sent_ms.p50", live["p50"], "ms"),
        ("live receipt → sent p99", "live.received_to_sent_ms.p99", live["p99"], "ms"),
        entry("decoding per step p50 (this replay)", "latency_stages_ms.decode_per_step.p50", "ms"),
        entry("decoding per step p99 (this replay)", "latency_stages_ms.decode_per_step.p99", "ms"),
        entry("bad messages", "input.bad_messages"),
        entry("sequence gaps", "input.gaps"),
        entry("late spikes", "input.late_spikes"),
        ("records read", "report.records", record.records_read, ""),
    ]
    return ('<section id="summary"><h2>Session figures</h2><div class="figures">'
            + _figure_table("Decoding", decoding)
            + _figure_table("Events and zone entries", behaviour)
            + _figure_table("Timing and input", timing)
            + "</div>"
            + '<p class="note">“Far from the zone”: the animal was known to be farther than the false margin '
              f"({_fmt(record.config.session.false_margin_cm)} cm) from the zone when the event fired. "
              "“False events”: events that belong to no zone entry (entries are judged on the true position "
              "where the rig recorded one, else the tracked one). Behavioural latency is in data time.</p>"
            + "</section>")


def _damage_banner(record: SessionRecord) -> str:
    if record.damage is None:
        return ""
    reached = record.trace.last_step_s
    where = f"data time {reached:.3f} s" if reached is not None else "before any decoded step"
    return ('<div class="damage" id="damage"><strong>Incomplete or damaged log — this report stops where the log does.</strong> '
            f"{html.escape(record.damage)}. The replay read {record.records_read} records and decoded up to "
            f"{html.escape(where)}; everything below covers the session only up to there.</div>")


def _settings_section(record: SessionRecord) -> str:
    c = record.config
    env = c.environment
    items = [
        ("environment", f"{type(env).__name__}, {env.n_bins} bins of {_fmt(env.bin_cm)} cm"),
        ("decoder", f"window {_fmt(c.decoder.window_s)} s, step {_fmt(c.decoder.step_s)} s, prior "
                    f"{c.decoder.prior}, random walk s.d. {_fmt(c.decoder.random_walk_sd_cm)} cm, allowed lateness "
                    f"{_fmt(c.decoder.allowed_lateness_s)} s"),
        ("zones", ", ".join(f"{z.name} ({z.kind})" for z in c.zones) or "none"),
        ("rules", ", ".join(f"{r.name} → {r.zone}" for r in c.rules) or "none"),
        ("model", record.model_source),
    ]
    if record.overrides:
        items.append(("changed with --set",
                      ", ".join(f"{k} = {v!r}" for k, v in record.overrides.items())))
    rows = "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in items)
    notices = "".join(
        f'<tr><td class="num">{html.escape(_fmt(t))}</td><td>{html.escape(kind)}</td><td>{html.escape(text)}</td></tr>'
        for t, kind, text in record.trace.notices
    )
    more = (f'<p class="note">{record.trace.notices_dropped} later notices are not listed.</p>'
            if record.trace.notices_dropped else "")
    return ('<section id="settings"><h2>Settings and session timeline</h2>'
            f"<table>{rows}</table>"
            "<h3>Notices (data time)</h3>"
            + (f"<table><tr><th>t (s)</th><th>notice</th><th>detail</th></tr>{notices}</table>{more}"
               if notices else '<p class="note">No notices.</p>')
            + "<details><summary>Config text</summary><pre>"
            + html.escape(c.source_text)
            + "</pre></details></section>")


def _image(uri: str | None, alt: str, missing: str) -> str:
    if uri is None:
        return f'<p class="note">{html.escape(missing)}</p>'
    return f'<img alt="{html.escape(alt, quote=True)}" src="{uri}">'


def _rate_map_section(record: SessionRecord) -> str:
    model = record.model
    if model is None:
        return ('<section id="rate-maps"><h2>Rate maps</h2>'
                f'<p class="note">{html.escape(record.model_source)}.</p></section>')
    order = _unit_order(model)
    unit = "cm²" if _is_arena(model.environment) else "cm"
    rows = "".join(
        f"<tr><td>{int(model.unit_ids_[i])}</td>"
        f'<td class="num" data-unit="{int(model.unit_ids_[i])}" data-bits="{float(model.info_bits_per_spike_[i])!r}">'
        f"{_fmt(model.info_bits_per_spike_[i])}</td>"
        f'<td class="num">{_fmt(model.info_bits_per_s_[i])}</td>'
        f'<td class="num">{_fmt(model.peak_rate_hz_[i])}</td>'
        f'<td class="num">{_fmt(model.sparsity_[i])}</td>'
        f'<td class="num">{_fmt(model.field_size_[i])}</td></tr>'
        for i in order
    )
    shown = min(MAX_RATE_MAPS, order.size)
    return ('<section id="rate-maps"><h2>Rate maps</h2>'
            f'<p class="note">Model: {html.escape(record.model_source)}. {order.size} units; the {shown} with the '
            "most spatial information (Skaggs et al. 1993) are drawn, best first; each map is scaled to its own "
            "peak rate, given in its title; grey bins were not visited long enough to map.</p>"
            + _image(_rate_maps(model, order), "rate maps of the best units", "No units to draw.")
            + "<details><summary>Every unit's figures</summary><table><tr><th>unit</th><th>information "
              "(bits/spike)</th><th>information (bits/s)</th><th>peak rate (Hz)</th><th>sparsity</th>"
              f"<th>field size ({unit})</th></tr>{rows}</table></details></section>")


def _sweep_section(sweep: dict, path: Path) -> str:
    rows = sweep["rows"]
    names = sorted({k for r in rows for k in r.get("setting", {})})
    numeric = {k for r in rows for k, v in r["figures"].items() if _number(v) is not None}
    preferred = [SWEEP_X_FIGURE, *_sweep_figures(sweep), *SWEEP_TABLE_EXTRAS]
    figure_names = list(dict.fromkeys(f for f in preferred if f in numeric)) or sorted(numeric)
    head = "".join(f"<th>{html.escape(n)}</th>"
                   for n in ["#", "front", *names, *(SWEEP_LABELS.get(f, f) for f in figure_names)])
    body = "".join(
        "<tr>" + f'<td class="num">{i}</td><td>{"front" if r.get("front") else ""}</td>'
        + "".join(f"<td>{html.escape(_fmt(r.get('setting', {}).get(n)))}</td>" for n in names)
        + "".join(f'<td class="num">{html.escape(_fmt(_number(r["figures"].get(n))))}</td>' for n in figure_names)
        + "</tr>"
        for i, r in enumerate(rows)
    )
    n_front = sum(bool(r.get("front")) for r in rows)
    return ('<section id="trade-off"><h2>Sweep trade-off</h2>'
            f'<p class="note">From {html.escape(path.name)}: {len(rows)} settings, {n_front} on the trade-off '
            "front (no other setting is at least as good on every figure the front compares and better on one). "
            "Each panel sets the median decoding error against one of those figures; numbers label the "
            "front's rows in the table.</p>"
            + _image(_trade_off(sweep), "trade-off between decoding error and the other figures",
                     "The sweep has no rows with a median error and another figure to draw.")
            + f'<div class="wide"><table><tr>{head}</tr>{body}</table></div></section>')


def render_report(record: SessionRecord, sweep: dict | None = None, sweep_path: Path | None = None) -> str:
    """The report as one HTML document.

    Parameters
    ----------
    record : SessionRecord
        From :func:`gather_session`.
    sweep : dict, optional
        From :func:`load_sweep`; adds the trade-off section.
    sweep_path : Path, optional
        Where the sweep was read, named in its section.

    Returns
    -------
    str
    """
    config = record.config
    has_truth = bool(config.sources.truth)
    created = record.header.get("created_utc", "unknown time")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>placeloop report: {html.escape(record.log_dir.name)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Session report: {html.escape(record.log_dir.name)}</h1>",
        f'<p class="sub">Log created {html.escape(str(created))}; '
        + ("closed cleanly" if record.clean_close else "not closed cleanly")
        + (f"; inputs received over {record.wall_span_s:.1f} s of wall time" if record.wall_span_s else "")
        + ". Figures come from replaying the log through the same pipeline as the live run.</p>",
        _damage_banner(record),
        _header_section(record),
        '<section id="trajectory"><h2>Tracked and decoded position</h2>'
        + _image(_positions_over_time(record.trace, config.environment, has_truth),
                 "tracked, decoded and true position over time",
                 "No decoded steps: the session never decoded before the log ends.")
        + f'<p class="note">{len(record.trace.steps.items)} of {record.trace.steps.seen} decoded steps drawn, '
          "evenly spaced.</p></section>",
        '<section id="error"><h2>Decoding error over time</h2>'
        + _image(_error_over_time(record.trace), "decoding error over time",
                 "No decoding error: no decoded step had a known position.")
        + '<p class="note">Distance from the decoded (MAP) position to the '
        + ("true position recorded by the rig" if has_truth else "tracked position")
        + ".</p></section>",
        '<section id="events"><h2>Posterior at each event</h2>'
        + f'<p class="note">{len(record.trace.events.items)} of {len(record.trace.event_times_s)} events shown, '
          "evenly spread; each posterior is scaled to its own peak.</p>"
        + _image(_event_posteriors(record.trace, config), "posterior at each event", "No events.")
        + "</section>",
        '<section id="latency"><h2>Latency per stage</h2>'
        + ('<p class="note">Live stages from the wall-clock stamps of the events the live run sent.</p>'
           if record.live.n else
           '<p class="note">The log holds no events sent live (a simulated or replay-only log), so no live '
           "stage is drawn; the decoding stage is measured in this replay, on this machine.</p>")
        + (f'<p class="note">{record.live.unreadable} event records could not be read.</p>'
           if record.live.unreadable else "")
        + _stage_table(record)
        + _image(_latency_histograms(record), "latency histograms per stage", "No latency samples.")
        + "</section>",
        _rate_map_section(record),
    ]
    if sweep is not None:
        parts.append(_sweep_section(sweep, sweep_path or Path("sweep")))
    parts += [
        _settings_section(record),
        f'<div class="caution">{html.escape(CAUTION_TEXT)}</div>',
        "</body></html>",
    ]
    return "\n".join(parts)


def write_report(log_dir: str | Path, out_path: str | Path, config: ExperimentConfig | None = None,
                 overrides: dict | None = None, model: PlaceModel | None = None,
                 sweep_path: str | Path | None = None) -> SessionRecord:
    """Replay a session and write its HTML report.

    Parameters
    ----------
    log_dir : path
    out_path : path
        The HTML file to write.
    config : ExperimentConfig, optional
        The recorded config by default.
    overrides : dict, optional
        ``"table.key"`` → value, applied to ``config`` (or the recorded one)
        with :func:`decoder.config.with_overrides` and listed in the report.
    model : PlaceModel, optional
        Decode with this model from the start instead of learning.
    sweep_path : path, optional
        A sweep's JSON result for the trade-off section.

    Returns
    -------
    SessionRecord
        What the report was drawn from (``damage`` says where a damaged log stopped).

    Raises
    ------
    LogFormatError, ConfigError, ValueError, OSError
        With a sentence naming the bad file or value.
    """
    log_dir = Path(log_dir)
    if not log_dir.exists():
        raise FileNotFoundError(f"no session log at {log_dir}; pass a session directory or its session.plog")
    sweep = load_sweep(sweep_path) if sweep_path is not None else None
    if config is None:
        config = session_config(log_dir if log_dir.is_dir() else log_dir.parent)
    if overrides:
        config = with_overrides(config, overrides)
    record = gather_session(log_dir, config=config, model=model, overrides=overrides)
    text = render_report(record, sweep, Path(sweep_path) if sweep_path is not None else None)
    out_path = Path(out_path)
    out_path.write_text(text, encoding="utf-8")
    log.info("wrote %s (%.1f kB)", out_path, out_path.stat().st_size / 1e3)
    return record


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop report",
        description="Replay a recorded session and write one self-contained HTML report (opens with no network).",
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("log", help="session directory (or its session.plog)")
    parser.add_argument("--sweep", default=None, metavar="SWEEP.json",
                        help="add the trade-off plot of this sweep result (from placeloop sweep)")
    parser.add_argument("--out", default=None, metavar="PATH.html",
                        help="where to write the report (default: report_<session>.html in the current directory)")
    parser.add_argument("--config", default=None, help="replay with this config instead of the recorded one")
    parser.add_argument("--model", default=None, help="decode with this model file from the start")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="override one setting, e.g. decoder.step_s=0.01 (repeatable)")
    parser.add_argument("-v", "--verbose", action="count", default=0)
    return parser


def main(argv: list[str] | None = None) -> int:
    """``placeloop report LOG [--sweep SWEEP.json] [--out PATH.html] [--config C] [--model M] [--set NAME=V ...]``."""
    args = build_parser().parse_args(argv)
    setup_logging(args.verbose)
    log_path = Path(args.log)
    session_dir = log_path if log_path.is_dir() else log_path.parent
    out = Path(args.out) if args.out else Path(f"report_{session_dir.resolve().name}.html")
    try:
        config = load_config(args.config) if args.config else None
        model = PlaceModel.load(args.model) if args.model else None
        record = write_report(log_path, out, config=config, overrides=parse_settings(args.set), model=model,
                              sweep_path=args.sweep)
    except (LogFormatError, ConfigError, ModelFileError, ValueError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    if record.damage:
        print(f"warning: the log is incomplete or damaged; the report covers it up to there: {record.damage}",
              file=sys.stderr)
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
