"""The serial TTL line (rig_adapters.live.ttl), through pyserial's loopback URL."""

import pytest

from rig_adapters.live.ttl import TtlLine


def test_each_pulse_writes_one_byte_read_back_through_the_loopback():
    # pyserial's loop:// URL echoes every written byte back to the reader (pyserial docs).
    line = TtlLine("loop://", pulse_byte=0x31)
    try:
        assert line.pulse() and line.pulse()
        assert line.port.read(10) == b"11"
        assert (line.pulses, line.failures) == (2, 0)
    finally:
        line.close()


def test_a_write_to_a_closed_device_is_counted_not_raised():
    line = TtlLine("loop://")
    line.port.close()
    assert line.pulse() is False
    assert line.failures == 1


def test_a_missing_device_is_a_clear_error():
    with pytest.raises(OSError, match="cannot open the TTL device"):
        TtlLine("/dev/no-such-ttl-device")
    with pytest.raises(ValueError, match="pulse_byte"):
        TtlLine("loop://", pulse_byte=300)
