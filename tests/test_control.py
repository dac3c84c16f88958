"""The control socket: every request gets one reply and none ends the loop.

A real loop (rig_adapters.live.loop.LiveLoop) runs in a thread with real
ZeroMQ sockets on 127.0.0.1; each bad request goes through a real REQ
socket, and a ``status`` request afterwards proves the loop still answers.
The model files are real files written by PlaceModel.save; their trajectory
and spikes are invented, for plumbing only: these tests check refusals and
the socket's behaviour, not decoding.
"""

import os
import threading
import time

import msgpack
import numpy as np
import pytest
import tomli_w
import zmq

from decoder.config import parse_config
from decoder.encoding.place_model import PlaceModel
from decoder.session.pipeline import Pipeline
from decoder.space.environments import Arena
from rig_adapters.live.loop import CONTROL_MAXMSGSIZE, LiveLoop
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import MAX_CONTROL_BYTES

ARENA = {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0}
BASE = {
    "environment": ARENA,
    "decoder": {"window_s": 0.25, "step_s": 0.025, "prior": "state_space", "random_walk_sd_cm": 4.0},
    "safety": {"refractory_s": 2.0, "max_per_minute": 20, "max_per_session": 100, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 12.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
}


def _config(ports):
    doc = {**BASE, "endpoints": {
        "rig": [f"tcp://127.0.0.1:{ports['rig']}"],
        "events": f"tcp://127.0.0.1:{ports['events']}",
        "state": f"tcp://127.0.0.1:{ports['state']}",
        "control": f"tcp://127.0.0.1:{ports['control']}",
    }}
    return parse_config(tomli_w.dumps(doc))


def _ports():
    return {k: free_loopback_port() for k in ("rig", "events", "state", "control")}


def _model(env, fitted=True):
    """A place model from a lap-by-lap sweep of the arena with three units (invented, plumbing only)."""
    fps = 30.0
    t = np.arange(0.0, 60.0, 1 / fps)
    x_lo, y_lo = env.x_edges_cm[0], env.y_edges_cm[0]
    width, height = env.x_edges_cm[-1] - x_lo, env.y_edges_cm[-1] - y_lo
    # A boustrophedon sweep at about 20 cm/s, so every bin is visited.
    rows = 10
    s = (t * 20.0) % (rows * width)
    row = (s // width).astype(int)
    along = s % width
    x = x_lo + np.where(row % 2 == 0, along, width - along)
    y = y_lo + (row + 0.5) * height / rows
    xy = np.column_stack([np.clip(x, x_lo + 0.1, x_lo + width - 0.1), y])
    model = PlaceModel(env, smooth_cm=4.0, min_occupancy_s=0.0, cv_folds=2, cv_block_s=20.0, unit_ids=[1, 2, 3])
    model.update_frames(t, xy)
    spike_t = np.arange(0.0, 59.0, 0.05)
    model.update_spikes(spike_t, np.arange(spike_t.size) % 3 + 1)
    return model.fit() if fitted else model


@pytest.fixture(scope="module")
def model_files(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("models")
    env = Arena.rectangle(width_cm=80.0, height_cm=80.0, bin_cm=4.0)
    paths = {}
    for name, model in {
        "good": _model(env),
        "other_arena": _model(Arena.rectangle(width_cm=100.0, height_cm=60.0, bin_cm=4.0)),
        "other_bins": _model(Arena.rectangle(width_cm=80.0, height_cm=80.0, bin_cm=5.0)),
        "unfitted": _model(env, fitted=False),
    }.items():
        paths[name] = tmp / f"{name}.npz"
        model.save(paths[name])
    paths["garbage"] = tmp / "garbage.npz"
    paths["garbage"].write_bytes(os.urandom(2000))
    paths["truncated"] = tmp / "truncated.npz"
    paths["truncated"].write_bytes(paths["good"].read_bytes()[:3000])
    paths["other_npz"] = tmp / "other.npz"
    np.savez(paths["other_npz"], a=np.arange(3))
    paths["fifo"] = tmp / "model.fifo"
    os.mkfifo(paths["fifo"])
    paths["directory"] = tmp
    paths["missing"] = tmp / "no_such_model.npz"
    return paths


@pytest.fixture(scope="module")
def running_loop(model_files):
    ports = _ports()
    config = _config(ports)
    loop = LiveLoop(config, Pipeline(config, model=PlaceModel.load(model_files["good"])), publish_state=False)
    thread = threading.Thread(target=loop.run, daemon=True)
    thread.start()
    endpoint = f"tcp://127.0.0.1:{ports['control']}"
    assert _send(endpoint, protocol.encode_control_request("status"))["ok"]
    yield loop, endpoint
    loop.stop_requested = True
    thread.join(timeout=10)
    assert not thread.is_alive()


def _send(endpoint, *parts, timeout_ms=10_000):
    """One request (one or more frames) through a fresh REQ socket; the decoded reply."""
    req = zmq.Context.instance().socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.setsockopt(zmq.RCVTIMEO, timeout_ms)
    try:
        req.connect(endpoint)
        req.send_multipart(list(parts))
        return protocol.decode_control_reply(req.recv())
    finally:
        req.close()


def _status(endpoint):
    reply = _send(endpoint, protocol.encode_control_request("status"))
    assert reply["ok"], reply
    return reply["status"]


def _request(cmd, args=None, **envelope):
    m = {"v": 1, "k": "control", "src": "script", "seq": 0, "cmd": cmd, **envelope}
    if args is not None:
        m["args"] = args
    return msgpack.packb(m)


def _deep(depth=1000):
    x = []
    for _ in range(depth):
        x = [x]
    return x


LOAD_MODEL_REFUSALS = [
    ("other_arena", "another environment"),
    ("other_bins", "bins are 5.0 cm"),
    ("unfitted", "never fitted"),
    ("garbage", "not a placeloop place-model file"),
    ("truncated", "truncated or damaged"),
    ("other_npz", "not a placeloop place-model file"),
    ("fifo", "not a regular file"),
    ("directory", "not a regular file"),
    ("missing", "cannot read the model file"),
]


@pytest.mark.parametrize("name, why", LOAD_MODEL_REFUSALS, ids=[n for n, _ in LOAD_MODEL_REFUSALS])
def test_a_refused_model_file_leaves_the_installed_model(running_loop, model_files, name, why):
    loop, endpoint = running_loop
    before = loop.pipeline.model
    started = time.monotonic()
    reply = _send(endpoint, protocol.encode_control_request("load_model", {"path": str(model_files[name])}))
    assert reply["ok"] is False and reply["reason"] == "bad_model", reply
    assert why in reply["error"], reply["error"]
    # A FIFO is refused at once: opening a FIFO for reading blocks until a writer opens it
    # (POSIX open(); Linux fifo(7) man page, from memory).
    assert time.monotonic() - started < 5.0
    assert loop.pipeline.model is before
    assert _status(endpoint)["state"] == "decoding"


BAD_ARGUMENTS = [
    ("load_model", {"path": 7}, "path must be a str"),
    ("load_model", {"path": ["a", "b"]}, "args must map names to plain values"),
    ("load_model", {"path": True}, "path must be a str"),
    ("load_model", {"path": {"x": 1}}, "args must map names to plain values"),
    ("load_model", {"path": None}, "path must be a str"),
    ("load_model", {"path": 1.5}, "path must be a str"),
    ("load_model", {"path": _deep(50)}, "args must map names to plain values"),
    ("load_model", {"path": ""}, "needs path"),
    ("load_model", {}, "needs path"),
    ("load_model", {"path": "/x", "mode": "fast"}, "takes path"),
    ("disarm", {"reason": 3}, "reason must be a str"),
    ("disarm", {"reason": ["operator"]}, "args must map names to plain values"),
    ("disarm", {"why": "x"}, "takes reason"),
    ("stall", {"stream": 5}, "stream must be a str"),
    ("arm", {"force": True}, "takes no arguments"),
    ("fit", {"now": 1}, "takes no arguments"),
    ("start_learning", {"s": 1}, "takes no arguments"),
    ("stop_learning", {"s": 1}, "takes no arguments"),
    ("status", {"verbose": 1}, "takes no arguments"),
]


@pytest.mark.parametrize("cmd, args, why", BAD_ARGUMENTS)
def test_every_command_refuses_bad_arguments(running_loop, cmd, args, why):
    loop, endpoint = running_loop
    before = (loop.pipeline.model, loop.pipeline.state, loop.pipeline.bank.armed)
    reply = _send(endpoint, _request(cmd, args))
    # A list or map as an argument is refused by the wire codec (PROTOCOL.md section 5: plain values only)
    # before the command's own argument table sees it.
    expected = "unreadable" if "plain values" in why else "bad_argument"
    assert reply["ok"] is False and reply["reason"] == expected, reply
    assert why in reply["error"], reply["error"]
    assert (loop.pipeline.model, loop.pipeline.state, loop.pipeline.bank.armed) == before
    assert _status(endpoint)["state"] == "decoding"


UNREADABLE = {
    "not_msgpack": b"\xc1\xc1\xc1",
    "not_a_map": msgpack.packb([1, 2, 3]),
    "unknown_command": _request("launch"),
    "wrong_kind": msgpack.packb({"v": 1, "k": "spikes", "src": "s", "seq": 0, "t": [1.0], "u": [1]}),
    "args_not_a_map": _request("status", [1, 2]),
    "args_int_keys": _request("status", {1: 2}),
    "deep_v": msgpack.packb({"v": _deep(), "k": "control", "src": "s", "seq": 0, "cmd": "status"}),
    "deep_k": msgpack.packb({"v": 1, "k": _deep(), "src": "s", "seq": 0, "cmd": "status"}),
    "deep_src": _request("status", src=_deep()),
    "deep_seq": _request("status", seq=_deep()),
    "deep_cmd": msgpack.packb({"v": 1, "k": "control", "src": "s", "seq": 0, "cmd": _deep()}),
    "deep_args": _request("load_model", {"path": _deep()}),
    "negative_seq": _request("status", seq=-1),
}


@pytest.mark.parametrize("name", list(UNREADABLE))
def test_an_unreadable_request_is_refused_with_a_reason(running_loop, name):
    loop, endpoint = running_loop
    before = dict(loop.ingest.control_refused)
    bad_input_before = loop.pipeline.counters["bad_messages"]
    reply = _send(endpoint, UNREADABLE[name])
    assert reply["ok"] is False and reply["reason"] in ("unreadable", "bad_argument"), reply
    assert len(reply["error"]) < 1000
    # Counted as a refused request, not as bad input data.
    assert sum(loop.ingest.control_refused.values()) == sum(before.values()) + 1
    assert loop.pipeline.counters["bad_messages"] == bad_input_before
    assert _status(endpoint)["state"] == "decoding"


def test_multipart_and_oversized_requests_are_refused(running_loop):
    loop, endpoint = running_loop
    status = protocol.encode_control_request("status")
    reply = _send(endpoint, status, status)
    assert (reply["ok"], reply["reason"]) == (False, "multipart") and "2 parts" in reply["error"]
    # REQ strips nothing but its own delimiter, so REP sees both frames (ZeroMQ guide, REQ/REP envelopes).
    reply = _send(endpoint, b"", status)
    assert (reply["ok"], reply["reason"]) == (False, "multipart")
    big = _request("status", {"pad": "x" * 4000}, pad=[b"y" * 1000] * 70)
    assert MAX_CONTROL_BYTES < len(big) < CONTROL_MAXMSGSIZE
    reply = _send(endpoint, big)
    assert (reply["ok"], reply["reason"]) == (False, "oversized") and str(MAX_CONTROL_BYTES) in reply["error"]
    # Over the transport's limit ZeroMQ drops the requester unanswered: "if a peer sends a message
    # larger than ZMQ_MAXMSGSIZE it is disconnected" (libzmq zmq_setsockopt docs, from memory;
    # PROTOCOL.md section 6 promises the same).
    with pytest.raises(zmq.Again):
        _send(endpoint, b"z" * (CONTROL_MAXMSGSIZE + 1), timeout_ms=1000)
    status = _status(endpoint)
    assert status["control"]["refused"]["multipart"] >= 2
    assert status["control"]["refused"]["oversized"] >= 1


def test_requests_the_session_refuses_say_why_and_are_counted(running_loop):
    loop, endpoint = running_loop
    before = loop.ingest.control_refused.get("refused", 0)
    # No spike data has come yet, so the loop cannot arm.
    reply = _send(endpoint, protocol.encode_control_request("arm"))
    assert reply["ok"] is False and "no spike data" in reply["error"]
    assert loop.ingest.control_refused["refused"] == before + 1
    assert loop.pipeline.bank.armed is False


def test_a_good_model_is_installed_and_control_requests_are_no_sequence_gaps(running_loop, model_files):
    loop, endpoint = running_loop
    before = loop.pipeline.model
    reply = _send(endpoint, protocol.encode_control_request("load_model", {"path": str(model_files["good"])}))
    assert reply["ok"], reply
    assert loop.pipeline.model is not before and loop.pipeline.model_is_loaded
    for i in range(12):
        _send(endpoint, protocol.encode_control_request("disarm" if i % 4 == 0 else "status", seq=i))
    status = _status(endpoint)
    # Status polls, model loads and refused requests take no sequence number on the
    # session's control stream (common practice: a gap means a lost message).
    assert status["sources"]["control"]["gaps"] == 0
    assert sum(h["gaps"] for h in status["sources"].values()) == 0


def test_a_failed_bind_closes_the_sockets_opened_before_it(running_loop):
    loop, endpoint = running_loop
    port = int(endpoint.rsplit(":", 1)[1])
    ports = {**_ports(), "control": port}
    config = _config(ports)
    second = LiveLoop(config, Pipeline(config))
    with pytest.raises(OSError, match=rf"cannot bind the control socket to tcp://127.0.0.1:{port}"):
        second.run(duration_s=1.0)
    # The events and state ports the second loop bound first are free again.
    ctx = zmq.Context.instance()
    for name in ("events", "state"):
        sock = ctx.socket(zmq.PUB)
        sock.setsockopt(zmq.LINGER, 0)
        try:
            deadline = time.monotonic() + 5.0
            while True:
                try:
                    sock.bind(f"tcp://127.0.0.1:{ports[name]}")
                    break
                except zmq.ZMQError:
                    # ZeroMQ releases a closed socket's port asynchronously.
                    assert time.monotonic() < deadline, f"the {name} port stayed bound"
                    time.sleep(0.05)
        finally:
            sock.close()
    # The first loop still answers.
    assert _status(endpoint)["state"] == "decoding"


@pytest.mark.parametrize("kind", ["heartbeat", "control_kind", "rejected"])
def test_a_rig_frame_under_the_control_stream_name_cannot_make_a_command_stale(kind):
    # Issue 17's fault probe: two rig frames named "control" numbered 10**6 and 10**6 + 1 took the
    # control stream's numbers, and the operator's next disarm was dropped as stale while its
    # reply said ok. The name is the stream ingest numbers commands on; a rig may not use it.
    from decoder.messages import Heartbeat
    from rig_adapters.wire.ingest import Ingest

    ingest = Ingest(Pipeline(_config(_ports())))
    for seq in (10**6, 10**6 + 1):
        if kind == "heartbeat":
            frame = protocol.encode(Heartbeat("control", seq, 1.0))
        elif kind == "control_kind":
            frame = protocol.encode_control_request("arm", source="control", seq=seq)
        else:
            frame = msgpack.packb({"v": 1, "k": "heartbeat", "src": "control", "seq": seq, "t": "soon"})
        ingest.rig_bytes(frame)
    assert ingest.pipeline.counters["bad_messages"] == 2
    outputs, reply = ingest.control_bytes(protocol.encode_control_request("disarm", {"reason": "operator"}))
    assert reply["ok"] and [o.kind for o in outputs] == ["disarmed"]
    assert ingest.pipeline.health.sources["control"].stale == 0
