"""Authenticated links: CurveZMQ key files, and a real loop that admits only listed keys.

A real loop (rig_adapters.live.loop.LiveLoop) runs in a thread with real
ZeroMQ sockets on 127.0.0.1 only, its rig, events and control sockets in
``[endpoints] curve_sockets``. Peers with an authorised key get through;
peers with an unlisted key, without the loop's public key, or without CURVE
at all are refused, counted by socket and reason, and the loop goes on
answering. The handshake itself is libzmq's (ZeroMQ RFC 26, CurveZMQ); these
tests check that placeloop sets it up and counts it, not the cryptography.
The arena and zone are invented, for plumbing only.
"""

import os
import re
import stat
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import tomli_w
import zmq

from decoder.config import ConfigError, parse_config
from decoder.session.pipeline import Pipeline
from rig_adapters.live.curve_links import plain_network_links
from rig_adapters.live.loop import LiveLoop
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulated_rig import run_rig
from rig_adapters.wire import protocol
from rig_adapters.wire.curve_keys import KeyFileError, as_client, read_authorised, read_key, write_key_pair

ROOT = Path(__file__).resolve().parent.parent

BASE = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 12.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
}


# -- key files ------------------------------------------------------------------------------


def test_a_key_pair_is_a_secret_file_for_its_owner_and_a_public_file(tmp_path):
    secret_path, public_path = write_key_pair(tmp_path, "decoder")
    assert (secret_path.name, public_path.name) == ("decoder.key", "decoder.pub")
    # Mode 0600 for a secret key: common practice (as for SSH private keys).
    assert stat.S_IMODE(secret_path.stat().st_mode) == 0o600
    own, shared = read_key(secret_path, need_secret=True), read_key(public_path)
    assert shared.secret is None and shared.public == own.public and own.name == shared.name == "decoder"
    # The public half is the one libzmq derives from the secret (zmq.curve_public, the reference library).
    assert zmq.curve_public(own.secret) == own.public
    # A Curve25519 key is 32 bytes, 40 characters of Z85 (ZeroMQ RFC 32: 4 bytes per 5 characters).
    assert len(own.public) == len(own.secret) == 40
    with pytest.raises(KeyFileError, match="already exists"):
        write_key_pair(tmp_path, "decoder")


@pytest.mark.parametrize("damage, match", [
    ("chmod", "can be read by others"),
    ("edit_public", "not the one of its secret key"),
    ("not_toml", "not a placeloop key file"),
    ("short_key", "40-character Z85 key"),
])
def test_a_damaged_or_exposed_secret_key_is_refused_with_the_fix(tmp_path, damage, match):
    secret_path, _ = write_key_pair(tmp_path, "decoder")
    text = secret_path.read_text()
    if damage == "chmod":
        os.chmod(secret_path, 0o644)
    elif damage == "edit_public":
        other = zmq.curve_keypair()[0].decode()
        secret_path.write_text("\n".join(line if not line.startswith("public") else f'public = "{other}"'
                                         for line in text.splitlines()))
    elif damage == "not_toml":
        secret_path.write_text("-----BEGIN KEY-----\n")
    else:
        secret_path.write_text(re.sub(r'secret = "(.{30}).*"', r'secret = "\1"', text))
    with pytest.raises(KeyFileError, match=match):
        read_key(secret_path, need_secret=True)


def test_a_public_file_named_as_the_secret_and_an_empty_clients_directory_are_refused(tmp_path):
    _, public_path = write_key_pair(tmp_path, "decoder")
    with pytest.raises(KeyFileError, match="holds no secret key"):
        read_key(public_path, need_secret=True)
    (tmp_path / "clients").mkdir()
    with pytest.raises(KeyFileError, match="holds no .pub file"):
        read_authorised(tmp_path / "clients")
    with pytest.raises(KeyFileError, match="does not exist"):
        read_authorised(tmp_path / "nowhere")
    with pytest.raises(KeyFileError, match="key name"):
        write_key_pair(tmp_path, "../escape")


def test_the_config_names_its_curve_sockets_and_needs_both_key_paths():
    with pytest.raises(ConfigError, match="curve_sockets names each of"):
        parse_config(tomli_w.dumps({**BASE, "endpoints": {"curve_sockets": ["rig", "tracker"]}}))
    with pytest.raises(ConfigError, match="curve_secret_key is needed"):
        parse_config(tomli_w.dumps({**BASE, "endpoints": {"curve_sockets": ["control"], "curve_clients": "c"}}))
    assert parse_config(tomli_w.dumps(BASE)).endpoints.curve_sockets == ()


def test_a_plain_link_that_crosses_a_network_is_named_and_a_loopback_or_curve_one_is_not():
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737), for documentation; nothing here opens a socket.
    endpoints = {"rig": ["tcp://127.0.0.1:5770", "tcp://192.0.2.7:5770"], "events": "tcp://192.0.2.1:5771",
                 "control": "tcp://192.0.2.1:5773", "allow_remote": True,
                 "curve_sockets": ["control"], "curve_secret_key": "d.key", "curve_clients": "clients"}
    settings = parse_config(tomli_w.dumps({**BASE, "endpoints": endpoints})).endpoints
    assert plain_network_links(settings) == [("rig", "tcp://192.0.2.7:5770"), ("events", "tcp://192.0.2.1:5771")]
    assert plain_network_links(settings, dry_run=True) == [("rig", "tcp://192.0.2.7:5770")]
    assert plain_network_links(parse_config(tomli_w.dumps(BASE)).endpoints) == []


# -- a real loop ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def keys(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("keys")
    clients = tmp / "clients"
    paths = {}
    for name in ("decoder", "rig", "stimulator", "script", "outsider"):
        paths[name] = write_key_pair(tmp, name)
    for name in ("rig", "stimulator", "script"):
        (clients / f"{name}.pub").parent.mkdir(exist_ok=True)
        (clients / f"{name}.pub").write_bytes(paths[name][1].read_bytes())
    return tmp, paths


def _key(keys, name):
    return read_key(keys[1][name][0], need_secret=True)


@pytest.fixture(scope="module")
def running_loop(keys):
    tmp, paths = keys
    ports = {k: free_loopback_port() for k in ("rig", "outsider_rig", "sim_rig", "events", "state", "control")}
    ctx = zmq.Context.instance()
    # Two rig publishers, as a rig's processes would bind them: one with an authorised key, one without.
    rigs = {}
    for name, key in (("rig", "rig"), ("outsider_rig", "outsider")):
        xpub = ctx.socket(zmq.XPUB)
        xpub.setsockopt(zmq.LINGER, 0)
        as_client(xpub, _key(keys, key), _key(keys, "decoder").public)
        xpub.bind(f"tcp://127.0.0.1:{ports[name]}")
        rigs[name] = xpub
    config = parse_config(tomli_w.dumps({**BASE, "endpoints": {
        "rig": [f"tcp://127.0.0.1:{ports[name]}" for name in ("rig", "outsider_rig", "sim_rig")],
        "events": f"tcp://127.0.0.1:{ports['events']}",
        "state": f"tcp://127.0.0.1:{ports['state']}",
        "control": f"tcp://127.0.0.1:{ports['control']}",
        "curve_sockets": ["rig", "events", "control"],
        "curve_secret_key": str(paths["decoder"][0]),
        "curve_clients": str(tmp / "clients"),
    }}))
    loop = LiveLoop(config, Pipeline(config), publish_state=False)
    thread = threading.Thread(target=loop.run, daemon=True)
    thread.start()
    endpoints = {name: f"tcp://127.0.0.1:{port}" for name, port in ports.items()}
    try:
        assert _status(keys, endpoints["control"], "script") is not None
        yield loop, endpoints, rigs, thread
    finally:
        loop.stop_requested = True
        thread.join(timeout=10)
        for xpub in rigs.values():
            xpub.close()


def _status(keys, endpoint, own=None, server="decoder", timeout_ms=10_000):
    """A status request through a fresh REQ socket with the given keys; the reply, or None if none came."""
    req = zmq.Context.instance().socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.setsockopt(zmq.RCVTIMEO, timeout_ms)
    # A refused handshake can drop the connection's pipe before the request is queued; a REQ socket
    # with no pipe then blocks in send, so the send has a timeout too and counts as no reply.
    req.setsockopt(zmq.SNDTIMEO, timeout_ms)
    try:
        if own is not None:
            server_public = zmq.curve_keypair()[0] if server is None else _key(keys, server).public
            as_client(req, _key(keys, own), server_public)
        req.connect(endpoint)
        try:
            req.send(protocol.encode_control_request("status"))
            return protocol.decode_control_reply(req.recv())
        except zmq.Again:
            return None
    finally:
        req.close()


def _messages_in(loop):
    """Rig messages the loop has taken in; read from the test's thread while the loop may add a source."""
    while True:
        try:
            return sum(h.messages for h in list(loop.pipeline.health.sources.values()))
        except RuntimeError:
            continue


def _wait_for(predicate, timeout_s=10.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return predicate()


@pytest.mark.parametrize("own, server, reasons", [
    ("outsider", "decoder", ("unlisted_key",)),
    ("script", None, ("wrong_server_key",)),
    # libzmq reports a plain peer as a mechanism mismatch, or, when the peer hangs up first, with no detail.
    (None, "decoder", ("not_curve", "handshake")),
])
def test_a_control_client_without_an_authorised_key_is_refused_counted_and_the_loop_goes_on(
        running_loop, keys, own, server, reasons):
    loop, endpoints, _, thread = running_loop

    def refused():
        return sum(loop.links.refused["control"][reason] for reason in reasons)

    before = refused()
    assert _status(keys, endpoints["control"], own, server, timeout_ms=1000) is None
    assert _wait_for(lambda: refused() > before)
    reply = _status(keys, endpoints["control"], "script")
    assert reply is not None and reply["ok"] and thread.is_alive()
    assert sum(reply["status"]["links"]["refused"]["control"][reason] for reason in reasons) > before


def test_only_the_authorised_rig_publisher_gets_the_loops_subscription(running_loop):
    loop, _, rigs, _ = running_loop
    # An XPUB hears a subscription only from a peer whose handshake succeeded.
    assert rigs["rig"].poll(10_000)
    assert rigs["rig"].recv() == b"\x01"
    assert not rigs["outsider_rig"].poll(500)
    assert _wait_for(lambda: loop.links.refused["rig"]["unlisted_key"] > 0)
    assert loop.links.accepted["rig"] >= 1


def test_only_an_authorised_subscriber_is_let_onto_the_events_socket(running_loop, keys):
    loop, endpoints, _, _ = running_loop
    ctx = zmq.Context.instance()
    accepted_before = loop.links.accepted["events"]
    subs = []
    try:
        for own in ("stimulator", "outsider"):
            sub = ctx.socket(zmq.SUB)
            sub.setsockopt(zmq.LINGER, 0)
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            as_client(sub, _key(keys, own), _key(keys, "decoder").public)
            sub.connect(endpoints["events"])
            subs.append(sub)
        assert _wait_for(lambda: loop.links.accepted["events"] > accepted_before)
        assert _wait_for(lambda: loop.links.refused["events"]["unlisted_key"] > 0)
    finally:
        for sub in subs:
            sub.close()


def test_placeloop_control_with_keys_gets_through_and_the_summary_counts_refusals(running_loop, keys):
    loop, endpoints, _, _ = running_loop
    tmp, paths = keys
    base = [sys.executable, "-m", "rig_adapters.cli", "control", "status", "--endpoint", endpoints["control"]]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    good = subprocess.run(base + ["--curve-key", str(paths["script"][0]), "--server-key", str(paths["decoder"][1])],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=60)
    assert good.returncode == 0, good.stderr
    refused = subprocess.run(base + ["--curve-key", str(paths["outsider"][0]), "--server-key",
                                     str(paths["decoder"][1]), "--timeout-wall-s", "1"],
                             cwd=ROOT, env=env, capture_output=True, text=True, timeout=60)
    assert refused.returncode != 0 and "curve" in refused.stderr.lower()
    links = loop.summary()["links"]
    assert links["curve_sockets"] == ["rig", "events", "control"]
    assert links["authorised"] == ["rig", "script", "stimulator"]
    assert links["refused_total"] == sum(sum(r.values()) for r in links["refused"].values()) > 0
    assert loop._monitor_stats()["links_refused"] > 0


def test_the_stimulator_stand_in_and_the_simulated_rig_connect_with_their_keys(running_loop, keys, tmp_path):
    loop, endpoints, _, _ = running_loop
    tmp, paths = keys
    accepted_before = loop.links.accepted["events"]
    standin = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.sim.stimulator_standin", "--events", endpoints["events"],
         "--out", str(tmp_path / "received.json"), "--curve-key", str(paths["stimulator"][0]),
         "--server-key", str(paths["decoder"][1])],
        cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)}, stderr=subprocess.PIPE, text=True)
    try:
        assert _wait_for(lambda: loop.links.accepted["events"] > accepted_before, timeout_s=60), loop.links.summary()
    finally:
        standin.terminate()
        assert standin.wait(timeout=30) == 0, standin.stderr.read()
    # Last: the loop's first spikes may compile kernels (no warm-up here), holding the loop for a while.
    config_file = tmp_path / "arena.toml"
    config_file.write_text(tomli_w.dumps(BASE))
    counted_before = _messages_in(loop)
    sent = run_rig(config_file, endpoints["sim_rig"], speed=0.0, duration_s=1.0, seed=3,
                   curve_key=paths["rig"][0], server_key=paths["decoder"][1])
    assert sent.stopped == "end" and sent.messages > 0
    assert _wait_for(lambda: _messages_in(loop) > counted_before)


def test_placeloop_keys_writes_a_pair_and_never_overwrites(tmp_path):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    command = [sys.executable, "-m", "rig_adapters.cli", "keys", "bench-rig", "--dir", str(tmp_path)]
    first = subprocess.run(command, cwd=ROOT, env=env, capture_output=True, text=True, timeout=60)
    assert first.returncode == 0, first.stderr
    assert stat.S_IMODE((tmp_path / "bench-rig.key").stat().st_mode) == 0o600
    assert read_key(tmp_path / "bench-rig.pub").name == "bench-rig"
    again = subprocess.run(command, cwd=ROOT, env=env, capture_output=True, text=True, timeout=60)
    assert again.returncode != 0 and "already exists" in again.stderr


def test_the_monitor_connects_with_its_keys_and_without_them_is_refused(running_loop, keys, tmp_path):
    loop, endpoints, _, _ = running_loop
    _, paths = keys
    config_file = tmp_path / "arena.toml"
    config_file.write_text(tomli_w.dumps(BASE))
    base = [sys.executable, "-m", "rig_adapters.cli", "monitor", "--config", str(config_file),
            "--state", f"tcp://127.0.0.1:{free_loopback_port()}", "--events", endpoints["events"]]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    half = subprocess.run(base + ["--curve-key", str(paths["script"][0])], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=60)
    assert half.returncode == 2 and "--server-key" in half.stderr
    for own, counter in (("script", lambda: loop.links.accepted["events"]),
                         (None, lambda: sum(loop.links.refused["events"][r] for r in ("not_curve", "handshake")))):
        before = counter()
        keys_args = ["--curve-key", str(paths[own][0]), "--server-key", str(paths["decoder"][1])] if own else []
        monitor = subprocess.Popen(base + ["--http-port", str(free_loopback_port())] + keys_args, cwd=ROOT, env=env,
                                   stderr=subprocess.PIPE, text=True)
        try:
            assert _wait_for(lambda: counter() > before, timeout_s=60), (own, loop.links.summary())
        finally:
            monitor.terminate()
            monitor.wait(timeout=30)
