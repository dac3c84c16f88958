"""The events socket knows whether anyone listens.

A ZeroMQ publisher drops every message that no subscriber takes, silently.
The loop's events socket is an XPUB whose subscription messages the loop
reads, so it counts its listeners, counts and logs each event published to
nobody, warns on an ``arm`` with no listener and, with ``[safety]
arm_requires_listener``, refuses it. Everything here runs real ZeroMQ sockets
on 127.0.0.1 only, a real LiveLoop in a thread and real subscriber processes;
arenas, zones, models and sessions are invented, for plumbing only.

The first test checks, rather than recalls, the libzmq behaviour the count
rests on: with ``ZMQ_XPUB_VERBOSER`` an XPUB hands up every subscription
message of ZeroMQ RFC 29 (PUB-SUB: first byte 1 subscribe, 0 unsubscribe,
then the prefix), and ends a peer's subscriptions when its connection closes.
"""

import logging
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import zmq
from loop_helpers import BASE, control_request

from decoder.config import parse_config
from decoder.session.pipeline import Pipeline
from rig_adapters.live.loop import LiveLoop
from rig_adapters.sessions.recorder import SessionRecorder, read_log
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire import protocol
from rig_adapters.wire.curve_keys import as_client, read_key, write_key_pair
from rig_adapters.wire.ingest import CHANNEL_CONTROL, CHANNEL_CONTROL_REFUSED

ROOT = Path(__file__).resolve().parent.parent


SUBSCRIBER = """
import sys, time, zmq
sock = zmq.Context().socket(zmq.SUB)
sock.connect(sys.argv[1])
sock.setsockopt(zmq.SUBSCRIBE, b"")
print("subscribed", flush=True)
time.sleep(120)
"""


def _endpoints():
    return {k: f"tcp://127.0.0.1:{free_loopback_port()}" for k in ("rig", "events", "state", "control")}


def _config(ep, safety=None, **endpoints):
    return parse_config(tomli_w.dumps({**BASE, "safety": {**BASE["safety"], **(safety or {})}, "endpoints": {
        "rig": [ep["rig"]], "events": ep["events"], "state": ep["state"], "control": ep["control"], **endpoints}}))


class _Running:
    """A LiveLoop in a thread, stopped and joined on exit."""

    def __init__(self, config, model=None, **kwargs):
        self.loop = LiveLoop(config, Pipeline(config, model=model), publish_state=False, **kwargs)
        self.thread = threading.Thread(target=self.loop.run, daemon=True)

    def __enter__(self):
        self.thread.start()
        # The loop opens its sockets in its own thread; tests read them.
        deadline = time.monotonic() + 20.0
        while getattr(self.loop, "control", None) is None:
            assert self.thread.is_alive() and time.monotonic() < deadline, "the loop did not open its sockets"
            time.sleep(0.01)
        return self.loop

    def __exit__(self, *exc):
        self.loop.stop_requested = True
        self.thread.join(timeout=20)
        assert not self.thread.is_alive()


def _events_status(endpoint):
    reply = control_request(endpoint, "status")
    assert reply["ok"], reply
    return reply["status"]["events"]


def _wait_listeners(endpoint, n, timeout_s=10.0):
    deadline = time.monotonic() + timeout_s
    while (got := _events_status(endpoint)["listeners"]) != n:
        assert time.monotonic() < deadline, f"the loop counts {got} events listener(s), expected {n}"
        time.sleep(0.02)


def _sub(endpoint, curve=None):
    sock = zmq.Context.instance().socket(zmq.SUB)
    sock.setsockopt(zmq.LINGER, 0)
    if curve is not None:
        as_client(sock, *curve)
    sock.connect(endpoint)
    sock.setsockopt(zmq.SUBSCRIBE, b"")
    return sock


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """A simulated session (invented) and the model learnt on its first minute."""
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": 60.0, "cross_validate": False}}))
    sim = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=5)
    messages = list(sim.messages(until_s=90.0))
    pipeline = Pipeline(learn)
    for msg in messages:
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    return pipeline.model, [m for m in messages if _t(m) <= 60.0]


def _t(msg):
    t = getattr(msg, "t_s", None)
    if t is None:
        return -1.0
    return float(np.max(t)) if np.ndim(t) and np.size(t) else (float(t) if np.ndim(t) == 0 else -1.0)


class _Rig:
    """A test rig: an XPUB bound where the loop connects, sending the session's first seconds once it is subscribed."""

    def __init__(self, endpoint):
        self.sock = zmq.Context.instance().socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, 2000)
        self.sock.setsockopt(zmq.SNDHWM, 0)
        self.sock.bind(endpoint)

    def send(self, messages):
        # The loop subscribes once its kernels are loaded: about a minute with an empty numba cache.
        if not getattr(self, "subscribed", False):
            assert self.sock.poll(120_000), "the loop never subscribed to the test rig"
            self.sock.recv()
            self.subscribed = True
        for msg in messages:
            self.sock.send(protocol.encode(msg))

    def close(self):
        self.sock.close()


def _arm(endpoint, timeout_s=20.0):
    """Arm once the first spikes are in (the session refuses an arm before); the accepted reply."""
    deadline = time.monotonic() + timeout_s
    while not (reply := control_request(endpoint, "arm"))["ok"]:
        assert time.monotonic() < deadline, f"the loop never armed: {reply}"
        time.sleep(0.02)
    return reply


# -- what libzmq does ---------------------------------------------------------------------------


def _drain(xpub, wait_s=0.5):
    got, end = [], time.monotonic() + wait_s
    while time.monotonic() < end:
        if xpub.poll(20):
            got.append(xpub.recv())
    return got


def test_libzmq_hands_up_each_subscription_and_ends_a_closed_or_killed_peers_own():
    ctx = zmq.Context.instance()
    xpub = ctx.socket(zmq.XPUB)
    xpub.setsockopt(zmq.LINGER, 0)
    xpub.setsockopt(zmq.XPUB_VERBOSER, 1)
    endpoint = f"tcp://127.0.0.1:{free_loopback_port()}"
    xpub.bind(endpoint)
    child = None
    try:
        first, second = _sub(endpoint), _sub(endpoint)
        # Two peers on one prefix: both subscriptions reach the socket (a plain XPUB passes only the first).
        assert _drain(xpub) == [b"\x01", b"\x01"]
        second.setsockopt(zmq.UNSUBSCRIBE, b"")
        assert _drain(xpub) == [b"\x00"]
        second.close()
        first.close()
        # A closed peer's prefix is ended by libzmq itself; one that had unsubscribed leaves nothing to end.
        assert _drain(xpub) == [b"\x00"]
        two = _sub(endpoint)
        two.setsockopt(zmq.SUBSCRIBE, b"\x82")
        assert _drain(xpub) == [b"\x01", b"\x01\x82"]
        two.close()
        assert sorted(_drain(xpub)) == [b"\x00", b"\x00\x82"]
        child = subprocess.Popen([sys.executable, "-c", SUBSCRIBER, endpoint], stdout=subprocess.PIPE, text=True)
        assert child.stdout.readline().strip() == "subscribed"
        assert _drain(xpub, 1.0) == [b"\x01"]
        child.kill()
        child.wait(timeout=10)
        # A killed process's connection is closed by its kernel: the subscription ends all the same.
        assert _drain(xpub, 1.0) == [b"\x00"]
    finally:
        if child is not None and child.poll() is None:
            child.kill()
        xpub.close()


# -- the loop counts its listeners -------------------------------------------------------------


def test_the_loop_counts_listeners_joining_leaving_and_killed():
    ep = _endpoints()
    child = None
    with _Running(_config(ep)) as loop:
        assert _events_status(ep["control"])["listeners"] == 0
        first = _sub(ep["events"])
        _wait_listeners(ep["control"], 1)
        second = _sub(ep["events"])
        _wait_listeners(ep["control"], 2)
        first.close()
        _wait_listeners(ep["control"], 1)
        child = subprocess.Popen([sys.executable, "-c", SUBSCRIBER, ep["events"]], stdout=subprocess.PIPE, text=True)
        try:
            assert child.stdout.readline().strip() == "subscribed"
            _wait_listeners(ep["control"], 2)
            child.kill()
            child.wait(timeout=10)
            _wait_listeners(ep["control"], 1)
        finally:
            if child.poll() is None:
                child.kill()
        second.close()
        _wait_listeners(ep["control"], 0)
        stats = loop._monitor_stats()
        assert "events_listeners" in stats and stats["events_unheard"] == 0
    assert loop.summary()["event_listeners"] == {"listeners": 0, "most": 2, "joined": 3, "left": 3}


# -- arming with nobody listening --------------------------------------------------------------


def test_an_arm_with_no_listener_is_answered_with_a_warning_and_one_with_a_listener_is_not(session, caplog):
    model, messages = session
    ep = _endpoints()
    rig = _Rig(ep["rig"])
    with caplog.at_level(logging.WARNING, logger="rig_adapters.live.loop"), _Running(_config(ep), model):
        rig.send(messages[:50])
        reply = _arm(ep["control"])
        assert reply["status"]["armed"]
        assert "no listener on the events socket" in reply["warning"] and ep["events"] in reply["warning"]
        assert control_request(ep["control"], "disarm")["ok"]
        sub = _sub(ep["events"])
        try:
            _wait_listeners(ep["control"], 1)
            reply = control_request(ep["control"], "arm")
            assert reply["ok"] and "warning" not in reply
        finally:
            sub.close()
            rig.close()
    assert sum("no listener on the events socket" in r.getMessage() for r in caplog.records) == 1


def test_with_arm_requires_listener_an_unheard_arm_is_refused_counted_and_logged_apart(session, tmp_path):
    model, messages = session
    ep = _endpoints()
    config = _config(ep, safety={"arm_requires_listener": True})
    recorder = SessionRecorder(tmp_path / "session")
    rig = _Rig(ep["rig"])
    with _Running(config, model, recorder=recorder) as loop:
        rig.send(messages[:50])
        reply = control_request(ep["control"], "arm")
        assert not reply["ok"] and reply["reason"] == "no_listener"
        assert "arm_requires_listener" in reply["error"] and ep["events"] in reply["error"]
        status = control_request(ep["control"], "status")["status"]
        assert not status["armed"] and status["control"]["refused"] == {"no_listener": 1}
        sub = _sub(ep["events"])
        try:
            _wait_listeners(ep["control"], 1)
            reply = _arm(ep["control"])
            assert reply["status"]["armed"] and "warning" not in reply
        finally:
            sub.close()
            rig.close()
    recorder.close()
    assert loop.summary()["input"]["control_refused"] == {"no_listener": 1}
    records = read_log(tmp_path / "session").records
    # The refused arm is kept on the channel a replay does not feed; the accepted one on the control channel.
    commands = {ch: [protocol.decode_control_request(r.payload).command for r in records
                     if r.type == "input" and r.channel == ch] for ch in (CHANNEL_CONTROL, CHANNEL_CONTROL_REFUSED)}
    assert commands[CHANNEL_CONTROL_REFUSED] == ["arm"]
    assert "arm" in commands[CHANNEL_CONTROL]
    assert any(r.type == "mark" and r.note().get("event_listeners") == 1 for r in records)


def test_a_dry_run_arms_without_a_listener_even_when_one_is_required(session):
    model, messages = session
    ep = _endpoints()
    config = _config(ep, safety={"arm_requires_listener": True})
    rig = _Rig(ep["rig"])
    with _Running(config, model, dry_run=True) as loop:
        try:
            rig.send(messages[:50])
            reply = _arm(ep["control"])
        finally:
            rig.close()
        assert reply["status"]["armed"] and "warning" not in reply
        assert reply["status"]["events"] == {"dry_run": True, "published": 0, "unheard": 0, "withheld": 0}
    assert "event_listeners" not in loop.summary()


# -- events published to nobody -----------------------------------------------------------------


def test_events_published_to_nobody_are_counted_and_logged_once_per_run(session, caplog):
    model, messages = session
    ep = _endpoints()
    rig = _Rig(ep["rig"])
    late = None
    try:
        with caplog.at_level(logging.WARNING, logger="rig_adapters.live.loop"), \
                _Running(_config(ep), model) as loop:
            half = len(messages) // 2
            rig.send(messages[:50])
            assert "warning" in _arm(ep["control"])
            rig.send(messages[50:half])
            # A bridge that connects late hears what is published from then on, and only that.
            late = _sub(ep["events"])
            _wait_listeners(ep["control"], 1, timeout_s=60.0)
            rig.send(messages[half:])
            deadline = time.monotonic() + 60.0
            while (control_request(ep["control"], "status")["status"]["data_time_s"] or 0.0) < 59.0:
                assert time.monotonic() < deadline, "the loop did not decode the session"
                time.sleep(0.2)
            heard = 0
            while late.poll(500):
                late.recv()
                heard += 1
            status = _events_status(ep["control"])
    finally:
        rig.close()
        if late is not None:
            late.close()
    summary = loop.summary()
    published, unheard = summary["triggers"]["published"], summary["triggers"]["unheard"]
    assert published == summary["triggers"]["count"] >= 1
    assert (status["published"], status["unheard"]) == (published, unheard)
    # Every event published was either delivered to the late listener or counted unheard.
    assert heard + unheard == published
    warnings = [r.getMessage() for r in caplog.records if "while no listener was connected" in r.getMessage()]
    # One run of unheard events (before the bridge joined): one sentence if any event went unheard.
    assert len(warnings) == min(unheard, 1)
    assert all("the stimulator bridge is not connected to the events socket" in w for w in warnings)


# -- CurveZMQ ------------------------------------------------------------------------------------


def test_an_authenticated_listener_is_counted_and_a_refused_one_is_not(tmp_path):
    paths = {name: write_key_pair(tmp_path, name) for name in ("decoder", "stimulator", "outsider")}
    (tmp_path / "clients").mkdir()
    (tmp_path / "clients" / "stimulator.pub").write_bytes(paths["stimulator"][1].read_bytes())
    key = {name: read_key(paths[name][0], need_secret=True) for name in paths}
    ep = _endpoints()
    config = _config(ep, curve_sockets=["events"], curve_secret_key=str(paths["decoder"][0]),
                     curve_clients=str(tmp_path / "clients"))
    with _Running(config) as loop:
        outsider = _sub(ep["events"], curve=(key["outsider"], key["decoder"].public))
        try:
            deadline = time.monotonic() + 10.0
            while loop.links.refused["events"]["unlisted_key"] == 0:
                assert time.monotonic() < deadline, "the outsider's handshake was never refused"
                time.sleep(0.02)
            assert _events_status(ep["control"])["listeners"] == 0
            stimulator = _sub(ep["events"], curve=(key["stimulator"], key["decoder"].public))
            try:
                _wait_listeners(ep["control"], 1)
                time.sleep(0.5)
                assert _events_status(ep["control"])["listeners"] == 1
            finally:
                stimulator.close()
            _wait_listeners(ep["control"], 0)
        finally:
            outsider.close()
