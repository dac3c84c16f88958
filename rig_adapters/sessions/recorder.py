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
is its reference implementation, writer and reader.

Durability, in short: once :meth:`~SessionRecorder.maybe_flush` or
:meth:`~SessionRecorder.flush` has returned, the bytes belong to the
operating system, so a crash or ``kill -9`` of the recording process loses
only what was still in the buffer (at most one flush interval). A power cut
or kernel crash can also lose what the OS had not yet put on disk; the
``fsync`` policy decides how much that can be.
"""

from __future__ import annotations

import gc
import hashlib
import importlib.metadata
import json
import logging
import math
import os
import struct
import time
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

from rig_adapters.wire.protocol import PROTOCOL_VERSION

logger = logging.getLogger(__name__)

#: Name of the log file inside a session directory.
LOG_NAME = "session.plog"

#: Sidecar holding the config the live run used.
CONFIG_SIDECAR = "config.toml"
#: Sidecar holding a model the live run was started with (``placeloop run --model``).
INITIAL_MODEL_SIDECAR = "initial_model.npz"
#: Sidecar holding a model fitted during the session (read back by replays and reports).
FITTED_MODEL_SIDECAR = "fitted_model.npz"

#: First eight bytes of every session log, in every format version.
MAGIC = b"PLOOPLOG"

#: The format version this module writes and reads.
FORMAT_VERSION = 1

#: Largest payload one record may carry, in bytes. A reader treats a larger
#: declared length as damage, so the cap is part of the format.
MAX_PAYLOAD_BYTES = 64 * 1024 * 1024

#: Largest JSON header, in bytes.
MAX_HEADER_BYTES = 1024 * 1024

#: Largest channel name, in bytes of UTF-8.
MAX_CHANNEL_NAME_BYTES = 64

#: Largest JSON note in a mark record, in bytes.
MAX_NOTE_BYTES = 1024 * 1024

#: The buffer is handed to the OS at the next ``maybe_flush`` once it holds
#: this many bytes, even before the flush interval is over, so that a burst
#: of large messages does not pile up in memory.
FLUSH_BYTES = 1024 * 1024

#: Unwritten bytes the recorder holds while the disk refuses writes (full,
#: gone) before it starts dropping new records; each drop is counted and
#: noted in the log once writing works again.
MAX_BUFFER_BYTES = 256 * 1024 * 1024

FSYNC_POLICIES = ("never", "on_flush", "on_close")

# Record types on disk. Only input, output and mark are handed to readers;
# channel declarations and the end record are bookkeeping.
_INPUT, _OUTPUT, _MARK, _CHANNEL, _END = 1, 2, 3, 4, 5
_TYPE_NAMES = {_INPUT: "input", _OUTPUT: "output", _MARK: "mark"}

# File header: magic, version (u16), header JSON length (u32), then after
# the JSON a CRC-32 (u32) over version, length and JSON.
_FILE_START = struct.Struct("<8sHI")
_HEADER_CRC = struct.Struct("<I")

# Record prefix: CRC-32 (u32) over everything after it, payload length
# (u32), type (u8), reserved (u8, zero), channel id (u16), wall time (f64 s).
_PREFIX = struct.Struct("<IIBBHd")
_PREFIX_AFTER_CRC = struct.Struct("<IBBHd")
_CRC = struct.Struct("<I")

_READ_CHUNK_BYTES = 8 * 1024 * 1024
_NO_CHANNEL = 0
_MAX_CHANNELS = 0xFFFF


class LogFormatError(ValueError):
    """The file is not a placeloop session log, or one this version cannot read."""


class LogRecord(NamedTuple):
    """One recorded message, as read back.

    Attributes
    ----------
    index : int
        Position among the input, output and mark records of the log, from 0.
    type : {"input", "output", "mark"}
    wall_s : float
        Wall-clock time of receipt (input) or sending (output) or of the
        mark, in seconds since the Unix epoch.
    channel : str
        Name of the channel the message came in or went out on; ``""`` for
        marks.
    payload : bytes
        The message bytes exactly as received or sent; UTF-8 JSON for marks.
    offset : int
        Byte offset of the record in the file.
    """

    index: int
    type: str
    wall_s: float
    channel: str
    payload: bytes
    offset: int

    def note(self) -> dict:
        """The JSON note of a mark record.

        Raises
        ------
        ValueError
            If the record is not a mark.
        """
        if self.type != "mark":
            raise ValueError(f"record {self.index} is an {self.type} record; only marks carry a note")
        return json.loads(self.payload)


@dataclass(frozen=True, slots=True)
class LogReadResult:
    """Everything read from one session log.

    Attributes
    ----------
    path : Path
    header : dict
        The JSON header written when the log was created.
    records : list of LogRecord
        Every intact input, output and mark record, in file order.
    channels : tuple of str
        Channel names in the order they were first used.
    clean_close : bool
        True when the log ends with the end record written by
        :meth:`SessionRecorder.close`; False after a crash, a kill, a power
        cut or damage.
    stopped_at_offset : int
        Byte offset where reading stopped: the file size after a clean read,
        else the start of the first record that is incomplete or damaged.
    damage : str or None
        A sentence saying why reading stopped early or why the close was not
        clean; None for a clean, complete log.
    summary : dict or None
        The recorder's counters as written in the end record; None without
        a clean close.
    """

    path: Path
    header: dict
    records: list
    channels: tuple
    clean_close: bool
    stopped_at_offset: int
    damage: str | None
    summary: dict | None


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
            start = _FILE_START.pack(MAGIC, FORMAT_VERSION, len(header_json))
            crc = zlib.crc32(header_json, zlib.crc32(start[len(MAGIC):]))
            _write_fully(self._fd, start + header_json + _HEADER_CRC.pack(crc))
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
            "bytes_written": len(start) + len(header_json) + _HEADER_CRC.size,
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
        self._append_message(_INPUT, payload, recv_wall_s, channel)

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
        self._append_message(_OUTPUT, payload, wall_s, channel)

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
        if self._append(_MARK, _NO_CHANNEL, wall_s, data):
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
            kind = _TYPE_NAMES[rtype]
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
            self._counters["inputs" if rtype == _INPUT else "outputs"] += 1

    def _declare_channel(self, channel: Any, wall_s: float) -> int:
        if not isinstance(channel, str) or not channel:
            raise ValueError(f"channel must be a non-empty name such as 'spikes', got {channel!r}")
        name = channel.encode("utf-8")
        if len(name) > MAX_CHANNEL_NAME_BYTES:
            raise ValueError(f"channel name {channel!r} is longer than {MAX_CHANNEL_NAME_BYTES} bytes")
        if len(self._channels) >= _MAX_CHANNELS - 1:
            raise ValueError(f"a session log holds at most {_MAX_CHANNELS - 1} channels; {channel!r} is one too many")
        channel_id = len(self._channels) + 1
        self._append(_CHANNEL, channel_id, wall_s, name, count=False)
        self._channels[channel] = channel_id
        return channel_id

    def _append(self, rtype: int, channel_id: int, wall_s: float, payload: bytes, count: bool = True) -> bool:
        # Bookkeeping records (count=False: channel declarations, the end
        # record) are tiny and always kept, so the log stays readable.
        pending = len(self._buf) - self._written
        if count and pending + _PREFIX.size + len(payload) > MAX_BUFFER_BYTES:
            if self._dropped_since_note == 0:
                logger.error("recorder buffer full (%d bytes unwritten); dropping records until writes work", pending)
            self._dropped_since_note += 1
            self._counters["dropped_buffer_full"] += 1
            return False
        rest = _PREFIX_AFTER_CRC.pack(len(payload), rtype, 0, channel_id, wall_s)
        self._buf += _CRC.pack(zlib.crc32(payload, zlib.crc32(rest)))
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
        self._append(_END, _NO_CHANNEL, wall_s, json.dumps(summary).encode("utf-8"), count=False)
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


# -- reading ----------------------------------------------------------------------


def _read_header(path: Path) -> tuple[dict, int]:
    with open(path, "rb") as f:
        start = f.read(_FILE_START.size)
        if len(start) < len(MAGIC) or start[: len(MAGIC)] != MAGIC:
            if not start:
                raise LogFormatError(f"{path} is empty: not a placeloop session log")
            if MAGIC.startswith(start[: len(MAGIC)]):
                raise LogFormatError(f"{path} ends inside the log's magic bytes: the header is incomplete")
            raise LogFormatError(
                f"{path} is not a placeloop session log: it starts with {start[:len(MAGIC)]!r}, not {MAGIC!r}"
            )
        if len(start) < _FILE_START.size:
            raise LogFormatError(f"{path} ends inside its file header: the header is incomplete")
        _, version, header_len = _FILE_START.unpack(start)
        if version != FORMAT_VERSION:
            raise LogFormatError(
                f"{path} is a placeloop session log of format version {version}; "
                f"this placeloop reads format version {FORMAT_VERSION} only"
            )
        if header_len > MAX_HEADER_BYTES:
            raise LogFormatError(f"{path} declares a header of {header_len} bytes, over the limit: it is damaged")
        rest = f.read(header_len + _HEADER_CRC.size)
    if len(rest) < header_len + _HEADER_CRC.size:
        raise LogFormatError(f"{path} ends inside its JSON header: the header is incomplete")
    header_json = rest[:header_len]
    (stored,) = _HEADER_CRC.unpack_from(rest, header_len)
    if zlib.crc32(header_json, zlib.crc32(start[len(MAGIC):])) != stored:
        raise LogFormatError(f"{path} has a damaged header: its CRC-32 does not match")
    try:
        header = json.loads(header_json)
    except ValueError:
        raise LogFormatError(f"{path} has a header that is not valid JSON") from None
    if not isinstance(header, dict):
        raise LogFormatError(f"{path} has a header that is not a JSON object")
    return header, _FILE_START.size + header_len + _HEADER_CRC.size


class LogReader:
    """Iterate over a session log's records without loading it whole.

    The header is read and checked on construction. Iterating yields
    :class:`LogRecord` objects in file order and stops cleanly at the first
    incomplete or damaged record; afterwards ``clean_close``,
    ``stopped_at_offset``, ``damage``, ``channels`` and ``summary`` say how
    it ended (they mean the same as in :class:`LogReadResult`).

    Parameters
    ----------
    path : str or Path
        A ``session.plog`` file, or a session directory holding one.

    Raises
    ------
    LogFormatError
        If the file is not a placeloop session log, or of another format
        version, or its header is damaged.
    """

    def __init__(self, path: str | os.PathLike) -> None:
        path = Path(path)
        if path.is_dir():
            path = path / LOG_NAME
        self.path = path
        self.header, self._data_offset = _read_header(path)
        self.clean_close = False
        self.stopped_at_offset = self._data_offset
        self.damage: str | None = None
        self.summary: dict | None = None
        self.channels: tuple = ()
        self._iterated = False

    def __iter__(self) -> Iterator[LogRecord]:
        if self._iterated:
            raise ValueError("a LogReader can be iterated once; make a new one to read again")
        self._iterated = True
        return self._records()

    def _stop(self, offset: int, damage: str | None) -> None:
        self.stopped_at_offset = offset
        self.damage = damage

    def _records(self) -> Iterator[LogRecord]:
        # One tight loop over large chunks: struct.unpack_from and zlib.crc32
        # on a memoryview, one bytes copy per payload, nothing else per record.
        unpack_from = _PREFIX.unpack_from
        prefix_size = _PREFIX.size
        crc32 = zlib.crc32
        type_names = _TYPE_NAMES
        new_tuple = tuple.__new__
        names = [""]  # channel id -> name; id 0 is "no channel"
        index = 0
        with open(self.path, "rb") as f:
            f.seek(self._data_offset)
            data = f.read(_READ_CHUNK_BYTES)
            base = self._data_offset  # file offset of data[0]
            pos = 0
            while True:
                size = len(data)
                need = 0
                with memoryview(data) as view:
                    while pos + prefix_size <= size:
                        crc, length, rtype, _, channel_id, wall_s = unpack_from(data, pos)
                        at = base + pos
                        if length > MAX_PAYLOAD_BYTES:
                            what = f"declares a payload of {length} bytes, over the cap of {MAX_PAYLOAD_BYTES}"
                            self._stop(at, _damaged(at, index, what))
                            return
                        end = pos + prefix_size + length
                        if end > size:
                            need = end - size
                            break
                        if crc32(view[pos + 4 : end]) != crc:
                            self._stop(at, _damaged(at, index, "fails its CRC-32 check"))
                            return
                        if rtype in type_names:
                            if channel_id >= len(names):
                                what = f"uses channel {channel_id}, which was never declared"
                                self._stop(at, _damaged(at, index, what))
                                return
                            # tuple.__new__ skips the named tuple's argument
                            # parsing, a third of the per-record cost.
                            payload = data[pos + prefix_size : end]
                            record = (index, type_names[rtype], wall_s, names[channel_id], payload, at)
                            yield new_tuple(LogRecord, record)
                            index += 1
                        elif rtype == _CHANNEL and channel_id == len(names):
                            names.append(data[pos + prefix_size : end].decode("utf-8", "replace"))
                            self.channels = tuple(names[1:])
                        elif rtype == _END:
                            self._finish(f, data[pos + prefix_size : end], at, base + end, size - end)
                            return
                        else:
                            what = f"is of unknown type {rtype} or declares channel {channel_id} out of turn"
                            self._stop(at, _damaged(at, index, what))
                            return
                        pos = end
                more = f.read(max(_READ_CHUNK_BYTES, need))
                if not more:
                    if pos == size:
                        self._stop(
                            base + pos,
                            "the log has no end record: the recording process stopped without closing it "
                            f"(crash, kill or power cut); all {index} records up to byte {base + pos} are intact",
                        )
                    else:
                        self._stop(
                            base + pos,
                            f"the log ends inside the record at byte {base + pos}, after {index} intact records "
                            f"(only {size - pos} of its bytes are there): the recording process stopped while "
                            "writing it",
                        )
                    return
                data = data[pos:] + more
                base += pos
                pos = 0

    def _finish(self, f: Any, summary_json: bytes, offset: int, end: int, left_in_chunk: int) -> None:
        try:
            self.summary = json.loads(summary_json)
        except ValueError:
            self._stop(offset, f"the end record at byte {offset} holds no valid JSON: the log is damaged there")
            return
        trailing = left_in_chunk + len(f.read())
        if trailing:
            self._stop(
                end,
                f"{trailing} bytes follow the end record at byte {offset}: "
                "something wrote to the log after it was closed",
            )
        else:
            self.clean_close = True
            self._stop(end, None)


def _damaged(offset: int, n_intact: int, what: str) -> str:
    return (
        f"the record at byte {offset}, after {n_intact} intact records, {what}: the log is damaged there, "
        "and nothing after a damaged record can be trusted"
    )


def iter_records(path: str | os.PathLike) -> LogReader:
    """Open a session log for record-by-record reading.

    Parameters
    ----------
    path : str or Path
        A ``session.plog`` file or a session directory.

    Returns
    -------
    LogReader
        Iterable once over :class:`LogRecord`; after the iteration its
        ``clean_close``, ``stopped_at_offset`` and ``damage`` say how the
        log ended.

    Raises
    ------
    LogFormatError
        If the file is not a placeloop session log or of another format
        version.
    """
    return LogReader(path)


def read_log(path: str | os.PathLike) -> LogReadResult:
    """Read a whole session log.

    Parameters
    ----------
    path : str or Path
        A ``session.plog`` file or a session directory.

    Returns
    -------
    LogReadResult

    Raises
    ------
    LogFormatError
        If the file is not a placeloop session log or of another format
        version.
    """
    reader = LogReader(path)
    # Millions of small tuples would set off the cyclic garbage collector
    # over and over, doubling the read time; none of them can form a cycle.
    gc_was_enabled = gc.isenabled()
    gc.disable()
    try:
        records = list(reader)
    finally:
        if gc_was_enabled:
            gc.enable()
    if reader.damage is not None:
        logger.warning("%s: %s", reader.path, reader.damage)
    return LogReadResult(
        path=reader.path,
        header=reader.header,
        records=records,
        channels=reader.channels,
        clean_close=reader.clean_close,
        stopped_at_offset=reader.stopped_at_offset,
        damage=reader.damage,
        summary=reader.summary,
    )
