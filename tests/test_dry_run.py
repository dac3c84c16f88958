"""A dry run is safe by construction: nothing a stimulator listens to ever carries an event.

``placeloop run --dry-run`` runs as a real process beside the shipped
stimulator stand-in and a plain subscriber, both connected to the events
endpoint, with real ZeroMQ sockets on 127.0.0.1 and a test rig publishing a
simulated session (invented data, for plumbing only). The session decodes
and would fire; the test checks that no event reaches either consumer, that
the events endpoint is not even bound, and that the log, the summary and the
state stream say what would have fired.
"""

import json
import subprocess
import sys
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest
import tomli_w
import zmq
from loop_helpers import BASE, control_request

from decoder.config import parse_config
from decoder.session.pipeline import Pipeline
from rig_adapters.live.loop import LiveLoop
from rig_adapters.live.ttl import TtlDevice as TtlLine
from rig_adapters.sessions.recorder import read_log
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_DRY_RUN_EVENTS, CHANNEL_EVENTS

ROOT = Path(__file__).resolve().parent.parent


SESSION_S = 60.0


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("dry_run")
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": 60.0, "cross_validate": False}}))
    sim = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=5)
    messages = list(sim.messages(until_s=90.0))
    pipeline = Pipeline(learn)
    for msg in messages:
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    model = tmp / "model.npz"
    pipeline.model.save(model)
    return tmp, model, [m for m in messages if _t(m) <= SESSION_S]


def _t(msg):
    t = getattr(msg, "t_s", None)
    if t is None:
        return -1.0
    return float(np.max(t)) if np.ndim(t) and np.size(t) else (float(t) if np.ndim(t) == 0 else -1.0)


def test_a_dry_run_publishes_no_event_where_a_stimulator_listens(session):
    tmp, model, messages = session
    ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
    ep = {k: f"tcp://127.0.0.1:{p}" for k, p in ports.items()}
    cfg = tmp / "dry.toml"
    cfg.write_text(tomli_w.dumps({**BASE, "endpoints": {
        "rig": [ep["rig"]], "events": ep["events"], "state": ep["state"], "control": ep["control"]}}))
    log_dir, summary_path, standin_out = tmp / "session", tmp / "summary.json", tmp / "standin.json"
    ctx = zmq.Context.instance()
    # The consumers are up first: whatever the loop published, they would get.
    standin = subprocess.Popen([sys.executable, "-m", "rig_adapters.sim.stimulator_standin", "--events",
                                ep["events"], "--out", str(standin_out)], cwd=ROOT)
    listener = ctx.socket(zmq.SUB)
    listener.setsockopt(zmq.SUBSCRIBE, b"")
    listener.setsockopt(zmq.LINGER, 0)
    listener.connect(ep["events"])
    state = ctx.socket(zmq.SUB)
    state.setsockopt(zmq.SUBSCRIBE, b"")
    state.setsockopt(zmq.LINGER, 0)
    state.connect(ep["state"])
    loop = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.cli", "-v", "run", "--dry-run", "--config", str(cfg), "--model",
         str(model), "--log", str(log_dir), "--summary", str(summary_path), "--idle-wall-s", "3"],
        cwd=ROOT, stderr=subprocess.PIPE, text=True,
    )
    pub = ctx.socket(zmq.XPUB)
    pub.setsockopt(zmq.LINGER, 2000)
    pub.setsockopt(zmq.SNDHWM, 0)
    try:
        pub.bind(ep["rig"])
        # The loop subscribes once its kernels are loaded: about a minute with an empty numba cache.
        assert pub.poll(120_000), "the loop never subscribed to the test rig"
        pub.recv()
        head = [m for m in messages if _t(m) <= 3.0]
        for msg in head:
            pub.send(protocol.encode(msg))
        deadline = time.monotonic() + 10.0
        while not control_request(ep["control"], "arm")["ok"]:
            assert time.monotonic() < deadline, "the loop never armed"
            time.sleep(0.02)
        for i, msg in enumerate(messages[len(head):]):
            pub.send(protocol.encode(msg))
            if i % 500 == 0:
                time.sleep(0.002)
        deadline = time.monotonic() + 60.0
        while (control_request(ep["control"], "status")["status"]["data_time_s"] or 0.0) < SESSION_S - 1.0:
            assert time.monotonic() < deadline, "the loop did not decode the session"
            time.sleep(0.2)
        # The events endpoint is not bound by the loop: this test can bind it itself.
        probe = ctx.socket(zmq.PUB)
        probe.setsockopt(zmq.LINGER, 0)
        try:
            probe.bind(ep["events"])
        finally:
            probe.close()
        state_frames = []
        while state.poll(0):
            state_frames.append(msgpack.unpackb(state.recv()))
        nothing_heard = not listener.poll(500)
        loop.wait(timeout=60)
    finally:
        pub.close()
        if loop.poll() is None:
            loop.kill()
        standin.terminate()
        standin.wait(timeout=30)
        listener.close()
        state.close()
    stderr = loop.stderr.read()
    assert loop.returncode == 0, stderr[-3000:]
    assert "dry run: no events socket" in stderr
    # No actionable event reached either consumer.
    assert nothing_heard
    assert json.loads(standin_out.read_text()) == []
    # The session's decoding did make events: the summary, the log and the state stream say so.
    summary = json.loads(summary_path.read_text())
    fired = summary["triggers"]["count"]
    assert fired >= 1
    assert (summary["triggers"]["dry_run"], summary["triggers"]["published"]) == (True, 0)
    assert summary["triggers"]["withheld"] == fired
    assert stderr.count("dry run: event") == fired
    log = read_log(log_dir)
    withheld = [r for r in log.records if r.type == "output" and r.channel == CHANNEL_DRY_RUN_EVENTS]
    assert len(withheld) == fired
    assert not [r for r in log.records if r.channel == CHANNEL_EVENTS]
    assert state_frames and all(f["stats"]["dry_run"] == 1 for f in state_frames if "stats" in f)
    # A replay of the dry run's log fires the same events (the replay publishes nothing either).
    assert replay_session(log_dir).summary["triggers"]["count"] == fired


def test_a_dry_run_loop_takes_no_ttl_line():
    config = parse_config(tomli_w.dumps(BASE))
    line = TtlLine("loop://")
    try:
        with pytest.raises(ValueError, match="a dry run drives no TTL line"):
            LiveLoop(config, Pipeline(config), ttl=line, dry_run=True)
    finally:
        line.close()
