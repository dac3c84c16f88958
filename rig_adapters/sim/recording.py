"""A session log of the simulated rig, written without sockets (tests and benchmarks)."""

from __future__ import annotations

from pathlib import Path

from decoder.config import ExperimentConfig
from rig_adapters.exchange.session_writing import write_session_log
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession


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
        A new session directory (it must not exist yet; it appears complete or not at all).
    until_s : float
        Simulated seconds.
    seed : int

    Returns
    -------
    Path
        The session directory.
    """
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    chunks = ((chunk.t_end_s, chunk.messages) for chunk in session.chunks(until_s=until_s))
    return write_session_log(log_dir, config.source_text, chunks, {"simulated": True, "seed": seed}, wall_start_s)
