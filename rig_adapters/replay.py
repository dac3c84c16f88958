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
from dataclasses import dataclass, field
from pathlib import Path

from decoder.config import ExperimentConfig, load_config
from decoder.pipeline import Notice, Pipeline, StepOutput
from decoder.place_model import PlaceModel
from rig_adapters.ingest import CHANNEL_CONTROL, CHANNEL_RIG, Ingest
from rig_adapters.loop import LatencyLog, session_summary
from rig_adapters.recorder import LogFormatError, iter_records

log = logging.getLogger(__name__)

#: Sidecar holding a model the live run was started with (``placeloop run --model``).
INITIAL_MODEL = "initial_model.npz"
#: Sidecar holding the config the live run used.
CONFIG_SIDECAR = "config.toml"


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


def session_config(log_dir: str | Path) -> ExperimentConfig:
    """The config a recorded session ran with."""
    path = Path(log_dir) / CONFIG_SIDECAR
    if not path.exists():
        raise LogFormatError(f"{log_dir} has no {CONFIG_SIDECAR}; pass a config explicitly")
    return load_config(path)


def replay_session(log_dir: str | Path, config: ExperimentConfig | None = None,
                   model: PlaceModel | None = None, keep_steps: bool = False) -> ReplayResult:
    """Feed a recorded session through the pipeline.

    Parameters
    ----------
    log_dir : path
        The session directory (or its log file).
    config : ExperimentConfig, optional
        Settings to replay with; the recorded config by default.
    model : PlaceModel, optional
        Decode with this model from the start (and for every ``load_model``)
        instead of learning as the live run did.
    keep_steps : bool
        Keep every StepOutput (memory grows with the session).

    Returns
    -------
    ReplayResult
        ``summary`` has the same keys as the live summary; ``damage`` says
        where a truncated or corrupt log stopped.
    """
    log_dir = Path(log_dir)
    session_dir = log_dir if log_dir.is_dir() else log_dir.parent
    config = config or session_config(session_dir)
    initial = model
    if initial is None and (session_dir / INITIAL_MODEL).exists():
        initial = PlaceModel.load(session_dir / INITIAL_MODEL)
    pipeline = Pipeline(config, model=initial)
    ingest = Ingest(pipeline, model_override=model)
    latency = LatencyLog()
    result = ReplayResult(summary={})
    reader = iter_records(log_dir)
    started = time.perf_counter()
    first_t = None
    for record in reader:
        result.records_read += 1
        if record.type != "input":
            continue
        t0 = time.perf_counter()
        if record.channel == CHANNEL_RIG:
            outputs = ingest.rig_bytes(record.payload)
        elif record.channel == CHANNEL_CONTROL:
            outputs, _ = ingest.control_bytes(record.payload)
        else:
            continue
        if not outputs:
            continue
        steps = [o for o in outputs if isinstance(o, StepOutput)]
        if steps:
            latency.decode_ms.append((time.perf_counter() - t0) * 1e3 / len(steps))
            if first_t is None:
                first_t = steps[0].t_s
            result.data_s = steps[-1].t_s - first_t
        if keep_steps:
            result.steps.extend(steps)
        result.notices.extend(o for o in outputs if isinstance(o, Notice))
    result.wall_s = time.perf_counter() - started
    result.clean_close = reader.clean_close
    result.damage = reader.damage
    if reader.damage:
        log.warning("replay stopped early: %s", reader.damage)
    result.summary = session_summary(pipeline, latency)
    result.summary["replay"] = {
        "records": result.records_read,
        "clean_close": result.clean_close,
        "damage": result.damage,
        "wall_s": result.wall_s,
    }
    return result
