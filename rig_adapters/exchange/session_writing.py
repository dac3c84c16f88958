"""A session log written from messages in data-time order, complete or not at all.

:func:`write_session_log` records typed input messages the way
``placeloop run --log`` records a rig: every message encoded on the wire
format, rig messages on the rig channel and control commands as control
requests on the control channel, each stamped with a receive time of
``wall_start_s`` plus the data time of the chunk it belongs to, and the
config beside the log. A replay, a sweep or a report then takes the log as
it takes a recorded live session.

The log is written into a temporary directory beside the target and renamed
to it only after the recorder closed cleanly, so that a failure halfway
(a bad file, a full disk, Ctrl-C) never leaves a directory that looks like a
complete session.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterable
from pathlib import Path

from decoder.messages import ControlCommand, InputMessage
from rig_adapters.sessions.recorder import CONFIG_SIDECAR, SessionRecorder
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_CONTROL, CHANNEL_RIG

__all__ = ["write_session_log"]


def write_session_log(log_dir: str | Path, config_text: str, chunks: Iterable[tuple[float, Iterable[InputMessage]]],
                      metadata: dict, wall_start_s: float) -> Path:
    """Record ``chunks`` as the session log a live run would have left in ``log_dir``.

    Parameters
    ----------
    log_dir : path
        The new session directory; it must not exist yet.
    config_text : str
        The TOML config stored beside the log (``config.toml``).
    chunks : iterable of (t_end_s, messages)
        Messages in the order a rig sends them, each group to be received
        once data time reaches ``t_end_s`` (s). A :class:`ControlCommand`
        is recorded as a request on the control socket, everything else on
        the rig socket.
    metadata : dict
        Plain JSON for the log's header.
    wall_start_s : float
        Receive time of data time 0, seconds since the Unix epoch.

    Returns
    -------
    Path
        ``log_dir``, complete (its log ends with a clean close).

    Raises
    ------
    FileExistsError
        If ``log_dir`` exists already: a session is never overwritten.
    """
    target = Path(log_dir)
    if target.exists():
        raise FileExistsError(f"{target} exists already; placeloop never overwrites a session. Choose a new directory.")
    target.parent.mkdir(parents=True, exist_ok=True)
    partial = target.with_name(f".{target.name}.partial-{os.getpid()}")
    shutil.rmtree(partial, ignore_errors=True)
    try:
        with SessionRecorder(partial, flush_interval_s=1.0, fsync="on_close", metadata=metadata) as recorder:
            recorder.write_sidecar(CONFIG_SIDECAR, config_text.encode("utf-8"), wall_s=wall_start_s)
            for t_end_s, messages in chunks:
                wall = wall_start_s + t_end_s
                for msg in messages:
                    if type(msg) is ControlCommand:
                        payload = protocol.encode_control_request(msg.command, msg.args, source=msg.source,
                                                                  seq=msg.seq)
                        recorder.record_input(payload, wall, CHANNEL_CONTROL)
                    else:
                        recorder.record_input(protocol.encode(msg), wall, CHANNEL_RIG)
                recorder.maybe_flush(wall)
        os.rename(partial, target)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return target
