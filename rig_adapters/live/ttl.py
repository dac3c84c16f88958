"""A TTL line through a serial device: one byte per event, turned into a pulse by the device.

The device (a microcontroller on USB serial, for example) owns the pulse's
width and its hardware limits; placeloop only asks for a pulse. A write can
hold the loop for at most ``WRITE_TIMEOUT_S`` (one byte takes under 0.1 ms at
115200 baud, so only a jammed device ever reaches it), and a failed or
partial write is counted and logged, not raised.
"""

from __future__ import annotations

import logging

import serial

log = logging.getLogger(__name__)

#: Longest a pulse request may block the loop (s).
WRITE_TIMEOUT_S = 0.002


class TtlLine:
    """One serial TTL output.

    Parameters
    ----------
    url : str
        A device path (``/dev/ttyACM0``) or any pyserial URL (``loop://`` for tests).
    baud : int
    pulse_byte : int
        The byte written for each event, 0..255.
    """

    def __init__(self, url: str, baud: int = 115200, pulse_byte: int = 0x31) -> None:
        if not 0 <= pulse_byte <= 255:
            raise ValueError(f"pulse_byte must be 0..255, got {pulse_byte}")
        try:
            self.port = serial.serial_for_url(url, baudrate=baud, timeout=0, write_timeout=WRITE_TIMEOUT_S)
        except (serial.SerialException, ValueError) as exc:
            raise OSError(f"cannot open the TTL device {url!r}: {exc}") from None
        self.pulse_byte = bytes([pulse_byte])
        self.pulses = 0
        self.failures = 0

    def pulse(self) -> bool:
        """Ask the device for one pulse; False (counted, logged) if the write failed."""
        try:
            written = self.port.write(self.pulse_byte)
        except (serial.SerialException, OSError) as exc:
            written = 0
            log.error("TTL write failed: %s", exc)
        if written != 1:
            self.failures += 1
            return False
        self.pulses += 1
        return True

    def close(self) -> None:
        self.port.close()
