"""Settings read only by the shell: ``[endpoints]`` and ``[ttl]``."""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass
from typing import Any, Literal, get_args

from decoder.config.checks import ConfigError, _from_table


#: The sockets [endpoints] curve_sockets can name.
CURVE_SOCKET_NAMES = ("rig", "events", "state", "control")


@dataclass(frozen=True)
class EndpointSettings:
    """ZeroMQ endpoints. Loopback unless an interface is named explicitly."""

    #: Rig publishers placeloop connects its SUB socket to.
    rig: tuple[str, ...] = ("tcp://127.0.0.1:5770",)
    #: Where placeloop binds its PUB socket for trigger events.
    events: str = "tcp://127.0.0.1:5771"
    #: Where placeloop binds its PUB socket for the decoder's state (monitor).
    state: str = "tcp://127.0.0.1:5772"
    #: Where placeloop binds its REP socket for control commands.
    control: str = "tcp://127.0.0.1:5773"
    #: Set to true to allow binding to an interface other than loopback.
    allow_remote: bool = False
    #: Sockets run as authenticated, encrypted CurveZMQ links: any of "rig", "events", "state",
    #: "control"; empty: none (plain ZeroMQ, enough when every peer is on this machine). placeloop
    #: is the CURVE server on each; a peer without an authorised key is refused and counted.
    curve_sockets: tuple[str, ...] = ()
    #: With curve_sockets: placeloop's own secret key file, the .key written by `placeloop keys`
    #: (mode 0600); its .pub goes to every peer. A relative path is taken from the working directory.
    curve_secret_key: str = ""
    #: With curve_sockets: the directory of the authorised peers' public key files (*.pub, from
    #: `placeloop keys` on each peer); read at start. A relative path is taken from the working directory.
    curve_clients: str = ""

    def __post_init__(self) -> None:
        rig = (self.rig,) if isinstance(self.rig, str) else tuple(self.rig)
        object.__setattr__(self, "rig", rig)
        curve = (self.curve_sockets,) if isinstance(self.curve_sockets, str) else tuple(self.curve_sockets)
        object.__setattr__(self, "curve_sockets", curve)
        unknown = [name for name in curve if name not in CURVE_SOCKET_NAMES]
        if unknown or len(set(curve)) != len(curve):
            raise ConfigError(f"[endpoints] curve_sockets names each of {CURVE_SOCKET_NAMES} at most once, "
                              f"got {list(curve)}")
        for key in ("curve_secret_key", "curve_clients"):
            value = getattr(self, key)
            if not isinstance(value, str):
                raise ConfigError(f"[endpoints] {key} must be a path (a string), got {value!r}")
            if curve and not value:
                raise ConfigError(f"[endpoints] curve_sockets is set, so {key} is needed: "
                                  + ("the .key file from `placeloop keys`" if key == "curve_secret_key"
                                     else "the directory of the authorised peers' .pub files"))
        for name in ("events", "state", "control"):
            endpoint = getattr(self, name)
            if not self.allow_remote and not is_loopback_endpoint(endpoint):
                raise ConfigError(
                    f"[endpoints] {name} = {endpoint!r} is not on loopback; set allow_remote = true "
                    "to bind another interface (it exposes the socket to that network)"
                )


def is_loopback_host(host: str) -> bool:
    """True for ``localhost`` and loopback addresses (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def is_loopback_endpoint(endpoint: str) -> bool:
    """True for ``tcp://`` on a loopback host, and for ``ipc://`` and ``inproc://``."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    if not endpoint.startswith("tcp://"):
        return False
    return is_loopback_host(endpoint[len("tcp://"):].rsplit(":", 1)[0])


TtlDrive = Literal["byte", "line"]
TtlModemLine = Literal["rts", "dtr"]

#: Longest TTL pulse placeloop times itself (s); a longer output belongs to the device's own timer.
MAX_TTL_PULSE_S = 1.0


@dataclass(frozen=True)
class TtlOutput:
    """What one rule drives on the TTL device (one ``[[ttl.outputs]]`` entry)."""

    #: Name of the rule whose events this output follows; one of the ``[[rules]]`` names.
    rule: str
    #: drive = "byte": the byte written for this rule's events, 0..255; unset uses [ttl] pulse_byte.
    byte: int | None = None
    #: drive = "line": the modem-control line this rule pulses; unset uses [ttl] line.
    line: TtlModemLine | None = None
    #: drive = "line": how long this rule's pulse holds the line (s); unset uses [ttl] pulse_s.
    pulse_s: float | None = None


@dataclass(frozen=True)
class TtlSettings:
    """Optional TTL pulses through a serial device, one per event.

    Two set-ups: ``drive = "byte"`` writes one byte per event to a device (a
    microcontroller on USB serial, say) that turns it into a pulse of its own
    width; ``drive = "line"`` raises a modem-control line (RTS or DTR) of a
    plain USB-serial adapter for ``pulse_s``. With no ``[[ttl.outputs]]``
    every rule drives the table's byte or line; with outputs, only the rules
    listed drive anything, each its own byte or line (two reward ports, say).
    """

    #: pyserial URL or device path, e.g. "/dev/ttyACM0" or "loop://"; empty for none.
    device: str = ""
    #: Baud rate of the device.
    baud: int = 115200
    #: "byte": one byte per event, the device shapes the pulse. "line": placeloop holds an
    #: adapter's modem-control line asserted for pulse_s.
    drive: TtlDrive = "byte"
    #: Byte written to the device for each event (the device turns it into a pulse), 0..255.
    pulse_byte: int = 0x31
    #: drive = "line": the modem-control line pulsed for each event. Many USB-serial adapters
    #: invert it at the pin (asserted = low); check the polarity on a scope before an animal is connected.
    line: TtlModemLine = "rts"
    #: drive = "line": how long each pulse holds the line asserted (s), at most 1 s; the live loop
    #: lowers the line on the wall clock, late by at most the handling of one message.
    pulse_s: float = 0.01
    #: Per-rule outputs ([[ttl.outputs]]); empty: every rule drives the settings above.
    outputs: tuple[TtlOutput, ...] = ()

    def __post_init__(self) -> None:
        if self.drive not in get_args(TtlDrive):
            raise ConfigError(f"[ttl] drive must be one of {get_args(TtlDrive)}, got {self.drive!r}")
        for key in ("pulse_byte", "line", "pulse_s"):
            _check_ttl_value("[ttl]", key, getattr(self, key))
        outputs = []
        for i, table in enumerate(self.outputs):
            where = f"[[ttl.outputs]] #{i + 1}"
            out = table if isinstance(table, TtlOutput) else _from_table(TtlOutput, table,
                                                                         f"[ttl.outputs] #{i + 1}")
            if not isinstance(out.rule, str) or not out.rule:
                raise ConfigError(f"{where}: rule must name one of the [[rules]], got {out.rule!r}")
            unused = ("line", "pulse_s") if self.drive == "byte" else ("byte",)
            for key in ("byte", "line", "pulse_s"):
                value = getattr(out, key)
                if value is not None and key in unused:
                    raise ConfigError(f"{where} ({out.rule!r}) sets {key}, which drive = {self.drive!r} does not "
                                      "use: with 'byte' a rule chooses its byte (the device sets the pulse width), "
                                      "with 'line' its line and pulse_s")
                if value is not None:
                    _check_ttl_value(where, key, value)
            outputs.append(out)
        if len({o.rule for o in outputs}) != len(outputs):
            raise ConfigError(f"[[ttl.outputs]] names each rule at most once, got {[o.rule for o in outputs]}")
        object.__setattr__(self, "outputs", tuple(outputs))

    def route(self, rule: str) -> TtlOutput | None:
        """What ``rule`` drives, every unset key filled from the table; None if it drives nothing."""
        found = [o for o in self.outputs if o.rule == rule] if self.outputs else [TtlOutput(rule=rule)]
        if not found:
            return None
        if self.drive == "byte":
            return TtlOutput(rule, byte=self.pulse_byte if found[0].byte is None else found[0].byte)
        return TtlOutput(rule, line=found[0].line or self.line,
                         pulse_s=self.pulse_s if found[0].pulse_s is None else found[0].pulse_s)


def _check_ttl_value(where: str, key: str, value: Any) -> None:
    """The one rule for each TTL key, in [ttl] and in [[ttl.outputs]]."""
    if key == "line":
        if value not in get_args(TtlModemLine):
            raise ConfigError(f"{where} line must be one of {get_args(TtlModemLine)}, got {value!r}")
    elif key == "pulse_s":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= MAX_TTL_PULSE_S:
            raise ConfigError(f"{where} pulse_s must be a pulse length in (0, {MAX_TTL_PULSE_S}] s, got {value!r}; "
                              "a longer output belongs to the device's own timer")
    elif isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 255:
        raise ConfigError(f"{where} {key} must be a byte value 0..255 (0x31 is the character '1'), got {value!r}")
