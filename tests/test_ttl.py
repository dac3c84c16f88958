"""TTL output per rule (rig_adapters.live.ttl, the [ttl] table): which byte or line each rule drives.

Bytes are read back through a real pseudo-terminal (the device end a
microcontroller would hold); modem-control lines through pyserial's
``loop://`` URL, which wires RTS to CTS and DTR to DSR (pyserial's
documentation of its URL handlers), since a Linux pseudo-terminal has no
modem-control lines.
"""

import os
import select
import time

import numpy as np
import pytest
import tomli_w
from loop_helpers import loopback_endpoints, open_with_subscriber

from decoder.config import ConfigError, TtlSettings, parse_config
from decoder.session.pipeline import Pipeline
from rig_adapters.live.loop import LiveLoop
from rig_adapters.live.ttl import TtlDevice
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire import protocol


@pytest.fixture
def pty():
    """A pseudo-terminal: its device path for placeloop, and a reader of what arrives at the other end."""
    master, slave = os.openpty()
    os.set_blocking(master, False)

    def read_all(wait_s=0.5):
        out = b""
        deadline = time.monotonic() + wait_s
        while time.monotonic() < deadline:
            if select.select([master], [], [], 0.05)[0]:
                out += os.read(master, 1024)
        return out

    yield os.ttyname(slave), read_all
    os.close(master)
    os.close(slave)


def _device(ttl_table, rules):
    return TtlDevice.from_settings(TtlSettings(**ttl_table), rules)


def test_each_rule_writes_its_own_byte_through_a_pseudo_terminal(pty):
    path, read_all = pty
    device = _device({"device": path, "outputs": [{"rule": "west_reward", "byte": 0x41},
                                                  {"rule": "east_reward", "byte": 0x42}]},
                     ["west_reward", "east_reward", "probe"])
    try:
        for rule in ("east_reward", "west_reward", "east_reward"):
            device.pulse(rule)
        # A rule left out of [[ttl.outputs]] drives nothing.
        assert device.pulse("probe") is False
        assert read_all() == b"BAB"
        # A write can be reported as timed out after its byte went out when the machine is loaded
        # (the module's docstring); every pulse is either counted sent or counted failed.
        assert device.pulses + device.failures == 3
    finally:
        device.close()


def test_without_outputs_every_rule_writes_the_table_byte(pty):
    path, read_all = pty
    device = _device({"device": path, "pulse_byte": 0x31}, ["a", "b"])
    try:
        device.pulse("a")
        device.pulse("b")
        assert read_all() == b"11"
    finally:
        device.close()


def test_each_rule_pulses_its_own_line_for_its_own_length():
    device = _device({"device": "loop://", "drive": "line", "pulse_s": 0.05,
                      "outputs": [{"rule": "west_reward", "line": "rts"},
                                  {"rule": "east_reward", "line": "dtr", "pulse_s": 0.2}]},
                     ["west_reward", "east_reward"])
    port = device.port
    try:
        assert (port.cts, port.dsr) == (False, False), "the lines must be low once the port is open"
        assert device.pulse("west_reward", now_s=100.0) and device.pulse("east_reward", now_s=100.0)
        assert (port.cts, port.dsr) == (True, True)
        assert device.next_due_s() == pytest.approx(100.05)
        device.service(now_s=100.049)
        assert (port.cts, port.dsr) == (True, True)
        device.service(now_s=100.05)
        assert (port.cts, port.dsr) == (False, True)
        device.service(now_s=100.2)
        assert (port.cts, port.dsr) == (False, False)
        assert device.next_due_s() is None
    finally:
        device.close()


def test_closing_lowers_a_line_still_high():
    device = _device({"device": "loop://", "drive": "line", "line": "dtr", "pulse_s": 0.5}, ["r"])
    port = device.port
    assert device.pulse("r") and port.dsr
    device.close()
    assert not port.dsr


def test_a_write_to_a_closed_device_is_counted_not_raised():
    device = _device({"device": "loop://"}, ["r"])
    device.port.close()
    assert device.pulse("r") is False
    assert device.failures == 1


def test_a_missing_device_is_a_clear_error():
    with pytest.raises(OSError, match="cannot open the TTL device"):
        TtlDevice("/dev/no-such-ttl-device")


BASE = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "zones": [{"kind": "circle", "name": "west", "center_cm": [20.0, 40.0], "radius_cm": 14.0},
              {"kind": "circle", "name": "east", "center_cm": [60.0, 40.0], "radius_cm": 14.0}],
    "rules": [{"name": "west_reward", "zone": "west", "min_mass": 0.6},
              {"name": "east_reward", "zone": "east", "min_mass": 0.6}],
}


@pytest.mark.parametrize("ttl, message", [
    ({"outputs": [{"rule": "north_reward"}]}, "names rule 'north_reward', which is not among"),
    ({"drive": "line", "outputs": [{"rule": "west_reward", "byte": 0x32}]}, "sets byte, which drive = 'line'"),
    ({"outputs": [{"rule": "west_reward", "pulse_s": 0.05}]}, "sets pulse_s, which drive = 'byte'"),
    ({"drive": "line", "pulse_s": 2.0}, r"pulse_s must be a pulse length in \(0, 1.0\] s"),
    ({"pulse_byte": 256}, "pulse_byte must be a byte value 0..255"),
    ({"line": "cts"}, "line must be one of"),
    ({"outputs": [{"rule": "west_reward"}, {"rule": "west_reward"}]}, "at most once"),
])
def test_a_wrong_ttl_table_is_refused_naming_what_to_change(ttl, message):
    with pytest.raises(ConfigError, match=message):
        parse_config(tomli_w.dumps({**BASE, "ttl": {"device": "loop://", **ttl}}))


def test_the_live_loop_drives_each_rules_byte_for_the_events_it_publishes(pty):
    """Real sockets, a real pseudo-terminal: the bytes that arrive follow the rules of the published events."""
    path, read_all = pty
    doc = {**BASE, "sources": {"truth": "truth"}, "model": {"cv_folds": 2, "cv_block_s": 20.0},
           "session": {"learn_s": 60.0, "cross_validate": False, "arm_after_fit": True},
           "safety": {"refractory_s": 1.0, "max_per_minute": 60},
           "simulation": {"n_place_cells": 50, "n_grid_cells": 5, "n_nonspatial_cells": 5},
           "endpoints": loopback_endpoints(),
           "ttl": {"device": path, "outputs": [{"rule": "west_reward", "byte": 0x57},
                                               {"rule": "east_reward", "byte": 0x45}]}}
    config = parse_config(tomli_w.dumps(doc))
    sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=11)
    device = TtlDevice.from_settings(config.ttl, [r.name for r in config.rules])
    loop = LiveLoop(config, Pipeline(config), ttl=device, publish_state=False)
    listener = open_with_subscriber(loop, doc["endpoints"]["events"])
    try:
        for msg in sim.messages(until_s=150.0):
            loop.handle_rig_bytes(protocol.encode(msg), time.time())
        rules = []
        while listener.poll(500):
            rules.append(protocol.decode_output(listener.recv())["rule"])
    finally:
        listener.close()
        loop._close_sockets()
        device.close()
    assert loop.events_sent >= 2 and len(rules) == loop.events_sent
    assert read_all() == bytes(0x57 if r == "west_reward" else 0x45 for r in rules)
    assert sum(loop.summary()["ttl"].values()) == loop.events_sent
    assert np.unique(rules).size == 2, "the scenario should fire both rules"


def test_the_loop_wakes_for_a_line_due_to_go_low():
    config = parse_config(tomli_w.dumps({**BASE, "ttl": {"device": "loop://", "drive": "line", "pulse_s": 0.004}}))
    device = TtlDevice.from_settings(config.ttl, [r.name for r in config.rules])
    loop = LiveLoop(config, Pipeline(config), ttl=device, publish_state=False)
    try:
        assert loop._poll_ms() == 10
        assert device.pulse("west_reward")
        assert loop._poll_ms() <= 4
        time.sleep(0.005)
        assert loop._poll_ms() == 0
        device.service()
        assert not device.port.cts and loop._poll_ms() == 10
    finally:
        device.close()
