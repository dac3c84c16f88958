"""Tests for rig_adapters.sessions.recorder: the crash-safe session log.

Real files and real processes throughout: a subprocess is killed with
SIGKILL mid-run, another writes against a file-size limit set with
setrlimit so that the kernel refuses writes, a third is killed while
replacing a sidecar. The byte layout is checked against the format document
(rig_adapters/sessions/LOG_FORMAT.md) with the plain-Python reader printed there,
and CRC-32 against its published check value.

Payloads are arbitrary bytes made up for the test; the recorder never looks
inside them.
"""

import hashlib
import json
import os
import re
import signal
import struct
import subprocess
import sys
import textwrap
import time
import zlib
from pathlib import Path

import pytest

from rig_adapters.sessions import recorder
from rig_adapters.wire.protocol import PROTOCOL_VERSION
from rig_adapters.sessions.recorder import (
    FLUSH_BYTES,
    FORMAT_VERSION,
    LOG_NAME,
    MAGIC,
    MAX_NOTE_BYTES,
    LogFormatError,
    SessionRecorder,
    iter_records,
    read_log,
)

FORMAT_DOC = Path(recorder.__file__).with_name("LOG_FORMAT.md")
PREFIX_BYTES = 20  # LOG_FORMAT.md section 4


def write_demo_log(directory, n_inputs=5):
    """A small clean log: inputs on two channels, outputs, marks, an empty payload."""
    with SessionRecorder(directory, metadata={"animal": "demo-mouse-3", "arena_cm": 90}) as rec:
        for i in range(n_inputs):
            rec.record_input(bytes([i]) * (10 + i), 1000.0 + i * 0.01, "rig")
        rec.record_input(b"", 1000.5, "control")
        rec.record_mark({"notice": "armed", "t_s": 12.5}, 1000.6)
        rec.record_output(bytes(range(256)), 1000.7, "events")
        rec.record_input(b"last one", 1000.8, "rig")
    return directory / LOG_NAME


def run_child(code, *args, timeout=60):
    return subprocess.run(
        [sys.executable, "-c", textwrap.dedent(code), *map(str, args)],
        capture_output=True,
        text=True,
        timeout=timeout,
        check=True,
    )


# -- round trip --------------------------------------------------------------------


def test_round_trip_of_every_record_type(tmp_path):
    payloads = [b"\x93\x01\x02\x03", bytes(range(256)), b"", b"\x00" * 5000]
    with SessionRecorder(tmp_path / "s", metadata={"animal": "demo-rat-1"}) as rec:
        rec.record_input(payloads[0], 1700000000.125, "rig")
        rec.record_input(bytearray(payloads[1]), 1700000000.25, "control")
        rec.record_output(memoryview(payloads[2]), 1700000000.375, "events")
        rec.record_mark({"notice": "fitted", "units": [101, 102]}, 1700000000.5)
        rec.record_output(payloads[3], 1700000000.625, "events")
        assert rec.counters["bytes_buffered"] > 0  # nothing flushed yet
    counters = rec.counters
    result = read_log(tmp_path / "s")
    got = [(r.index, r.type, r.wall_s, r.channel) for r in result.records]
    assert got == [
        (0, "input", 1700000000.125, "rig"),
        (1, "input", 1700000000.25, "control"),
        (2, "output", 1700000000.375, "events"),
        (3, "mark", 1700000000.5, ""),
        (4, "output", 1700000000.625, "events"),
    ]
    assert [r.payload for r in result.records if r.type != "mark"] == payloads
    assert result.records[3].note() == {"notice": "fitted", "units": [101, 102]}
    with pytest.raises(ValueError, match="only marks carry a note"):
        result.records[0].note()
    assert result.channels == ("rig", "control", "events")
    assert result.clean_close and result.damage is None
    assert result.stopped_at_offset == os.path.getsize(tmp_path / "s" / LOG_NAME)
    assert result.header["metadata"] == {"animal": "demo-rat-1"}
    assert result.header["format_version"] == FORMAT_VERSION
    assert result.header["protocol_version"] == PROTOCOL_VERSION
    assert result.summary["records"] == 5 and result.summary["inputs"] == 2 and result.summary["outputs"] == 2
    assert counters["records"] == 5 and counters["marks"] == 1 and counters["bytes_buffered"] == 0
    assert counters["flushes"] >= 1 and counters["bytes_written"] > sum(map(len, payloads))


def test_iter_records_reports_how_the_log_ended(tmp_path):
    path = write_demo_log(tmp_path / "s")
    reader = iter_records(path)
    assert reader.header["metadata"]["animal"] == "demo-mouse-3"
    assert [r.index for r in reader] == list(range(9))
    assert reader.clean_close and reader.damage is None
    with pytest.raises(ValueError, match="iterated once"):
        list(reader)


def test_the_plain_reader_in_the_format_document_reads_our_files(tmp_path):
    # Source: the format document itself. Its section 8 reader is written
    # from the byte tables alone; if it reads what the recorder wrote, the
    # document and the code agree.
    code = re.search(r"## 8\..*?```python\n(.*?)```", FORMAT_DOC.read_text(), re.S).group(1)
    namespace = {}
    exec(code, namespace)
    path = write_demo_log(tmp_path / "s")
    header, records = namespace["read_session_log"](path)
    ours = read_log(path)
    assert header == ours.header
    type_codes = {"input": 1, "output": 2, "mark": 3}
    assert records == [(type_codes[r.type], r.wall_s, r.channel, r.payload) for r in ours.records]


def test_crc_is_the_standard_crc32():
    # Source: the CRC-32 check value 0xCBF43926 for the ASCII string
    # "123456789", from the catalogue of parametrised CRC algorithms (value
    # from memory); LOG_FORMAT.md names the same value.
    assert zlib.crc32(b"123456789") == 0xCBF43926


# -- buffering and flushing ------------------------------------------------------


def test_appends_never_touch_the_disk_until_a_flush(tmp_path):
    rec = SessionRecorder(tmp_path / "s", flush_interval_s=0.5, fsync="never")
    size = os.path.getsize(rec.path)
    rec.record_input(b"x" * 100, 10.0, "rig")
    assert os.path.getsize(rec.path) == size  # in memory only
    assert rec.maybe_flush(10.0)  # the first call flushes at once
    size = os.path.getsize(rec.path)
    rec.record_input(b"y" * 100, 10.1, "rig")
    assert not rec.maybe_flush(10.4)  # 0.4 s < flush interval
    assert os.path.getsize(rec.path) == size
    assert rec.maybe_flush(10.5)
    assert os.path.getsize(rec.path) == size + PREFIX_BYTES + 100
    assert not rec.maybe_flush(20.0)  # nothing buffered: nothing to do
    rec.record_input(b"z", 10.6, "rig")
    assert rec.maybe_flush(3.0)  # a wall clock stepped backwards still flushes
    rec.record_input(b"b" * FLUSH_BYTES, 3.01, "rig")
    assert rec.maybe_flush(3.02)  # a full megabyte does not wait for the interval
    assert rec.counters["flushes"] == 4 and rec.counters["fsyncs"] == 0
    rec.close()
    assert [len(r.payload) for r in read_log(rec.path).records] == [100, 100, 1, FLUSH_BYTES]


def test_fsync_on_flush_forces_every_flush_to_disk(tmp_path):
    rec = SessionRecorder(tmp_path / "s", flush_interval_s=0.0, fsync="on_flush")
    for i in range(3):
        rec.record_input(b"abc", float(i), "rig")
        assert rec.maybe_flush(float(i))
    assert rec.counters["fsyncs"] == rec.counters["flushes"] == 3
    rec.close()
    assert rec.closed


def test_oversized_payload_is_replaced_by_a_mark_that_says_why(tmp_path):
    with SessionRecorder(tmp_path / "s", max_payload_bytes=1000) as rec:
        rec.record_input(b"a" * 1000, 1.0, "rig")  # at the cap: kept
        rec.record_input(b"b" * 1001, 2.0, "rig")
        rec.record_output(b"c" * 5000, 3.0, "events")
        rec.record_mark({"readiness": "r" * MAX_NOTE_BYTES}, 4.0)
        assert rec.counters["dropped_oversized"] == 3
    records = read_log(tmp_path / "s").records
    assert [r.type for r in records] == ["input", "mark", "mark", "mark"]
    assert len(records[0].payload) == 1000
    dropped = records[1].note()
    assert dropped["dropped"] == "input" and dropped["channel"] == "rig" and dropped["payload_bytes"] == 1001
    assert "exceeds the recorder's cap of 1000 bytes" in dropped["reason"]
    assert records[2].note()["dropped"] == "output" and records[2].wall_s == 3.0
    assert records[3].note()["dropped"] == "mark" and records[3].note()["keys"] == ["readiness"]


def test_closed_recorder_refuses_records_and_closing_twice_is_harmless(tmp_path):
    rec = SessionRecorder(tmp_path / "s")
    rec.close()
    rec.close()
    with pytest.raises(ValueError, match="is closed"):
        rec.record_input(b"late", 1.0, "rig")
    assert not rec.maybe_flush(2.0)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"fsync": "always"}, "fsync must be one of never, on_flush, on_close"),
        ({"flush_interval_s": -0.1}, "flush_interval_s must be"),
        ({"flush_interval_s": float("nan")}, "flush_interval_s must be"),
        ({"max_payload_bytes": 2**40}, "max_payload_bytes must be an integer from 0"),
        ({"metadata": {"when": object()}}, "metadata must be plain JSON"),
        ({"metadata": ["not", "a", "dict"]}, "metadata must be a dict"),
    ],
)
def test_bad_settings_are_named(tmp_path, kwargs, message):
    with pytest.raises(ValueError, match=message):
        SessionRecorder(tmp_path / "s", **kwargs)


def test_bad_records_are_named(tmp_path):
    with SessionRecorder(tmp_path / "s") as rec:
        with pytest.raises(TypeError, match="payload must be bytes"):
            rec.record_input("text, not bytes", 1.0, "rig")
        with pytest.raises(ValueError, match="channel must be a non-empty name"):
            rec.record_input(b"x", 1.0, "")
        with pytest.raises(ValueError, match="longer than 64 bytes"):
            rec.record_output(b"x", 1.0, "e" * 65)
        with pytest.raises(ValueError, match="note must be plain JSON"):
            rec.record_mark({"value": float("nan")}, 1.0)
        with pytest.raises(ValueError, match="note must be a dict"):
            rec.record_mark("armed", 1.0)
    result = read_log(tmp_path / "s")
    assert result.records == [] and result.clean_close


def test_refuses_to_overwrite_an_existing_session_log(tmp_path):
    path = write_demo_log(tmp_path / "s")
    before = path.read_bytes()
    with pytest.raises(FileExistsError, match="never overwrites a recording"):
        SessionRecorder(tmp_path / "s")
    assert path.read_bytes() == before


# -- damage --------------------------------------------------------------------------


def test_truncation_at_every_byte_of_the_last_record(tmp_path):
    path = write_demo_log(tmp_path / "s")
    data = path.read_bytes()
    complete = read_log(path).records
    last = complete[-1]
    last_end = last.offset + PREFIX_BYTES + len(last.payload)
    cut_file = tmp_path / "cut.plog"
    for cut in range(last.offset, len(data)):
        cut_file.write_bytes(data[:cut])
        result = read_log(cut_file)
        assert not result.clean_close and result.summary is None
        if cut == last.offset:
            assert result.records == complete[:-1]
            assert "no end record" in result.damage
        elif cut < last_end:
            # Every complete record before the cut, and where it stopped.
            assert result.records == complete[:-1]
            assert result.stopped_at_offset == last.offset
            assert f"ends inside the record at byte {last.offset}" in result.damage
        elif cut == last_end:
            assert result.records == complete
            assert result.stopped_at_offset == cut
            assert "no end record" in result.damage
        else:  # inside the end record
            assert result.records == complete
            assert result.stopped_at_offset == last_end
            assert "ends inside the record" in result.damage


def test_a_changed_byte_stops_the_reader_at_that_record(tmp_path):
    path = write_demo_log(tmp_path / "s")
    data = path.read_bytes()
    complete = read_log(path).records
    target = complete[4]
    size = PREFIX_BYTES + len(target.payload)
    bad_file = tmp_path / "bad.plog"
    for i in range(target.offset, target.offset + size):
        damaged = bytearray(data)
        damaged[i] ^= 0xFF
        bad_file.write_bytes(bytes(damaged))
        result = read_log(bad_file)
        assert result.records == complete[:4]
        assert result.stopped_at_offset == target.offset
        assert not result.clean_close
        if not target.offset + 4 <= i < target.offset + 8:
            # Source: a CRC with a generator polynomial of degree r detects
            # every burst error of length <= r bits (Peterson & Brown 1961,
            # Proc. IRE 49:228); one changed byte is a burst of 8 bits.
            # (A changed length field may instead run past the end.)
            assert "fails its CRC-32 check" in result.damage


def test_bytes_after_the_end_record_are_reported(tmp_path):
    path = write_demo_log(tmp_path / "s")
    with open(path, "ab") as f:
        f.write(b"stray")
    result = read_log(path)
    assert len(result.records) == 9 and not result.clean_close
    assert "5 bytes follow the end record" in result.damage


def test_not_a_log_and_other_versions_raise_saying_which(tmp_path):
    odd = tmp_path / "notes.txt"
    odd.write_bytes(b"session notes: mouse 3 ran well\n")
    with pytest.raises(LogFormatError, match="is not a placeloop session log: it starts with b'session "):
        read_log(odd)
    odd.write_bytes(b"")
    with pytest.raises(LogFormatError, match="is empty"):
        read_log(odd)
    odd.write_bytes(MAGIC[:5])
    with pytest.raises(LogFormatError, match="header is incomplete"):
        read_log(odd)

    data = bytearray(write_demo_log(tmp_path / "s").read_bytes())
    other = tmp_path / "other.plog"
    struct.pack_into("<H", data, len(MAGIC), FORMAT_VERSION + 1)
    other.write_bytes(bytes(data))
    expected = f"format version {FORMAT_VERSION + 1}; this placeloop reads format version {FORMAT_VERSION} only"
    with pytest.raises(LogFormatError, match=expected):
        read_log(other)
    struct.pack_into("<H", data, len(MAGIC), FORMAT_VERSION)
    data[20] ^= 0x01  # inside the JSON header
    other.write_bytes(bytes(data))
    with pytest.raises(LogFormatError, match="damaged header"):
        iter_records(other)
    assert issubclass(LogFormatError, ValueError)


# -- sidecars ------------------------------------------------------------------------


def test_sidecars_are_replaced_whole_and_noted_in_the_log(tmp_path):
    with SessionRecorder(tmp_path / "s") as rec:
        first = rec.write_sidecar("config.toml", b"[arena]\nradius_cm = 45\n", wall_s=5.0)
        rec.write_sidecar("config.toml", b"[arena]\nradius_cm = 60\n", wall_s=6.0)
        for bad in ("../escape.toml", ".hidden", LOG_NAME, ""):
            with pytest.raises(ValueError, match="sidecar name"):
                rec.write_sidecar(bad, b"x")
    assert first.read_bytes() == b"[arena]\nradius_cm = 60\n"
    assert sorted(p.name for p in (tmp_path / "s").iterdir()) == ["config.toml", LOG_NAME]  # no temp left
    notes = [(r.wall_s, r.note()) for r in read_log(tmp_path / "s").records]
    new = b"[arena]\nradius_cm = 60\n"
    # Reference library: hashlib's SHA-256.
    assert notes[1] == (6.0, {"sidecar": "config.toml", "bytes": len(new), "sha256": hashlib.sha256(new).hexdigest()})


def test_sidecar_killed_mid_write_is_old_or_new_never_a_mix(tmp_path):
    child = start_counting_child(
        """
        import os, struct, sys
        from rig_adapters.sessions.recorder import SessionRecorder
        rec = SessionRecorder(sys.argv[1], fsync="never")
        i = 0
        while True:
            rec.write_sidecar("model.bin", (b"A" if i % 2 else b"B") * 2_000_000, wall_s=float(i))
            i += 1
            os.write(1, struct.pack("<q", i))
        """,
        tmp_path / "s",
    )
    kill_after(child, 30)
    content = (tmp_path / "s" / "model.bin").read_bytes()
    assert content in (b"A" * 2_000_000, b"B" * 2_000_000)


# -- crashes -------------------------------------------------------------------------


def start_counting_child(code, *args):
    """A child that writes its running count to stdout as 8-byte integers.

    A pipe keeps what was written to it after the writer is killed, so the
    last count read is the child's last count.
    """
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code), *map(str, args)], stdout=subprocess.PIPE)


def kill_after(child, at_least, timeout_s=30.0):
    """SIGKILL the child once its count reaches ``at_least``; return its last count."""
    fd = child.stdout.fileno()
    received = bytearray()
    deadline = time.monotonic() + timeout_s
    try:
        while len(received) < 8 or struct.unpack_from("<q", received, len(received) // 8 * 8 - 8)[0] < at_least:
            if time.monotonic() > deadline:
                raise AssertionError(f"the child did not count to {at_least} in {timeout_s} s")
            chunk = os.read(fd, 1 << 16)
            if not chunk:
                raise AssertionError(f"the child exited early with status {child.wait()}")
            received += chunk
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=10)
    while chunk := os.read(fd, 1 << 16):
        received += chunk
    child.stdout.close()
    assert child.returncode == -signal.SIGKILL
    assert len(received) % 8 == 0  # writes of 8 bytes to a pipe are atomic (POSIX, PIPE_BUF >= 512)
    return struct.unpack_from("<q", received, len(received) - 8)[0]


RECORDS_PER_FLUSH = 16
KILL_CHILD = f"""
import os, struct, sys
from rig_adapters.sessions.recorder import SessionRecorder
rec = SessionRecorder(sys.argv[1], flush_interval_s={RECORDS_PER_FLUSH}/1024, fsync="never")
i = 0
while True:
    # A synthetic wall clock, one record per 1/1024 s, exact in binary, so
    # that one flush interval is exactly {RECORDS_PER_FLUSH} records however
    # the machine schedules this process.
    wall_s = i / 1024
    rec.record_input(struct.pack("<q", i) * 4, wall_s, "rig")
    i += 1
    os.write(1, struct.pack("<q", i))
    rec.maybe_flush(wall_s)
"""


@pytest.mark.parametrize("count_before_kill", [3000, 20000])
def test_kill_9_loses_at_most_one_flush_interval(tmp_path, count_before_kill):
    child = start_counting_child(KILL_CHILD, tmp_path / "s")
    recorded = kill_after(child, count_before_kill)
    result = read_log(tmp_path / "s")
    numbers = [struct.unpack_from("<q", r.payload)[0] for r in result.records]
    assert numbers == list(range(len(numbers)))  # in order, no holes
    assert all(r.wall_s == r.index / 1024 for r in result.records)
    assert not result.clean_close and result.damage is not None
    # Only the records since the last flush can be missing: at most one
    # flush interval's worth.
    assert 0 <= recorded - len(numbers) <= RECORDS_PER_FLUSH


def test_a_disk_that_refuses_writes_loses_nothing_and_never_raises_in_the_loop(tmp_path):
    # The kernel's file-size limit (setrlimit RLIMIT_FSIZE) makes write()
    # stop part-way and then fail with EFBIG, as a full disk would.
    out = run_child(
        """
        import json, resource, signal, sys
        import rig_adapters.sessions.recorder as recorder
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        recorder.MAX_BUFFER_BYTES = 6000  # small, so that the outage fills it
        rec = recorder.SessionRecorder(sys.argv[1], flush_interval_s=0.0, fsync="never")
        soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
        limit = rec.counters["bytes_written"] + 1000
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, hard))
        for i in range(100):
            rec.record_input(bytes([i]) * 50, float(i), "rig")
        ok = [rec.maybe_flush(100.0), rec.flush()]
        partial = rec.path.stat().st_size == limit
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        ok.append(rec.maybe_flush(101.0))
        rec.close()
        print(json.dumps({"ok": ok, "partial": partial, "counters": rec.counters}))
        """,
        tmp_path / "s",
    )
    report = json.loads(out.stdout)
    assert report["ok"] == [False, False, True]
    assert report["partial"]  # the first write stopped part-way through a record
    counters = report["counters"]
    assert counters["write_errors"] == 2
    result = read_log(tmp_path / "s")
    assert result.clean_close and result.damage is None
    inputs = [r for r in result.records if r.type == "input"]
    kept = len(inputs)
    # The partial write was continued exactly: every kept record intact, in order.
    assert [r.payload for r in inputs] == [bytes([i]) * 50 for i in range(kept)]
    # What the full buffer refused is counted and noted, never silently lost.
    assert counters["dropped_buffer_full"] == 100 - kept > 0
    assert result.records[-1].note()["dropped"] == 100 - kept
