"""A session log of the simulated rig, written without sockets (tests and benchmarks)."""

from __future__ import annotations

from pathlib import Path

from decoder.config import ExperimentConfig
from rig_adapters.sessions.recorder import CONFIG_SIDECAR, SessionRecorder
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_RIG


def record_simulated_session(config: ExperimentConfig, log_dir: str | Path, until_s: float, seed: int = 7,
                             wall_start_s: float = 1.0e9) -> Path:
    """Write the session log a live run of the simulated rig would have left, without sockets.

    Every simulated message is encoded on the wire format and recorded on the
    rig channel with a receive time of ``wall_start_s`` plus its data time, and
    the config goes beside the log, exactly as ``placeloop run --log`` stores
    them. Tests and benchmarks use it to make long sessions in seconds.

    Parameters
    ----------
    config : ExperimentConfig
        Needs a ``[simulation]`` table (may be empty: defaults apply).
    log_dir : path
        A new session directory.
    until_s : float
        Simulated seconds.
    seed : int

    Returns
    -------
    Path
        The session directory.
    """
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    with SessionRecorder(log_dir, flush_interval_s=1.0, fsync="never",
                         metadata={"simulated": True, "seed": seed}) as recorder:
        recorder.write_sidecar(CONFIG_SIDECAR, config.source_text.encode())
        for chunk in session.chunks(until_s=until_s):
            wall = wall_start_s + chunk.t_end_s
            for msg in chunk.messages:
                recorder.record_input(protocol.encode(msg), wall, CHANNEL_RIG)
            recorder.maybe_flush(wall)
    return Path(log_dir)
