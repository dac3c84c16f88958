"""The crash-safe session log: every message in, every event out, in order.

The live loop hands the recorder each input message as raw bytes the moment
it arrives (before validation, so that a replay sees exactly what the live
run saw, bad input included), each output message as sent, and small JSON
marks ("model fitted", "armed"). Appends only touch an in-memory buffer; the
loop calls :meth:`SessionRecorder.maybe_flush` from its poll loop, which
hands the buffer to the operating system at most once per
``flush_interval_s`` of wall time. Nothing here ever blocks on the disk
except an optional ``fsync``.

The byte layout is specified in ``rig_adapters/sessions/LOG_FORMAT.md``; this module
is its writer, :mod:`rig_adapters.sessions.log_reader` its reader and
:mod:`rig_adapters.sessions.log_format` holds what both agree on. The reader's
names are importable from here too, beside the sidecar names, so that a
session directory is described in one place.

Durability, in short: once :meth:`~SessionRecorder.maybe_flush` or
:meth:`~SessionRecorder.flush` has returned, the bytes belong to the
operating system, so a crash or ``kill -9`` of the recording process loses
only what was still in the buffer (at most one flush interval). A power cut
or kernel crash can also lose what the OS had not yet put on disk; the
``fsync`` policy decides how much that can be.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import json
import logging
import math
import os
import time
import zlib
from pathlib import Path
from typing import Any

from rig_adapters.sessions.log_format import (
    CHANNEL_RECORD,
    CRC,
    END_RECORD,
    FILE_START,
    FORMAT_VERSION,
    HEADER_CRC,
    INPUT_RECORD,
    LOG_NAME,
    MAGIC,
    MARK_RECORD,
    MAX_CHANNEL_NAME_BYTES,
    MAX_CHANNELS,
    MAX_HEADER_BYTES,
    MAX_NOTE_BYTES,
    MAX_PAYLOAD_BYTES,
    NO_CHANNEL,
    OUTPUT_RECORD,
    PREFIX,
    PREFIX_AFTER_CRC,
    TYPE_NAMES,
    LogFormatError,
)
from rig_adapters.sessions.log_reader import (
    LogReader,
    LogReadResult,
    LogRecord,
    iter_records,
    read_log,
)
from rig_adapters.wire.protocol import PROTOCOL_VERSION

logger = logging.getLogger(__name__)

__all__ = [
    "SessionRecorder",
    "CONFIG_SIDECAR",
    "INITIAL_MODEL_SIDECAR",
    "FITTED_MODEL_SIDECAR",
    "FLUSH_BYTES",
    "MAX_BUFFER_BYTES",
    "FSYNC_POLICIES",
    # The log's format and its reader, re-exported for the callers that name a session directory's files.
    "LOG_NAME",
    "MAGIC",
    "FORMAT_VERSION",
    "MAX_PAYLOAD_BYTES",
    "MAX_HEADER_BYTES",
    "MAX_CHANNEL_NAME_BYTES",
    "MAX_NOTE_BYTES",
    "LogFormatError",
    "LogRecord",
    "LogReadResult",
    "LogReader",
    "iter_records",
    "read_log",
]

#: Sidecar holding the config the live run used.
CONFIG_SIDECAR = "config.toml"
#: Sidecar holding a model the live run was started with (``placeloop run --model``).
INITIAL_MODEL_SIDECAR = "initial_model.npz"
#: Sidecar holding a model fitted during the session (read back by replays and reports).
FITTED_MODEL_SIDECAR = "fitted_model.npz"

#: The buffer is handed to the OS at the next ``maybe_flush`` once it holds
#: this many bytes, even before the flush interval is over, so that a burst
#: of large messages does not pile up in memory.
FLUSH_BYTES = 1024 * 1024

#: Unwritten bytes the recorder holds while the disk refuses writes (full,
#: gone) before it starts dropping new records; each drop is counted and
#: noted in the log once writing works again.
MAX_BUFFER_BYTES = 256 * 1024 * 1024

FSYNC_POLICIES = ("never", "on_flush", "on_close")


def _placeloop_version() -> str:
    try:
        return importlib.metadata.version("placeloop")
    except importlib.metadata.PackageNotFoundError:
        return "unknown (not installed)"


def _fsync_directory(directory: Path) -> None:
    # A new or renamed file survives a power cut only once its directory
    # entry is on disk too.
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_fully(fd: int, data: bytes) -> None:
    # os.write may write less than asked (signals, quotas); loop until done.
    with memoryview(data) as view:
        done = 0
        while done < len(view):
            with view[done:] as rest:
                done += os.write(fd, rest)


def _sidecar_path(directory: Path, name: Any) -> Path:
    if not isinstance(name, str) or not name or name in (".", "..") or "/" in name or "\\" in name or "\0" in name:
        raise ValueError(f"sidecar name must be a plain file name such as 'config.toml', got {name!r}")
    if name.startswith("."):
        raise ValueError(f"sidecar name {name!r} starts with a dot; those names are kept for temporary files")
    if name == LOG_NAME:
        raise ValueError(f"sidecar name {name!r} is the session log's own name; choose another")
    return directory / name


class SessionRecorder:
    """Append-only, crash-safe log of one session, written in the loop's process.

    Parameters
    ----------
    directory : str or Path
        Session directory; created if missing. The log is
        ``directory / "session.plog"``; sidecar files go beside it.
    flush_interval_s : float, default 0.05
        Wall-clock seconds between hand-overs of the buffer to the OS; also
        the most a crash of the process can lose. ``0`` hands over at every
        :meth:`maybe_flush`.
    fsync : {"never", "on_flush", "on_close"}, default "on_close"
        When to force data from the OS onto the disk. ``"never"``: fastest;
        a power cut can lose whatever the OS had not yet written back.
        ``"on_flush"``: a power cut loses at most one flush interval, but
        each ``fsync`` can take milliseconds to tens of milliseconds on a
        busy disk, and the loop waits for it. ``"on_close"``: the header at
        creation and everything at close; a power cut mid-session can lose
        the OS's unwritten tail. None of them matters for a crash or kill of
        the process: those lose only the unflushed buffer.
    metadata : dict, optional
        Free-form JSON-serialisable session metadata stored in the header
        (animal, experimenter, protocol id, ...).
    protocol_version : int, default ``rig_adapters.wire.protocol.PROTOCOL_VERSION``
        Version of the wire protocol the recorded messages use, stored in
        the header so that a replay decodes them with the right codec.
    max_payload_bytes : int, default MAX_PAYLOAD_BYTES
        Largest input or output payload recorded; a larger one is counted
        (``dropped_oversized``) and replaced by a mark saying what was
        dropped and why. At most :data:`MAX_PAYLOAD_BYTES`.

    Raises
    ------
    FileExistsError
        If the directory already holds a session log. A recording is never
        overwritten.

    Notes
    -----
    Not thread-safe: one loop, one recorder. The recorder reads the wall
    clock only to stamp the header, the end record and sidecar marks given
    no time; every other record's time is the caller's.

    Examples
    --------
    >>> import tempfile, time
    >>> with SessionRecorder(tempfile.mkdtemp() + "/s1", metadata={"animal": "m07"}) as rec:
    ...     rec.record_input(b"\\x81\\xa1v\\x01", time.time(), "spikes")
    ...     rec.record_mark({"event": "armed"}, time.time())
    ...     flushed = rec.maybe_flush(time.time())
    >>> result = read_log(rec.path)
    >>> [r.type for r in result.records], result.clean_close
    (['input', 'mark'], True)
    """

    def __init__(
        self,
        directory: str | os.PathLike,
        *,
        flush_interval_s: float = 0.05,
        fsync: str = "on_close",
        metadata: dict | None = None,
        protocol_version: int = PROTOCOL_VERSION,
        max_payload_bytes: int = MAX_PAYLOAD_BYTES,
    ) -> None:
        if not (isinstance(flush_interval_s, (int, float)) and math.isfinite(flush_interval_s)) or flush_interval_s < 0:
            raise ValueError(f"flush_interval_s must be a finite number of seconds >= 0, got {flush_interval_s!r}")
        if fsync not in FSYNC_POLICIES:
            raise ValueError(f"fsync must be one of {', '.join(FSYNC_POLICIES)}; got {fsync!r}")
        if isinstance(max_payload_bytes, bool) or not isinstance(max_payload_bytes, int) or not (
            0 <= max_payload_bytes <= MAX_PAYLOAD_BYTES
        ):
            raise ValueError(
                f"max_payload_bytes must be an integer from 0 to {MAX_PAYLOAD_BYTES}, got {max_payload_bytes!r}"
            )
        if isinstance(protocol_version, bool) or not isinstance(protocol_version, int) or protocol_version < 1:
            raise ValueError(f"protocol_version must be a positive integer, got {protocol_version!r}")
        if metadata is not None and not isinstance(metadata, dict):
            raise ValueError(f"metadata must be a dict, got {type(metadata).__name__}")

        self.directory = Path(directory)
        self.path = self.directory / LOG_NAME
        self.flush_interval_s = float(flush_interval_s)
        self.fsync = fsync
        self.max_payload_bytes = max_payload_bytes

        created_wall_s = time.time()
        header = {
            "format": "placeloop session log",
            "format_version": FORMAT_VERSION,
            "created_wall_s": created_wall_s,
            "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(created_wall_s)),
            "placeloop_version": _placeloop_version(),
            "protocol_version": protocol_version,
            "flush_interval_s": self.flush_interval_s,
            "fsync": fsync,
            "max_payload_bytes": max_payload_bytes,
            "metadata": metadata or {},
        }
        try:
            header_json = json.dumps(header, allow_nan=False).encode("utf-8")
        except (TypeError, ValueError) as exc:
            raise ValueError(f"metadata must be plain JSON (str, numbers, lists, dicts): {exc}") from None
        if len(header_json) > MAX_HEADER_BYTES:
            raise ValueError(f"metadata makes a header of {len(header_json)} bytes; the limit is {MAX_HEADER_BYTES}")
        self.header = header

        self.directory.mkdir(parents=True, exist_ok=True)
        try:
            # O_EXCL: refuse to overwrite; O_APPEND: every write lands at the
            # end, so a retried partial write continues the byte stream.
            self._fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o644)
        except FileExistsError:
            raise FileExistsError(
                f"{self.path} already holds a session log; placeloop never overwrites a recording. "
                "Choose a new session directory or move the old one away."
            ) from None
        try:
            start = FILE_START.pack(MAGIC, FORMAT_VERSION, len(header_json))
            crc = zlib.crc32(header_json, zlib.crc32(start[len(MAGIC):]))
            _write_fully(self._fd, start + header_json + HEADER_CRC.pack(crc))
            if fsync != "never":
                os.fsync(self._fd)
                _fsync_directory(self.directory)
        except OSError:
            os.close(self._fd)
            raise

        self._buf = bytearray()
        self._written = 0  # bytes at the start of _buf already handed to the OS
        self._last_flush_s: float | None = None
        self._channels: dict[str, int] = {}
        self._closed = False
        self._failing = False  # the last write failed
        self._dropped_since_note = 0
        self._counters = {
            "records": 0,
            "inputs": 0,
            "outputs": 0,
            "marks": 0,
            "bytes_written": len(start) + len(header_json) + HEADER_CRC.size,
            "flushes": 0,
            "fsyncs": 0,
            "dropped_oversized": 0,
            "dropped_buffer_full": 0,
            "write_errors": 0,
        }
        logger.info("recording session to %s (flush every %.3f s, fsync %s)", self.path, self.flush_interval_s, fsync)

    # -- appending (never touches the disk) ---------------------------------

    def record_input(self, payload: bytes, recv_wall_s: float, channel: str) -> None:
        """Append one input message exactly as received.

        Parameters
        ----------
        payload : bytes, bytearray or memoryview
            The raw message, valid or not.
        recv_wall_s : float
            Wall-clock time of receipt, seconds since the Unix epoch.
        channel : str
            Name of the channel (socket) it came in on, e.g. ``"spikes"``.
        """
        self._append_message(INPUT_RECORD, payload, recv_wall_s, channel)

    def record_output(self, payload: bytes, wall_s: float, channel: str) -> None:
        """Append one outgoing event or state message exactly as sent.

        Parameters
        ----------
        payload : bytes, bytearray or memoryview
        wall_s : float
            Wall-clock time of sending, seconds since the Unix epoch.
        channel : str
            Name of the channel it went out on, e.g. ``"events"``.
        """
        self._append_message(OUTPUT_RECORD, payload, wall_s, channel)

    def record_mark(self, note: dict, wall_s: float) -> None:
        """Append a small JSON note, e.g. ``{"event": "model fitted"}``.

        Parameters
        ----------
        note : dict
            JSON-serialisable. A note over :data:`MAX_NOTE_BYTES` once
            encoded is counted (``dropped_oversized``) and replaced by a
            short mark that says so.
        wall_s : float
            Wall-clock time of the mark, seconds since the Unix epoch.

        Raises
        ------
        ValueError
            If the note is not a dict of plain JSON (no NaN or infinity).
        """
        if not isinstance(note, dict):
            raise ValueError(f"a mark's note must be a dict, got {type(note).__name__}")
        try:
            data = json.dumps(note, allow_nan=False, separators=(",", ":")).encode("utf-8")
        except (TypeError, ValueError) as exc:
            raise ValueError(f"a mark's note must be plain JSON (str, numbers, lists, dicts): {exc}") from None
        self._check_open()
        if len(data) > MAX_NOTE_BYTES:
            self._counters["dropped_oversized"] += 1
            logger.warning("dropped a mark of %d bytes: over the cap", len(data))
            reason = f"a note of {len(data)} bytes exceeds the cap of {MAX_NOTE_BYTES} bytes"
            data = json.dumps({"dropped": "mark", "keys": sorted(map(str, note))[:50], "reason": reason}).encode()
        if self._append(MARK_RECORD, NO_CHANNEL, wall_s, data):
            self._counters["marks"] += 1

    def _append_message(self, rtype: int, payload: Any, wall_s: float, channel: str) -> None:
        self._check_open()
        if not isinstance(payload, bytes):
            if not isinstance(payload, (bytearray, memoryview)):
                raise TypeError(f"payload must be bytes, bytearray or memoryview, got {type(payload).__name__}")
            payload = bytes(payload)
        channel_id = self._channels.get(channel)
        if channel_id is None:
            channel_id = self._declare_channel(channel, wall_s)
        if len(payload) > self.max_payload_bytes:
            self._counters["dropped_oversized"] += 1
            kind = TYPE_NAMES[rtype]
            logger.warning("dropped an %s payload of %d bytes on channel %r: over the cap", kind, len(payload), channel)
            self.record_mark(
                {
                    "dropped": kind,
                    "channel": channel,
                    "payload_bytes": len(payload),
                    "reason": f"payload of {len(payload)} bytes exceeds the recorder's cap of "
                    f"{self.max_payload_bytes} bytes",
                },
                wall_s,
            )
            return
        if self._append(rtype, channel_id, wall_s, payload):
            self._counters["inputs" if rtype == INPUT_RECORD else "outputs"] += 1

    def _declare_channel(self, channel: Any, wall_s: float) -> int:
        if not isinstance(channel, str) or not channel:
            raise ValueError(f"channel must be a non-empty name such as 'spikes', got {channel!r}")
        name = channel.encode("utf-8")
        if len(name) > MAX_CHANNEL_NAME_BYTES:
            raise ValueError(f"channel name {channel!r} is longer than {MAX_CHANNEL_NAME_BYTES} bytes")
        if len(self._channels) >= MAX_CHANNELS - 1:
            raise ValueError(f"a session log holds at most {MAX_CHANNELS - 1} channels; {channel!r} is one too many")
        channel_id = len(self._channels) + 1
        self._append(CHANNEL_RECORD, channel_id, wall_s, name, count=False)
        self._channels[channel] = channel_id
        return channel_id

    def _append(self, rtype: int, channel_id: int, wall_s: float, payload: bytes, count: bool = True) -> bool:
        # Bookkeeping records (count=False: channel declarations, the end
        # record) are tiny and always kept, so the log stays readable.
        pending = len(self._buf) - self._written
        if count and pending + PREFIX.size + len(payload) > MAX_BUFFER_BYTES:
            if self._dropped_since_note == 0:
                logger.error("recorder buffer full (%d bytes unwritten); dropping records until writes work", pending)
            self._dropped_since_note += 1
            self._counters["dropped_buffer_full"] += 1
            return False
        rest = PREFIX_AFTER_CRC.pack(len(payload), rtype, 0, channel_id, wall_s)
        self._buf += CRC.pack(zlib.crc32(payload, zlib.crc32(rest)))
        self._buf += rest
        self._buf += payload
        if count:
            self._counters["records"] += 1
        return True

    # -- writing --------------------------------------------------------------

    def maybe_flush(self, now_wall_s: float) -> bool:
        """Hand the buffer to the OS if the flush interval is over.

        Call from the loop on every pass; it returns at once when there is
        nothing to do. Never raises on a disk error: the error is logged and
        counted (``write_errors``) and the data stays buffered for the next
        try.

        Parameters
        ----------
        now_wall_s : float
            Current wall-clock time, on the same clock as the record times.

        Returns
        -------
        bool
            True if this call wrote the whole buffer out.
        """
        if self._closed or len(self._buf) == self._written:
            return False
        if self._last_flush_s is not None and (self._failing or len(self._buf) - self._written < FLUSH_BYTES):
            elapsed_s = now_wall_s - self._last_flush_s
            # A wall clock stepped backwards (NTP) counts as elapsed, so that
            # flushing never stops for the length of the step.
            if 0.0 <= elapsed_s < self.flush_interval_s:
                return False
        self._last_flush_s = now_wall_s
        return self._flush_buffer(self.fsync == "on_flush")

    def flush(self) -> bool:
        """Hand the buffer to the OS now, whatever the interval.

        Returns
        -------
        bool
            True if everything recorded so far is with the OS. A disk error
            is logged and counted, never raised.
        """
        self._check_open()
        return self._flush_buffer(self.fsync == "on_flush")

    def close(self) -> None:
        """Write the end record, flush, fsync unless ``fsync="never"``, close.

        Closing twice is harmless.

        Raises
        ------
        OSError
            If the last records could not be written; the file is closed
            anyway and reads back as an unclean close.
        """
        if self._closed:
            return
        wall_s = time.time()
        self._note_dropped(wall_s)
        summary = dict(self._counters, closed_wall_s=wall_s, channels=list(self._channels))
        self._append(END_RECORD, NO_CHANNEL, wall_s, json.dumps(summary).encode("utf-8"), count=False)
        try:
            ok = self._flush_buffer(self.fsync != "never")
        finally:
            self._closed = True
            os.close(self._fd)
        if not ok:
            raise OSError(
                f"the last {len(self._buf) - self._written} bytes of {self.path} could not be written; "
                "see the logged error (is the disk full?)"
            )
        logger.info(
            "closed %s: %d records, %d bytes", self.path, self._counters["records"], self._counters["bytes_written"]
        )

    def _flush_buffer(self, do_fsync: bool) -> bool:
        if len(self._buf) > self._written:
            try:
                with memoryview(self._buf) as view:
                    while self._written < len(view):
                        # Advance after every partial write, so that a retry
                        # after an error continues the byte stream exactly.
                        with view[self._written :] as rest:
                            self._written += os.write(self._fd, rest)
            except OSError as exc:
                self._counters["write_errors"] += 1
                if not self._failing:
                    # Once per outage: the loop retries every flush interval.
                    logger.error(
                        "writing %s failed, keeping %d bytes buffered and retrying: %s",
                        self.path,
                        len(self._buf) - self._written,
                        exc,
                    )
                self._failing = True
                return False
            if self._failing:
                logger.warning("writing %s works again", self.path)
                self._failing = False
            self._counters["bytes_written"] += self._written
            self._counters["flushes"] += 1
            del self._buf[:]
            self._written = 0
            if self._dropped_since_note and not self._closed:
                self._note_dropped(self._last_flush_s if self._last_flush_s is not None else time.time())
        if do_fsync:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                self._counters["write_errors"] += 1
                logger.error("fsync of %s failed: %s", self.path, exc)
                return False
            self._counters["fsyncs"] += 1
        return True

    def _note_dropped(self, wall_s: float) -> None:
        if self._dropped_since_note:
            n, self._dropped_since_note = self._dropped_since_note, 0
            self.record_mark(
                {"dropped": n, "reason": "the recorder's buffer was full because the disk refused writes"}, wall_s
            )

    # -- sidecars ---------------------------------------------------------------

    def write_sidecar(self, name: str, data: bytes, wall_s: float | None = None) -> Path:
        """Store a file beside the log atomically, e.g. the config or the model.

        The bytes go to a temporary file that is then renamed over ``name``,
        so a reader (or a crash) sees the old file or the new one, never a
        mix. A mark records the name, size and SHA-256 so that a replay can
        tell which version of the file was in force from when.

        Parameters
        ----------
        name : str
            Plain file name, e.g. ``"config.toml"`` or ``"model.npz"``.
        data : bytes
        wall_s : float, optional
            Time for the mark; the current wall clock if omitted.

        Returns
        -------
        Path
            Where the file now is.
        """
        self._check_open()
        target = _sidecar_path(self.directory, name)
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise TypeError(f"sidecar data must be bytes, got {type(data).__name__}")
        data = bytes(data)
        temp = self.directory / f".{name}.tmp-{os.getpid()}"
        fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            _write_fully(fd, data)
            if self.fsync != "never":
                # Without this a power cut after the rename can leave an
                # empty file under the new name.
                os.fsync(fd)
        except BaseException:
            os.close(fd)
            temp.unlink(missing_ok=True)
            raise
        os.close(fd)
        os.replace(temp, target)
        if self.fsync != "never":
            _fsync_directory(self.directory)
        self.record_mark(
            {"sidecar": name, "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()},
            time.time() if wall_s is None else wall_s,
        )
        return target

    # -- state -----------------------------------------------------------------

    @property
    def counters(self) -> dict:
        """Counts so far: records (and per type), bytes written, flushes,
        fsyncs, drops (oversized, buffer full), write errors, and
        ``bytes_buffered`` (recorded but not yet with the OS)."""
        return dict(self._counters, bytes_buffered=len(self._buf) - self._written)

    @property
    def closed(self) -> bool:
        return self._closed

    def _check_open(self) -> None:
        if self._closed:
            raise ValueError(f"the recorder for {self.path} is closed; start a new session to record more")

    def __enter__(self) -> SessionRecorder:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._closed else "open"
        return f"SessionRecorder({str(self.directory)!r}, {state}, records={self._counters['records']})"

