"""Replaying a recorded session through the identical pipeline.

The session log holds every input message as received, in order, and the
config it ran with. A replay feeds those bytes through :class:`Ingest` into a
fresh :class:`Pipeline` — the very path the live loop used — so with the
recorded config it reproduces the live run's decoded steps, events and
digest exactly; with other settings (or another model) it shows what would
have happened.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from decoder.config import ExperimentConfig, load_config
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.session.ripples import RippleOutput
from decoder.session.steps import model_problem
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.wire.ingest import CHANNEL_CONTROL, CHANNEL_RIG, Ingest
from rig_adapters.sessions.recorder import CONFIG_SIDECAR, INITIAL_MODEL_SIDECAR, LogFormatError, LogRecord, iter_records
from rig_adapters.sessions.summary import LatencyLog, LatencySeries, session_summary

log = logging.getLogger(__name__)

#: Work samples held before they go into the latency series.
_LATENCY_BATCH = 4096


@dataclass
class ReplayResult:
    """What a replay produced."""

    summary: dict
    steps: list[StepOutput] = field(default_factory=list)
    notices: list[Notice] = field(default_factory=list)
    records_read: int = 0
    clean_close: bool = False
    damage: str | None = None
    wall_s: float = 0.0
    data_s: float = 0.0
    #: The pipeline after the replay: its model, scores and counters.
    pipeline: Pipeline | None = None
    latency: LatencyLog | None = None
    #: The log's JSON header.
    header: dict | None = None


def session_config(log_dir: str | Path) -> ExperimentConfig:
    """The config a recorded session ran with."""
    path = Path(log_dir) / CONFIG_SIDECAR
    if not path.exists():
        raise LogFormatError(f"{log_dir} has no {CONFIG_SIDECAR}; pass a config explicitly")
    return load_config(path)


def replay_session(log_dir: str | Path, config: ExperimentConfig | None = None,
                   model: PlaceModel | None = None, keep_steps: bool = False,
                   on_output: Callable[[StepOutput | LearningProgress | Notice | RippleOutput], None] | None = None,
                   realtime: bool = False, on_record: Callable[[LogRecord], None] | None = None,
                   keep_latency_samples: bool = False) -> ReplayResult:
    """Feed a recorded session through the pipeline.

    Parameters
    ----------
    log_dir : path
        The session directory (or its log file).
    config : ExperimentConfig, optional
        Settings to replay with; the recorded config by default.
    model : PlaceModel, optional
        Decode with this model from the start (and for every ``load_model``)
        instead of learning as the live run did; one that cannot decode this
        session (``decoder.session.steps.model_problem``) raises ModelFileError.
    keep_steps : bool
        Keep every StepOutput (memory grows with the session).
    on_output : callable, optional
        Called with every output (step, learning progress, notice, ripple) as it
        comes, for callers that keep only what they need (the report).
    realtime : bool
        Pace the replay by the recorded receive times instead of running as
        fast as possible.
    on_record : callable, optional
        Called with every record of the log as it is read (the report reads
        the live run's event stamps from the output records).
    keep_latency_samples : bool
        Keep every per-step work sample (``result.latency.decode_ms.values``).

    Returns
    -------
    ReplayResult
        ``summary`` has the same keys as the live summary; ``damage`` says
        where a truncated or corrupt log stopped.
    """
    log_dir = Path(log_dir)
    session_dir = log_dir if log_dir.is_dir() else log_dir.parent
    config = config or session_config(session_dir)
    if model is not None:
        # The check a load_model request and `placeloop run --model` get, for replay, export and report alike.
        why = model_problem(model, config.environment, config.marks.enabled)
        if why is not None:
            raise ModelFileError(f"the model given to decode with: {why}")
    initial = model
    if initial is None and (session_dir / INITIAL_MODEL_SIDECAR).exists():
        initial = PlaceModel.load(session_dir / INITIAL_MODEL_SIDECAR)
    pipeline = Pipeline(config, model=initial)
    ingest = Ingest(pipeline, model_override=model)
    latency = LatencyLog(decode_ms=LatencySeries(keep_all=keep_latency_samples))
    result = ReplayResult(summary={}, pipeline=pipeline, latency=latency, header=None)
    reader = iter_records(log_dir)
    started = time.perf_counter()
    first_t = None
    first_wall = None
    result.header = reader.header
    # Locals: this loop runs once per recorded message, hundreds of thousands of times.
    clock = time.perf_counter
    rig_bytes = ingest.rig_bytes
    # Work samples go into the latency series in batches (the same figures, less work per step).
    added_ms: list[float] = []
    per_step_ms: list[float] = []
    n_read = 0
    for record in reader:
        n_read += 1
        if on_record is not None:
            on_record(record)
        if record.type != "input":
            continue
        if realtime:
            if first_wall is None:
                first_wall = (record.wall_s, clock())
            delay = (record.wall_s - first_wall[0]) - (clock() - first_wall[1])
            if delay > 0:
                time.sleep(delay)
        t0 = clock()
        if record.channel == CHANNEL_RIG:
            outputs = rig_bytes(record.payload)
        elif record.channel == CHANNEL_CONTROL:
            outputs, _ = ingest.control_bytes(record.payload)
        else:
            continue
        if not outputs:
            continue
        steps = outputs if len(outputs) == 1 and type(outputs[0]) is StepOutput else [
            o for o in outputs if isinstance(o, StepOutput)
        ]
        if steps:
            work_ms = (clock() - t0) * 1e3
            # Without sockets, the added latency is the work on the message that closed the steps.
            added_ms.append(work_ms)
            per_step_ms.append(work_ms / len(steps))
            if len(added_ms) >= _LATENCY_BATCH:
                latency.added_ms.extend(added_ms)
                latency.decode_ms.extend(per_step_ms)
                added_ms.clear()
                per_step_ms.clear()
            if first_t is None:
                first_t = steps[0].t_s
            result.data_s = steps[-1].t_s - first_t
        if on_output is not None:
            for out in outputs:
                on_output(out)
        if keep_steps:
            result.steps.extend(steps)
        if len(steps) < len(outputs):
            result.notices.extend(o for o in outputs if isinstance(o, Notice))
    latency.added_ms.extend(added_ms)
    latency.decode_ms.extend(per_step_ms)
    result.records_read = n_read
    result.wall_s = clock() - started
    result.clean_close = reader.clean_close
    result.damage = reader.damage
    if reader.damage:
        log.warning("replay stopped early: %s", reader.damage)
    result.summary = session_summary(pipeline, latency)
    result.summary["replay"] = {
        "records": result.records_read,
        "x_realtime": result.data_s / result.wall_s if result.wall_s > 0 else None,
        "clean_close": result.clean_close,
        "damage": result.damage,
        "wall_s": result.wall_s,
    }
    return result
