"""Reading a session log back: record by record, or whole, stopping cleanly at damage.

The reader of the layout in ``rig_adapters/sessions/LOG_FORMAT.md`` (constants
in :mod:`rig_adapters.sessions.log_format`). It never trusts the file: a
record that is cut short, fails its CRC-32 or names an undeclared channel
ends the reading there, and the reader says where and why, so that a replay
of a session that crashed still gets every intact record before the damage.
"""

from __future__ import annotations

import gc
import json
import logging
import os
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

from rig_adapters.sessions.log_format import (
    CHANNEL_RECORD,
    END_RECORD,
    FILE_START,
    FORMAT_VERSION,
    HEADER_CRC,
    LOG_NAME,
    MAGIC,
    MAX_HEADER_BYTES,
    MAX_PAYLOAD_BYTES,
    PREFIX,
    TYPE_NAMES,
    LogFormatError,
)

logger = logging.getLogger(__name__)

#: Bytes read from the file at a time.
_READ_CHUNK_BYTES = 8 * 1024 * 1024


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


def _read_header(path: Path) -> tuple[dict, int]:
    with open(path, "rb") as f:
        start = f.read(FILE_START.size)
        if len(start) < len(MAGIC) or start[: len(MAGIC)] != MAGIC:
            if not start:
                raise LogFormatError(f"{path} is empty: not a placeloop session log")
            if MAGIC.startswith(start[: len(MAGIC)]):
                raise LogFormatError(f"{path} ends inside the log's magic bytes: the header is incomplete")
            raise LogFormatError(
                f"{path} is not a placeloop session log: it starts with {start[:len(MAGIC)]!r}, not {MAGIC!r}"
            )
        if len(start) < FILE_START.size:
            raise LogFormatError(f"{path} ends inside its file header: the header is incomplete")
        _, version, header_len = FILE_START.unpack(start)
        if version != FORMAT_VERSION:
            raise LogFormatError(
                f"{path} is a placeloop session log of format version {version}; "
                f"this placeloop reads format version {FORMAT_VERSION} only"
            )
        if header_len > MAX_HEADER_BYTES:
            raise LogFormatError(f"{path} declares a header of {header_len} bytes, over the limit: it is damaged")
        rest = f.read(header_len + HEADER_CRC.size)
    if len(rest) < header_len + HEADER_CRC.size:
        raise LogFormatError(f"{path} ends inside its JSON header: the header is incomplete")
    header_json = rest[:header_len]
    (stored,) = HEADER_CRC.unpack_from(rest, header_len)
    if zlib.crc32(header_json, zlib.crc32(start[len(MAGIC):])) != stored:
        raise LogFormatError(f"{path} has a damaged header: its CRC-32 does not match")
    try:
        header = json.loads(header_json)
    except ValueError:
        raise LogFormatError(f"{path} has a header that is not valid JSON") from None
    if not isinstance(header, dict):
        raise LogFormatError(f"{path} has a header that is not a JSON object")
    return header, FILE_START.size + header_len + HEADER_CRC.size


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
        unpack_from = PREFIX.unpack_from
        prefix_size = PREFIX.size
        crc32 = zlib.crc32
        type_names = TYPE_NAMES
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
                        elif rtype == CHANNEL_RECORD and channel_id == len(names):
                            names.append(data[pos + prefix_size : end].decode("utf-8", "replace"))
                            self.channels = tuple(names[1:])
                        elif rtype == END_RECORD:
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
