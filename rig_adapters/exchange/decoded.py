"""A recorded session's decoded steps and events as columns: what the NWB and table exports write.

:func:`decoded_session` replays a session log through the same pipeline as
``placeloop replay`` (with the recorded config it reproduces the live run's
steps and events exactly) and keeps, per decoded step, the positions and the
posterior's summaries, and per event its zone, rule and the live run's
latency stamps read from the log's event records (NaN for an event the live
run never sent, as in a replay with other settings).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from decoder.config import ExperimentConfig
from decoder.encoding.place_model import PlaceModel
from decoder.session.outputs import StepOutput
from rig_adapters.sessions.replay import replay_session, session_config
from rig_adapters.sessions.recorder import LogRecord
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_DRY_RUN_EVENTS, CHANNEL_EVENTS

log = logging.getLogger(__name__)

__all__ = ["DecodedSession", "decoded_session", "STEP_COLUMNS", "EVENT_COLUMNS"]

#: Per-step columns (one float each) in the order rows are kept; zone masses follow as ``zone_mass_<name>``.
STEP_COLUMNS = ("t_s", "decoded_x_cm", "decoded_y_cm", "map_x_cm", "map_y_cm", "mean_x_cm", "mean_y_cm",
                "tracked_x_cm", "tracked_y_cm",
                "true_x_cm", "true_y_cm", "error_cm", "peak_prob", "hpd95_size", "n_spikes", "armed")

#: Per-event columns.
EVENT_COLUMNS = ("event_id", "t_s", "rule", "zone", "zone_mass", "map_x_cm", "map_y_cm", "mean_x_cm", "mean_y_cm",
                 "tracked_x_cm", "tracked_y_cm", "far_from_zone", "wall_received_s", "wall_decoded_s",
                 "wall_sent_s")

_STAMPS = ("wall_received_s", "wall_decoded_s", "wall_sent_s")


@dataclass
class DecodedSession:
    """Columns of one replayed session.

    Attributes
    ----------
    steps : dict of str -> ndarray, each shape (n_steps,)
        :data:`STEP_COLUMNS` and ``zone_mass_<zone>``; positions in cm,
        ``hpd95_size`` in cm² (arena) or cm (track, graph).
    events : dict of str -> ndarray or list, each of length n_events
        :data:`EVENT_COLUMNS`.
    zone_names : tuple of str
    config : ExperimentConfig
    model : PlaceModel or None
        The model decoding at the end (fitted in the session or loaded).
    summary : dict
        The replay's summary (same keys as ``placeloop replay --summary``).
    header : dict
        The log's JSON header.
    step_s : float
    """

    steps: dict
    events: dict
    zone_names: tuple
    config: ExperimentConfig
    model: PlaceModel | None
    summary: dict
    header: dict
    step_s: float
    notices: list = field(default_factory=list)


def decoded_session(log_dir: str | Path, config: ExperimentConfig | None = None,
                    model: PlaceModel | None = None) -> DecodedSession:
    """Replay ``log_dir`` and keep its decoded steps and events as columns.

    Parameters
    ----------
    log_dir : path
        A session directory (live, replayed or imported).
    config : ExperimentConfig, optional
        Replay with these settings; the recorded config by default.
    model : PlaceModel, optional
        Decode with this model from the start.

    Returns
    -------
    DecodedSession
    """
    config = config or session_config(Path(log_dir) if Path(log_dir).is_dir() else Path(log_dir).parent)
    zone_names = config.zone_names()
    rows: list[tuple] = []
    masses: list[np.ndarray] = []
    events: list[tuple] = []
    stamps: dict[int, tuple[float, float, float]] = {}

    def on_output(out) -> None:
        if type(out) is not StepOutput:
            return
        step = out.step
        rows.append((out.t_s, *step.decoded_xy_cm, *step.map_xy_cm, *step.mean_xy_cm, *out.tracked_xy_cm,
                     *out.true_xy_cm, out.error_cm,
                     step.peak_prob, step.hpd95_size, step.n_spikes, out.armed))
        masses.append(step.zone_mass)
        for event, far in zip(out.events, out.false_events):
            events.append((event.event_id, event.t_s, event.rule, event.zone, event.zone_mass, *step.map_xy_cm,
                           *step.mean_xy_cm, *event.tracked_xy_cm, far))

    def on_record(record: LogRecord) -> None:
        if record.type != "output" or record.channel not in (CHANNEL_EVENTS, CHANNEL_DRY_RUN_EVENTS):
            return
        try:
            event = protocol.decode_output(record.payload)
        except protocol.ProtocolError as exc:
            log.warning("an event record of the log cannot be read (%s); its stamps are left out", exc)
            return
        if event.get("kind") == "event":
            stamps[int(event["event_id"])] = tuple(float(event[k]) for k in _STAMPS)

    result = replay_session(log_dir, config=config, model=model, on_output=on_output, on_record=on_record)
    table = np.array(rows, dtype=np.float64).reshape(-1, len(STEP_COLUMNS))
    steps = {name: table[:, i] for i, name in enumerate(STEP_COLUMNS)}
    zone_mass = np.array(masses, dtype=np.float64).reshape(len(masses), len(zone_names))
    for j, name in enumerate(zone_names):
        steps[f"zone_mass_{name}"] = zone_mass[:, j]
    columns: dict = {name: [] for name in EVENT_COLUMNS}
    for row in events:
        for name, value in zip(EVENT_COLUMNS, row):
            columns[name].append(value)
        for name, value in zip(_STAMPS, stamps.get(row[0], (np.nan,) * 3)):
            columns[name].append(value)
    pipeline = result.pipeline
    model_out = pipeline.model if pipeline is not None and pipeline.state == "decoding" else None
    return DecodedSession(steps=steps, events=columns, zone_names=zone_names, config=config, model=model_out,
                          summary=result.summary, header=result.header or {}, step_s=config.decoder.step_s,
                          notices=result.notices)
