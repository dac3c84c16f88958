"""TTL output through a serial device: each rule drives its own byte or line.

Two set-ups (``[ttl] drive``, documented in docs/CONFIG.md):

- ``"byte"``: one byte per event to a device (a microcontroller on USB
  serial, for example) that turns it into a pulse. The device owns the
  pulse's width and its hardware limits; each rule may send its own byte, so
  one device can serve two reward ports.
- ``"line"``: a plain USB-serial adapter's modem-control lines (RTS, DTR)
  are the TTL outputs. A pulse asserts the line and the live loop lowers it
  ``pulse_s`` later on the wall clock (:meth:`TtlDevice.service`, called on
  every pass of the loop, whose poll wakes for the next due edge): nothing
  here ever sleeps in the loop. The lines are lowered before the port opens
  (an opening port would otherwise assert both) and again when it closes.

A write can hold the loop for at most ``WRITE_TIMEOUT_S`` (one byte takes
under 0.1 ms at 115200 baud, so only a jammed device ever reaches it), and a
failed or partial write is counted and logged, not raised. pyserial times a
write from before it starts, so a process held off the CPU for longer than
the timeout sees a byte that did go out reported as timed out; 10 ms keeps
that rare on a busy two-core machine while a jammed device still costs the
loop no more than 10 ms per event.
"""

from __future__ import annotations

import logging
import time
from typing import Iterable

import serial

from decoder.config import TtlOutput, TtlSettings

log = logging.getLogger(__name__)

#: Longest a pulse request may block the loop (s).
WRITE_TIMEOUT_S = 0.010


class TtlDevice:
    """One serial device driven by the trigger rules.

    Parameters
    ----------
    device : str
        A device path (``/dev/ttyACM0``) or any pyserial URL (``loop://`` for tests).
    baud : int, default 115200
    drive : {"byte", "line"}, default "byte"
    routes : dict of str to TtlOutput, optional
        What each rule drives (a byte, or a line and a pulse length);
        a rule not in it drives nothing. :meth:`from_settings` fills it
        from the ``[ttl]`` table.

    Attributes
    ----------
    pulses, failures : int
        Pulses started, and writes or line changes that failed.
    """

    def __init__(self, device: str, baud: int = 115200, drive: str = "byte",
                 routes: dict[str, TtlOutput] | None = None) -> None:
        self.drive = drive
        self.routes = dict(routes or {})
        self.pulses = 0
        self.failures = 0
        #: line name -> monotonic time (s) at which it goes low again
        self._lowering_at: dict[str, float] = {}
        try:
            self.port = serial.serial_for_url(device, baudrate=baud, timeout=0, write_timeout=WRITE_TIMEOUT_S,
                                              do_not_open=True)
            if drive == "line":
                self.port.rts = False
                self.port.dtr = False
            self.port.open()
        except (serial.SerialException, ValueError, OSError) as exc:
            raise OSError(f"cannot open the TTL device {device!r}: {exc}; check [ttl] device and that no "
                          "other program holds it") from None

    @classmethod
    def from_settings(cls, settings: TtlSettings, rules: Iterable[str]) -> TtlDevice:
        """The device of a ``[ttl]`` table, each of ``rules`` routed as ``settings.route`` says."""
        routes = {rule: settings.route(rule) for rule in rules}
        return cls(settings.device, settings.baud, settings.drive,
                   {rule: route for rule, route in routes.items() if route is not None})

    def describe(self) -> list[str]:
        """One line per rule: what its events drive."""
        if self.drive == "byte":
            return [f"rule {rule!r}: byte 0x{r.byte:02x}" for rule, r in self.routes.items()]
        return [f"rule {rule!r}: line {r.line.upper()}, {r.pulse_s * 1e3:g} ms pulse"
                for rule, r in self.routes.items()]

    def pulse(self, rule: str, now_s: float | None = None) -> bool:
        """Start the pulse of ``rule``'s output; False (counted, logged) if it failed or ``rule`` drives nothing."""
        route = self.routes.get(rule)
        if route is None:
            return False
        now_s = time.monotonic() if now_s is None else now_s
        if self.drive == "byte":
            try:
                ok = self.port.write(bytes([route.byte])) == 1
            except (serial.SerialException, OSError) as exc:
                ok = False
                log.error("TTL write for rule %r failed: %s", rule, exc)
        else:
            ok = self._set_line(route.line, True)
            if ok:
                self._lowering_at[route.line] = max(self._lowering_at.get(route.line, 0.0), now_s + route.pulse_s)
        if not ok:
            self.failures += 1
            return False
        self.pulses += 1
        return True

    def next_due_s(self) -> float | None:
        """Monotonic time (s) of the next line to lower; None when no pulse is running."""
        return min(self._lowering_at.values()) if self._lowering_at else None

    def service(self, now_s: float | None = None) -> None:
        """Lower every line whose pulse has run its length; one that fails to lower is retried next call."""
        now_s = time.monotonic() if now_s is None else now_s
        for line, due in list(self._lowering_at.items()):
            if due <= now_s and self._set_line(line, False):
                del self._lowering_at[line]

    def _set_line(self, line: str, asserted: bool) -> bool:
        try:
            setattr(self.port, line, asserted)
        except (serial.SerialException, OSError) as exc:
            log.error("TTL line %s could not be %s: %s", line.upper(), "raised" if asserted else "lowered", exc)
            if not asserted:
                self.failures += 1
            return False
        return True

    def close(self) -> None:
        """Lower any line still high, then close the port."""
        if self.drive == "line" and self.port.is_open:
            for line in ("rts", "dtr"):
                self._set_line(line, False)
        self._lowering_at.clear()
        self.port.close()
