"""The live loop end to end: real processes, real ZeroMQ sockets on 127.0.0.1, real files.

A test rig publishes a simulated session (invented data, for plumbing only)
into ``placeloop run`` as a separate process, mixing in bad input of every
kind. The loop must count and log each bad message, never crash, never fire
while disarmed or far from the zone, and record every frame it received.
"""

import json
import os
import signal
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
from decoder.messages import SourceAnnounce, SpikeBatch, TrackerFrames
from decoder.session.pipeline import Pipeline
from rig_adapters.sessions.recorder import read_log
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire import protocol

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def rig_setup(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("live")
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": 100.0, "cross_validate": False}}))
    session = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=5)
    messages = list(session.messages(until_s=140.0))
    pipeline = Pipeline(learn)
    for msg in messages:
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    model = tmp / "model.npz"
    pipeline.model.save(model)
    return tmp, model, messages


def _wait_for_subscriber(xpub, timeout_s=120.0):
    # The loop subscribes once its kernels are loaded: about a minute where the numba cache is empty.
    if not xpub.poll(int(timeout_s * 1000)):
        raise AssertionError("the loop never subscribed to the test rig")
    xpub.recv()


def _bind_again(sock, endpoint, timeout_s=10.0):
    """Bind where a closed socket was; ZeroMQ releases the port asynchronously."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            sock.bind(endpoint)
            return
        except zmq.ZMQError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.1)


def _bad_frames():
    """(bytes, reason) pairs: every way a rig can send nonsense."""
    good_spikes = protocol.encode(SpikeBatch("ephys", 10**6, [1.0], [101]))
    unpacked = msgpack.unpackb(good_spikes)
    wrong_version = msgpack.packb({**unpacked, "v": 99})
    missing = msgpack.packb({k: v for k, v in unpacked.items() if k != "t"})
    wrong_type = msgpack.packb({**unpacked, "t": "soon"})
    mismatched = msgpack.packb({**unpacked, "t": np.array([1.0, 2.0]).tobytes()})
    nan_time = msgpack.packb({**unpacked, "t": np.array([np.nan]).tobytes()})
    huge = msgpack.packb({**unpacked, "t": np.zeros(10**6).tobytes(), "u": np.zeros(10**6, "<i4").tobytes()})
    inf_frame = msgpack.packb({"v": 1, "k": "frames", "src": "tracker", "seq": 10**6, "t": [1.0],
                               "x": [float("inf")], "y": [1.0]})
    return [
        # 0xc1 is the one byte the MessagePack specification never uses: not a value, whatever follows.
        (b"\xc1" + os.urandom(63), "not_msgpack"),
        (msgpack.packb([1, 2, 3]), "not_a_map"),
        (wrong_version, "bad_version"),
        (msgpack.packb({"v": 1, "k": "teleport", "src": "ephys", "seq": 1}), "unknown_kind"),
        (missing, "missing_field"),
        (wrong_type, None),
        (mismatched, None),
        (nan_time, None),
        (huge, "oversized"),
        (inf_frame, None),
        (protocol.encode_control_request("arm", source="ephys", seq=10**6), "unknown_kind"),
        # About 1 KB each, nested 1000 lists deep: the codec must not take the loop down with it.
        *((msgpack.packb({**unpacked, key: _deep_list()}), None) for key in ("v", "k", "src", "seq")),
    ]


def _deep_list(depth=1000):
    x = []
    for _ in range(depth):
        x = [x]
    return x


def test_live_loop_survives_bad_input_and_records_everything(rig_setup):
    tmp, model, messages = rig_setup
    ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
    doc = {**BASE, "endpoints": {
        "rig": [f"tcp://127.0.0.1:{ports['rig']}"],
        "events": f"tcp://127.0.0.1:{ports['events']}",
        "state": f"tcp://127.0.0.1:{ports['state']}",
        "control": f"tcp://127.0.0.1:{ports['control']}",
    }}
    cfg = tmp / "live.toml"
    cfg.write_text(tomli_w.dumps(doc))
    log_dir = tmp / "session"
    summary_path = tmp / "summary.json"
    loop = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.cli", "-v", "run", "--config", str(cfg), "--model", str(model),
         "--log", str(log_dir), "--summary", str(summary_path), "--idle-wall-s", "120"],
        cwd=ROOT, stderr=subprocess.PIPE, text=True,
    )
    ctx = zmq.Context.instance()
    control = f"tcp://127.0.0.1:{ports['control']}"
    events = ctx.socket(zmq.SUB)
    events.setsockopt(zmq.SUBSCRIBE, b"")
    events.setsockopt(zmq.LINGER, 0)
    events.connect(f"tcp://127.0.0.1:{ports['events']}")
    sent = 0
    bad = _bad_frames()
    try:
        pub = ctx.socket(zmq.XPUB)
        pub.setsockopt(zmq.LINGER, 2000)
        pub.setsockopt(zmq.SNDHWM, 0)
        pub.bind(f"tcp://127.0.0.1:{ports['rig']}")
        _wait_for_subscriber(pub)
        first = [m for m in messages if _t(m) <= 20.0]
        second = [m for m in messages if 20.0 < _t(m) <= 30.0]
        for i, msg in enumerate(first):
            pub.send(protocol.encode(msg))
            sent += 1
            if i % 400 == 0 and i // 400 < len(bad):
                pub.send(bad[i // 400][0])
                sent += 1
            if i % 200 == 0:
                time.sleep(0.005)
        while i // 400 + 1 < len(bad):
            i += 400
            pub.send(bad[i // 400][0])
            sent += 1
        reply = control_request(control, "arm")
        assert reply["ok"], reply
        for msg in second[: len(second) // 2]:
            pub.send(protocol.encode(msg))
            sent += 1
        # The rig goes quiet for longer than the stall limit (1 s): the loop must disarm.
        # Polled, because on a loaded machine the loop may still be draining the burst.
        deadline = time.monotonic() + 20.0
        while True:
            time.sleep(0.5)
            status = control_request(control, "status")["status"]
            if status["armed"] is False or time.monotonic() > deadline:
                break
        assert status["armed"] is False
        assert status["triggers"]["disarm_reason"] == "stall"
        # The same by hand: `placeloop control status` is a REQ client of the same socket.
        by_hand = subprocess.run([sys.executable, "-m", "rig_adapters.cli", "control", "status", "--endpoint",
                                  control], cwd=ROOT, capture_output=True, text=True, timeout=60)
        assert by_hand.returncode == 0, by_hand.stderr
        assert json.loads(by_hand.stdout)["status"]["triggers"]["disarm_reason"] == "stall"
        # A publisher that restarts: a new socket on the same port, sequence numbers from 0.
        pub.close()
        pub = ctx.socket(zmq.XPUB)
        pub.setsockopt(zmq.LINGER, 2000)
        _bind_again(pub, f"tcp://127.0.0.1:{ports['rig']}")
        _wait_for_subscriber(pub)
        pub.send(protocol.encode(SourceAnnounce("ephys", 0, "spikes", "acquisition", 30000.0, [101, 102])))
        sent += 1
        pub.send(protocol.encode(SpikeBatch("ephys", 1, [25.0, 25.1], [101, 424242])))
        sent += 1
        pub.send(protocol.encode(TrackerFrames("tracker", 10**6, [25.0], [[np.nan, np.nan]])))
        sent += 1
        # Stopped by signal once the last frame is in, not by an idle timeout: on a loaded
        # machine `placeloop control` above may take longer to start than any short timeout.
        deadline = time.monotonic() + 30.0
        while control_request(control, "status")["status"]["sources"].get("tracker", {}).get("last_seq") != 10**6:
            assert time.monotonic() < deadline, "the loop never took the last frame"
            time.sleep(0.2)
        pub.close()
        loop.send_signal(signal.SIGTERM)
        loop.wait(timeout=60)
    finally:
        if loop.poll() is None:
            loop.kill()
        events.close()
    stderr = loop.stderr.read()
    assert loop.returncode == 0, stderr[-3000:]
    # The kernels were loaded before the sockets opened, not at the first decoded step.
    assert "kernels ready in" in stderr
    summary = json.loads(summary_path.read_text())
    reasons = summary["input"]["bad_reasons"]
    for _, reason in bad:
        if reason is not None:
            assert reasons.get(reason, 0) >= 1, (reason, reasons)
    assert summary["input"]["bad_messages"] == len(bad)
    # The status polls were answered without a sequence number: no gap on the control stream.
    assert summary["input"]["sources"]["control"]["gaps"] == 0
    # Rejected frames whose envelope was readable are counted for their source, apart from gaps:
    # the ones numbered 10**6 took that number, and the next good frame carried on from before it.
    sources = summary["input"]["sources"]
    assert sources["ephys"]["rejected"] >= 5 and sources["tracker"]["rejected"] == 1
    assert sources["ephys"]["gaps"] < 1000 and sources["ephys"]["resyncs"] >= 1
    assert summary["input"]["control_refused"] == {}
    # Each bad message is logged with its reason.
    assert stderr.count("bad rig message") + stderr.count("refused a control command") == len(bad)
    assert summary["input"]["unknown_units"] >= 1
    # Nothing triggered while the animal was far from the zone.
    assert summary["triggers"]["false_count"] == 0
    # Nothing recorded was lost: every frame sent is in the log, in order.
    log = read_log(log_dir)
    assert log.clean_close
    rig_records = [r for r in log.records if r.type == "input" and r.channel == "rig"]
    assert len(rig_records) == sent
    assert (log_dir / "config.toml").exists() and (log_dir / "initial_model.npz").exists()


def _t(msg):
    t = getattr(msg, "t_s", None)
    if t is None:
        return -1.0
    return float(np.max(t)) if np.ndim(t) and np.size(t) else (float(t) if np.ndim(t) == 0 else -1.0)
