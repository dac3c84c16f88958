"""The session log's byte layout: names, limits, record types and binary structs.

What the writer (:mod:`rig_adapters.sessions.recorder`) and the reader
(:mod:`rig_adapters.sessions.log_reader`) must agree on, and nothing else.
The layout is specified in ``rig_adapters/sessions/LOG_FORMAT.md``; every
constant here is a number of that document.
"""

from __future__ import annotations

import struct

#: Name of the log file inside a session directory.
LOG_NAME = "session.plog"

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


# Record types on disk. Only input, output and mark are handed to readers;
# channel declarations and the end record are bookkeeping.
INPUT_RECORD, OUTPUT_RECORD, MARK_RECORD, CHANNEL_RECORD, END_RECORD = 1, 2, 3, 4, 5
TYPE_NAMES = {INPUT_RECORD: "input", OUTPUT_RECORD: "output", MARK_RECORD: "mark"}

# File header: magic, version (u16), header JSON length (u32), then after
# the JSON a CRC-32 (u32) over version, length and JSON.
FILE_START = struct.Struct("<8sHI")
HEADER_CRC = struct.Struct("<I")

# Record prefix: CRC-32 (u32) over everything after it, payload length
# (u32), type (u8), reserved (u8, zero), channel id (u16), wall time (f64 s).
PREFIX = struct.Struct("<IIBBHd")
PREFIX_AFTER_CRC = struct.Struct("<IBBHd")
CRC = struct.Struct("<I")

#: Channel id of records that belong to no channel (marks, the end record).
NO_CHANNEL = 0

#: One more than the largest channel id; ids are 16-bit and 0 means "no channel".
MAX_CHANNELS = 0xFFFF


class LogFormatError(ValueError):
    """The file is not a placeloop session log, or one this version cannot read."""

