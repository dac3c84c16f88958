"""A marks-only session's model file starts a live run: ``placeloop run --model`` and ``load_model``.

A rig that sends only marked spikes (no unit ids at all) learns a model
whose place part has no units; its file holds the mark model. Such a file
must start or resume a session that decodes the marks, through the real
``placeloop run`` process with real ZeroMQ sockets on 127.0.0.1 and through
the control socket's ``load_model``, and be refused with a sentence where it
cannot decode (``[marks]`` not enabled). The replay of the live run's log
reproduces its digest. Sessions are the simulated rig's (invented tetrodes,
for plumbing only); the one figure of merit is a sanity bound.
"""

import dataclasses
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import zmq
from loop_helpers import control_request

from decoder.config import parse_config
from decoder.encoding.place_model import PlaceModel
from decoder.messages import SpikeBatch
from decoder.session.pipeline import Pipeline
from decoder.session.steps import model_problem
from rig_adapters.console import EXIT_FILE
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import Ingest

ROOT = Path(__file__).resolve().parent.parent

BASE = {
    "environment": {"kind": "rectangle", "width_cm": 60.0, "height_cm": 60.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "marks": {"enabled": True},
    "decoder": {"method": "filter", "step_s": 0.02, "prior": "state_space"},
    "sources": {"truth": "truth"},
    "safety": {"refractory_s": 2.0, "max_per_minute": 20, "max_per_session": 100, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [45.0, 45.0], "radius_cm": 10.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 30, "n_grid_cells": 0, "n_nonspatial_cells": 4, "units_per_tetrode": 6,
                   "marks": {"send": "marks"}},
}

LEARN_S, DECODE_FROM_S, SESSION_S = 50.0, 55.0, 80.0


def _t(msg):
    t = getattr(msg, "t_s", None)
    if t is None:
        return -1.0
    return float(np.max(t)) if np.ndim(t) and np.size(t) else (float(t) if np.ndim(t) == 0 else -1.0)


@pytest.fixture(scope="module")
def marks_only(tmp_path_factory):
    """The model file of a session whose rig sent marks only, and the rest of that session's messages."""
    tmp = tmp_path_factory.mktemp("marks_run")
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": LEARN_S, "cross_validate": False}}))
    sim = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=4)
    messages = list(sim.messages(until_s=SESSION_S))
    assert not any(isinstance(m, SpikeBatch) for m in messages)   # no unit id ever reaches the loop
    pipeline = Pipeline(learn)
    for msg in messages:
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    assert pipeline.model.unit_ids_.size == 0 and pipeline.model.mark_model_ is not None
    model = tmp / "marks_model.npz"
    pipeline.model.save(model)
    # What a rig sends to a loop started later: its announcements, then its data from then on.
    resumed = [m for m in messages if _t(m) < 0 or _t(m) > DECODE_FROM_S]
    return tmp, model, resumed


def _ports_config(tmp, marks_enabled=True):
    ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
    ep = {k: f"tcp://127.0.0.1:{p}" for k, p in ports.items()}
    doc = {**BASE, "marks": {"enabled": marks_enabled},
           "endpoints": {"rig": [ep["rig"]], "events": ep["events"], "state": ep["state"], "control": ep["control"]}}
    cfg = tmp / ("run.toml" if marks_enabled else "run_no_marks.toml")
    cfg.write_text(tomli_w.dumps(doc))
    return cfg, ep


def test_placeloop_run_decodes_marks_from_a_marks_only_model_file_and_its_replay_matches(marks_only):
    tmp, model, messages = marks_only
    cfg, ep = _ports_config(tmp)
    log_dir, summary_path = tmp / "session", tmp / "summary.json"
    loop = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.cli", "-v", "run", "--dry-run", "--config", str(cfg), "--model",
         str(model), "--log", str(log_dir), "--summary", str(summary_path), "--idle-wall-s", "3"],
        cwd=ROOT, stderr=subprocess.PIPE, text=True,
    )
    pub = zmq.Context.instance().socket(zmq.XPUB)
    pub.setsockopt(zmq.LINGER, 2000)
    pub.setsockopt(zmq.SNDHWM, 0)
    try:
        pub.bind(ep["rig"])
        # The loop subscribes once its kernels are loaded: about a minute with an empty numba cache.
        assert pub.poll(120_000), "the loop never subscribed to the test rig"
        pub.recv()
        status = control_request(ep["control"], "status")["status"]
        assert status["state"] == "decoding"
        for i, msg in enumerate(messages):
            pub.send(protocol.encode(msg))
            if i % 500 == 0:
                time.sleep(0.002)
        deadline = time.monotonic() + 60.0
        while (status["data_time_s"] or 0.0) < SESSION_S - 1.0:
            assert time.monotonic() < deadline, "the loop did not decode the session"
            time.sleep(0.2)
            status = control_request(ep["control"], "status")["status"]
        loop.wait(timeout=60)
    finally:
        pub.close()
        if loop.poll() is None:
            loop.kill()
    stderr = loop.stderr.read()
    assert loop.returncode == 0, stderr[-3000:]
    live = json.loads(summary_path.read_text())
    # Every step of the decoded part closes: (SESSION_S - DECODE_FROM_S) / step_s = 1250, less the lateness at the end.
    assert live["decode"]["steps"] > 1200
    # Sanity bound on invented data: far better than chance in a 60 cm arena (~25 cm).
    assert live["decode"]["median_error_cm"] < 12.0
    assert status["counters"]["mark_unknown_group"] == 0 and live["input"]["bad_messages"] == 0
    # The replay's promise for a clusterless session: the live run's digest, from its log and initial model.
    replay = replay_session(log_dir).summary
    assert replay["decode"]["digest"] == live["decode"]["digest"]
    assert replay["decode"]["steps"] == live["decode"]["steps"]


def test_placeloop_run_refuses_a_marks_only_model_where_marks_are_not_enabled(marks_only):
    tmp, model, _ = marks_only
    cfg, _ = _ports_config(tmp, marks_enabled=False)
    proc = subprocess.run([sys.executable, "-m", "rig_adapters.cli", "run", "--dry-run", "--config", str(cfg),
                           "--model", str(model), "--idle-wall-s", "1"],
                          cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == EXIT_FILE, proc.stderr[-2000:]
    assert "decodes from waveform marks only" in proc.stderr and "[marks]" in proc.stderr


def test_load_model_takes_a_marks_only_file_and_says_why_where_it_cannot(marks_only):
    tmp, model, messages = marks_only
    config = parse_config(tomli_w.dumps(BASE))
    ingest = Ingest(Pipeline(config))
    outputs, reply = ingest.control(protocol.decode_control_request(
        protocol.encode_control_request("load_model", {"path": str(model)})))
    assert reply["ok"], reply
    pipeline = ingest.pipeline
    assert pipeline.state == "decoding" and pipeline.steps.n_units == 0 and pipeline.steps.marks is not None
    decoded = [o for m in messages for o in ingest.rig_bytes(protocol.encode(m)) if hasattr(o, "error_cm")]
    assert len(decoded) > 1200
    # Sanity bound on invented data, as above.
    assert np.nanmedian([o.error_cm for o in decoded]) < 12.0

    plain = dataclasses.replace(config, marks=dataclasses.replace(config.marks, enabled=False))
    refusing = Ingest(Pipeline(plain))
    _, reply = refusing.control(protocol.decode_control_request(
        protocol.encode_control_request("load_model", {"path": str(model)})))
    assert (reply["ok"], reply["reason"]) == (False, "bad_model")
    assert "decodes from waveform marks only" in reply["error"] and "set enabled = true under [marks]" in \
        reply["error"] and reply["error"].endswith("the model in use is unchanged")
    assert refusing.pipeline.state == "idle"

    # A file with neither units nor a mark model has nothing to decode from, whatever the config.
    empty = PlaceModel.load(model)
    empty.mark_model_ = None
    assert model_problem(empty, config.environment, True).startswith(
        "the model has no units and no mark model, so it has nothing to decode from")
    # The units' checks read as before.
    assert model_problem(PlaceModel(config.environment), config.environment, True).startswith(
        "the model was never fitted")


def test_placeloop_replay_refuses_a_model_that_cannot_decode_its_session(marks_only, tmp_path):
    from rig_adapters.sim.recording import record_simulated_session

    tmp, model, _ = marks_only
    plain = parse_config(tomli_w.dumps({**BASE, "marks": {"enabled": False}, "session": {"learn_s": 0.0}}))
    log = record_simulated_session(plain, tmp_path / "log", until_s=5.0, seed=2)
    proc = subprocess.run([sys.executable, "-m", "rig_adapters.cli", "replay", str(log), "--model", str(model)],
                          cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == EXIT_FILE, proc.stderr[-2000:]
    assert "decodes from waveform marks only" in proc.stderr
