"""Tests of rig_adapters.sim.simulated_rig: the simulated rig as a real process on real ZeroMQ sockets.

Every socket binds or connects on 127.0.0.1 only.
"""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import time
from collections import defaultdict
from pathlib import Path

import pytest
import zmq

from decoder.messages import Heartbeat, SourceAnnounce, SpikeBatch, SyncPulse, TrackerFrames
from rig_adapters.wire import protocol
from rig_adapters.sim.simulated_rig import CAUTION, run_rig
from rig_adapters.sim.simulation import SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE

REPO = Path(__file__).resolve().parents[1]
ARENA_CONFIG = REPO / "configs" / "round_arena_goal.toml"
TRACK_CONFIG = REPO / "configs" / "linear_track_2m.toml"


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _start_rig(config: Path, port: int, *extra: str) -> subprocess.Popen:
    cmd = [sys.executable, "-m", "rig_adapters.sim.simulated_rig", "--config", str(config),
           "--pub", f"tcp://127.0.0.1:{port}", *extra]
    return subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _subscriber(ctx: zmq.Context, port: int) -> zmq.Socket:
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(f"tcp://127.0.0.1:{port}")
    return sub


def _receive(sub: zmq.Socket, until, quiet_s: float = 1.0) -> list:
    """Decode every frame until ``until(received)`` is true and the socket has been quiet for ``quiet_s``."""
    received: list = []
    last = time.monotonic()
    while not (until(received) and time.monotonic() - last >= quiet_s):
        if sub.poll(50):
            received.append(protocol.decode(sub.recv()))
            last = time.monotonic()
    return received


def _check_no_gaps(messages: list) -> dict:
    seqs = defaultdict(list)
    for m in messages:
        seqs[m.source].append(m.seq)
    for source, got in seqs.items():
        assert got == list(range(len(got))), f"{source} has a sequence gap or reordering"
    return seqs


@pytest.mark.timeout(90)
@pytest.mark.parametrize("config", [ARENA_CONFIG, TRACK_CONFIG], ids=["arena", "track"])
def test_rig_process_delivers_every_message_in_order(config):
    port = _free_port()
    proc = _start_rig(config, port, "--speed", "0", "--duration-s", "3", "--seed", "4")
    ctx = zmq.Context()
    sub = _subscriber(ctx, port)
    try:
        messages = _receive(sub, until=lambda received: proc.poll() is not None)
    finally:
        sub.close(linger=0)
        ctx.term()
        stderr = proc.communicate(timeout=30)[1]
    assert proc.returncode == 0, stderr
    summary = stderr.strip().splitlines()[-1]
    assert "reached the end of its duration" in summary
    assert f"sent {len(messages)} messages" in summary
    seqs = _check_no_gaps(messages)
    assert set(seqs) == {SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE}
    assert {type(m) for m in messages} == {SourceAnnounce, SpikeBatch, TrackerFrames, Heartbeat, SyncPulse}
    last_beat = [m for m in messages if isinstance(m, Heartbeat) and m.source == SPIKE_SOURCE][-1]
    assert last_beat.t_s == pytest.approx(3.0)


@pytest.mark.timeout(60)
def test_sigterm_stops_the_rig_cleanly():
    port = _free_port()
    proc = _start_rig(ARENA_CONFIG, port, "--speed", "1", "--duration-s", "600")
    ctx = zmq.Context()
    sub = _subscriber(ctx, port)
    try:
        # A second of data at 1x: the rig is up, its signal handlers installed.
        messages = _receive(sub, until=lambda received: len(received) > 300, quiet_s=0.0)
        proc.send_signal(signal.SIGTERM)
        stderr = proc.communicate(timeout=10)[1]
    finally:
        sub.close(linger=0)
        ctx.term()
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, stderr
    assert "stopped on request" in stderr.strip().splitlines()[-1]
    assert len(messages) > 50
    _check_no_gaps(messages)


@pytest.mark.timeout(30)
def test_rig_without_subscriber_gives_up_with_a_clear_error():
    proc = _start_rig(ARENA_CONFIG, _free_port(), "--wait-s", "0.5", "--duration-s", "5")
    stderr = proc.communicate(timeout=20)[1]
    assert proc.returncode == 2
    assert "nobody subscribed within 0.5 s" in stderr


def test_run_rig_refuses_to_bind_beyond_loopback():
    with pytest.raises(ValueError, match="not on loopback"):
        run_rig(ARENA_CONFIG, "tcp://0.0.0.0:5999", speed=0, duration_s=1, seed=0)


def test_run_rig_names_a_bad_simulation_key(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[environment]\nkind = "rectangle"\nwidth_cm = 50\nheight_cm = 50\nbin_cm = 5\n'
                   "[simulation]\nn_place_cell = 3\n")
    with pytest.raises(ValueError, match=r"\[simulation\] has unknown key\(s\) \['n_place_cell'\]"):
        run_rig(bad, "tcp://127.0.0.1:5999", speed=0, duration_s=1, seed=0)


@pytest.mark.parametrize(("kwargs", "words"), [
    ({"speed": -1.0}, "speed"),
    ({"duration_s": 0.0}, "duration_s"),
    ({"seed": -3}, "seed"),
])
def test_run_rig_checks_its_arguments(kwargs, words):
    args = {"speed": 0.0, "duration_s": 1.0, "seed": 0, **kwargs}
    with pytest.raises(ValueError, match=words):
        run_rig(ARENA_CONFIG, "tcp://127.0.0.1:5999", **args)


def test_help_carries_the_animal_safety_caution():
    out = subprocess.run([sys.executable, "-m", "rig_adapters.sim.simulated_rig", "--help"], cwd=REPO,
                         capture_output=True, text=True, timeout=30).stdout
    assert "no hardware interlock" in " ".join(out.split())
    assert "animal-use protocol" in CAUTION
