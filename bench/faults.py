"""The fault probe: hostile input, bad commands, crashes, restarts, stalls and floods against the real loop.

    python bench/faults.py --json out/faults.json [--quick] [--seed 3]

Every part runs ``placeloop run`` as a process of its own, with real ZeroMQ
sockets on 127.0.0.1 only, decoding with a model fitted in this process first
on a simulated session (invented data). The bench plays the rig (an XPUB
socket, so that it knows when the loop has subscribed), the experiment
script (REQ on the control socket) and the consumers (SUB on the events and
state sockets).

1. **fuzz**: a valid simulated session, armed, with hostile frames
   interleaved (bench/fault_frames.py: hypothesis-built maps, random bytes,
   mutated real frames, broken copies of the session's own frames under its
   own sources, valid frames from thousands of invented sources). Sending is
   paced on the loop's own status counters so that no frame is dropped by a
   high-water mark: every frame sent must be counted, accepted or rejected
   (``fuzz_uncounted`` = sent - counted). Events are compared with a
   reference: the same valid session and the same arm request fed through
   the same ``Ingest`` and ``Pipeline`` in this process, without the fuzz
   (``fuzz_false_events`` = events not in the reference).
2. **control**: every control command with bad arguments, bad envelopes,
   model files that cannot be used, multipart and oversized requests, and
   hypothesis-built requests; a case crashes if the loop dies or does not
   answer (``control_crashes``).
3. **kill -9** during recording at real time, ``--kill-runs`` times; the log
   left behind is read (``read_log``) and replayed (``replay_session``);
   ``kill9_lost_s_max`` is the data time sent before the kill minus the data
   time the replay recovered, against the recorder's flush interval plus one
   step.
4. **restart**: the rig's publisher closes and binds again, starting its
   numbers and its clock from zero without waiting for the loop to
   reconnect; ``restart_recovery_s_max`` is the wall time from its first
   message to the first state frame of a step on its new clock.
5. **stall**: the rig goes silent while armed; ``stall_disarm_s`` is the wall
   time from its last message to the status showing the triggers disarmed.
6. **flood**: ten times the session's message rate (every message sent ten
   times over, as copies from invented sources), drained: all counted.
7. **soak**: at least one simulated hour as fast as the loop takes it;
   ``soak_rss_growth_pct``: the resident set (``/proc/PID/status``) at the
   end against the first sample after warm-up (a fifth of the run).
8. **dry run** beside a live consumer: ``dry_run_actionable_events`` counts
   events that reached a subscriber of the events endpoint.

Bars (issue 17): no fuzz crash, false event or uncounted frame over at least
100,000 frames; no control crash; at least 20 kill runs all recovered, none
losing more than the flush interval plus one step; recovery after a restart
under 1 s; disarm within the stall limit plus one step; RSS growth under 5 %
over a simulated hour; no actionable event from a dry run.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import msgpack
import numpy as np
import tomli_w
import zmq

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench import fault_frames  # noqa: E402
from decoder.config import parse_config  # noqa: E402
from decoder.encoding.place_model import PlaceModel  # noqa: E402
from decoder.messages import Heartbeat, SpikeBatch  # noqa: E402
from decoder.session.outputs import StepOutput  # noqa: E402
from decoder.session.pipeline import Pipeline  # noqa: E402
from rig_adapters.sessions.log_reader import read_log  # noqa: E402
from rig_adapters.sessions.replay import replay_session  # noqa: E402
from rig_adapters.sim.demo import free_loopback_port  # noqa: E402
from rig_adapters.sim.simulation import SPIKE_SOURCE, SimulatedSession, SimulationSettings  # noqa: E402
from rig_adapters.wire import protocol  # noqa: E402
from rig_adapters.wire.ingest import CONTROL_ARGS, Ingest  # noqa: E402

#: The probe's experiment (invented): a square arena, one goal zone, 60 simulated cells.
BASE = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "decoder": {"window_s": 0.25, "step_s": 0.025, "prior": "state_space", "random_walk_sd_cm": 4.0},
    "sources": {"truth": "truth"},
    "safety": {"refractory_s": 1.0, "max_per_minute": 60, "max_per_session": 100_000, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 14.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 50, "n_grid_cells": 5, "n_nonspatial_cells": 5},
}
SESSION_SOURCES = {"ephys", "tracker", "truth", "control"}

#: How long the loop may take to subscribe: it loads (or, on an empty numba cache, compiles) its kernels first.
SUBSCRIBE_WAIT_S = 300.0

#: Frames the bench lets the loop fall behind by before it waits: far below its RCVHWM of 10**6.
MAX_BACKLOG = 20_000


# ----------------------------------------------------------------- the session and the loop under test

def fit_model(tmp: Path, seed: int) -> Path:
    """Learn 60 simulated seconds in process and save the fitted model (as tests/test_dry_run.py does)."""
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": 60.0, "cross_validate": False}}))
    sim = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=seed)
    pipeline = Pipeline(learn)
    for msg in sim.messages(until_s=90.0):
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    path = tmp / "model.npz"
    pipeline.model.save(path)
    return path


def session_messages(seed: int, until_s: float) -> list:
    config = parse_config(tomli_w.dumps(BASE))
    sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    return list(sim.messages(until_s=until_s))


def spike_time(msg) -> float | None:
    """The data time a spike-stream message carries (s), or None for other messages."""
    if msg.source != SPIKE_SOURCE:
        return None
    if isinstance(msg, SpikeBatch):
        return float(msg.t_s[-1]) if msg.t_s.size else None
    if isinstance(msg, Heartbeat):
        return float(msg.t_s)
    return None


class LoopUnderTest:
    """One ``placeloop run`` process and the bench's sockets around it (all on 127.0.0.1)."""

    def __init__(self, tmp: Path, name: str, model: Path, overrides: dict | None = None, dry_run: bool = False,
                 log: bool = True, idle_exit_s: float = 30.0) -> None:
        self.dir = tmp / name
        self.dir.mkdir()
        self.ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
        self.ep = {k: f"tcp://127.0.0.1:{p}" for k, p in self.ports.items()}
        doc = {**BASE, **(overrides or {}), "endpoints": {
            "rig": [self.ep["rig"]], "events": self.ep["events"], "state": self.ep["state"],
            "control": self.ep["control"]}}
        self.config_path = self.dir / "loop.toml"
        self.config_path.write_text(tomli_w.dumps(doc))
        self.config = parse_config(tomli_w.dumps(doc))
        self.log_dir = self.dir / "session" if log else None
        self.stderr_path = self.dir / "stderr.txt"
        cmd = [sys.executable, "-m", "rig_adapters.cli", "-v", "run", "--config", str(self.config_path),
               "--model", str(model), "--summary", str(self.dir / "summary.json"),
               "--idle-exit-s", str(idle_exit_s)]
        if self.log_dir is not None:
            cmd += ["--log", str(self.log_dir)]
        if dry_run:
            cmd.append("--dry-run")
        self.ctx = zmq.Context.instance()
        self.events_sub = self._sub(self.ep["events"])
        self.state_sub = self._sub(self.ep["state"])
        self.rig = None
        self.bind_rig()
        with open(self.stderr_path, "w") as err:
            self.proc = subprocess.Popen(cmd, cwd=ROOT, stderr=err, stdout=subprocess.DEVNULL)
        self.req = None
        self.sent = 0

    def _sub(self, endpoint: str) -> zmq.Socket:
        sock = self.ctx.socket(zmq.SUB)
        sock.setsockopt(zmq.SUBSCRIBE, b"")
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.RCVHWM, 0)  # the bench keeps every event and state frame it is sent
        sock.connect(endpoint)
        return sock

    def bind_rig(self) -> None:
        """(Re)open the rig's publisher (:meth:`wait_subscribed` waits for the loop)."""
        sock = self.ctx.socket(zmq.XPUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SNDHWM, 0)  # never drop on the bench's side: pacing bounds the queue
        deadline = time.monotonic() + 10.0
        while True:
            try:
                sock.bind(self.ep["rig"])
                break
            except zmq.ZMQError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.05)
        self.rig = sock

    def wait_subscribed(self, timeout_s: float = SUBSCRIBE_WAIT_S) -> None:
        deadline = time.monotonic() + timeout_s
        while not self.rig.poll(200):
            if self.proc.poll() is not None:
                raise RuntimeError(f"the loop exited before subscribing:\n{self.stderr()[-3000:]}")
            if time.monotonic() > deadline:
                raise RuntimeError("the loop never subscribed to the bench's rig")
        self.rig.recv()

    def close_rig(self) -> None:
        self.rig.close(linger=0)
        self.rig = None

    def send(self, payload: bytes) -> None:
        self.rig.send(payload)
        self.sent += 1

    def _socket_for_requests(self) -> zmq.Socket:
        if self.req is None:
            self.req = self.ctx.socket(zmq.REQ)
            self.req.setsockopt(zmq.LINGER, 0)
            self.req.connect(self.ep["control"])
        return self.req

    def raw_request(self, *parts: bytes, timeout_s: float = 10.0) -> dict | None:
        """Send one request (one or more frames); the reply, or None if none came in time."""
        req = self._socket_for_requests()
        req.send_multipart(list(parts))
        if not req.poll(int(timeout_s * 1000)):
            # A REQ socket without its reply takes no further request: start a new one.
            req.close(linger=0)
            self.req = None
            return None
        return protocol.decode_control_reply(req.recv())

    def request(self, command: str, args: dict | None = None) -> dict | None:
        return self.raw_request(protocol.encode_control_request(command, args))

    def status(self) -> dict:
        reply = self.request("status")
        if reply is None or not reply["ok"]:
            raise RuntimeError(f"no status from the loop: {reply}\n{self.stderr()[-3000:]}")
        return reply["status"]

    @staticmethod
    def counted(status: dict) -> int:
        """Rig frames the loop has counted: accepted or stale for a source, or rejected (bad_messages)."""
        by_source = sum(h["messages"] + h["stale"] for name, h in status["sources"].items() if name != "control")
        return by_source + status["counters"]["bad_messages"]

    def wait_counted(self, n: int, timeout_s: float = 120.0) -> int:
        """Wait until the loop has counted ``n`` rig frames (or its count stops moving); the count."""
        deadline = time.monotonic() + timeout_s
        last, still_since = -1, time.monotonic()
        while True:
            counted = self.counted(self.status())
            if counted >= n:
                return counted
            if counted != last:
                last, still_since = counted, time.monotonic()
            elif time.monotonic() - still_since > 5.0 or time.monotonic() > deadline:
                return counted
            time.sleep(0.02)

    def drain(self, sock: zmq.Socket) -> list[dict]:
        out = []
        while sock.poll(0):
            out.append(protocol.decode_output(sock.recv()))
        return out

    def rss_kb(self) -> int:
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
        raise RuntimeError("no VmRSS line in /proc")

    def alive(self) -> bool:
        return self.proc.poll() is None

    def stderr(self) -> str:
        return self.stderr_path.read_text(errors="replace")

    def stop(self, timeout_s: float = 60.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for sock in (self.rig, self.req, self.events_sub, self.state_sub):
            if sock is not None:
                sock.close(linger=0)
        self.rig = self.req = None
        return self.proc.returncode


def paced_send(loop: LoopUnderTest, frames, chunk: int = 2000) -> None:
    """Send every frame, waiting whenever the loop falls :data:`MAX_BACKLOG` frames behind."""
    for i, payload in enumerate(frames):
        loop.send(payload)
        if i % chunk == chunk - 1:
            loop.wait_counted(loop.sent - MAX_BACKLOG)


def event_keys(events) -> list[tuple]:
    """Events by what a stimulator acts on: rule, zone and data time (to the microsecond)."""
    return [(e["rule"], e["zone"], round(float(e["t_s"]), 6)) for e in events]


# ----------------------------------------------------------------- 1. fuzz

def reference_events(config, model: Path, head: list[bytes], rest: list[bytes]) -> list[tuple]:
    """The valid session's events through the same Ingest and Pipeline in this process, armed where the loop was."""
    ingest = Ingest(Pipeline(config, PlaceModel.load(model)))
    events = []
    for payload in head:
        ingest.rig_bytes(payload)
    outputs, reply = ingest.control_bytes(protocol.encode_control_request("arm"))
    assert reply["ok"], reply
    for payload in rest:
        for out in ingest.rig_bytes(payload):
            if isinstance(out, StepOutput):
                events.extend((e.rule, e.zone, round(float(out.t_s), 6)) for e in out.events)
    return events


def fuzz_frames(messages: list, n: int, rng: np.random.Generator, seed: int) -> tuple[list[bytes], dict]:
    """``n`` hostile frames in a shuffled mix, and how many of each kind.

    Hypothesis builds a tenth of them: it takes about 10 ms a frame here, the
    other generators microseconds.
    """
    valid = fault_frames.renamed(messages[:2000])
    templates = [msgpack.unpackb(v, raw=False) for v in valid[:200]]
    parts = {
        "structured": fault_frames.structured_frames(templates, n // 10, seed),
        "random_bytes": fault_frames.random_frames(n * 4 // 10, rng),
        "mutated": fault_frames.mutated_frames(valid, n * 4 // 10, rng),
    }
    # Valid frames from ever new invented sources: the per-source table must stay bounded.
    n_sources = n - sum(len(p) for p in parts.values())
    parts["many_sources"] = [protocol.encode(Heartbeat(f"bogus{i}", 1, 1.0)) for i in range(n_sources)]
    frames = [f for p in parts.values() for f in fault_frames.keep_off_session(p, SESSION_SOURCES)]
    rng.shuffle(frames)
    return frames, {k: len(v) for k, v in parts.items()}


def run_fuzz(tmp: Path, model: Path, n_frames: int, session_s: float, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    messages = session_messages(seed + 100, session_s)
    encoded = [protocol.encode(m) for m in messages]
    n_head = next(i for i, m in enumerate(messages) if (spike_time(m) or 0.0) > 3.0)
    frames, mix = fuzz_frames(messages, n_frames, rng, seed)
    # A spoofed frame per 100 valid ones: the session's own source and number, broken.
    last_seq: dict[str, int] = {}
    loop = LoopUnderTest(tmp, "fuzz", model, overrides={"safety": {**BASE["safety"], "stall_limit_s": 10.0}})
    try:
        loop.wait_subscribed()
        for payload in encoded[:n_head]:
            loop.send(payload)
        assert loop.wait_counted(loop.sent) == loop.sent, "the loop lost part of the session's head"
        reply = loop.request("arm")
        assert reply and reply["ok"], reply
        started = time.monotonic()
        per_valid = len(frames) / max(len(encoded) - n_head, 1)
        owed, k, spoofed = 0.0, 0, 0

        def interleaved():
            nonlocal owed, k, spoofed
            for i, (msg, payload) in enumerate(zip(messages[n_head:], encoded[n_head:])):
                if msg.source in last_seq and i % 100 == 50:
                    spoofed += 1
                    yield fault_frames.spoofed_frame(msg, last_seq[msg.source], spoofed)
                yield payload
                last_seq[msg.source] = msg.seq
                owed += per_valid
                while owed >= 1.0 and k < len(frames):
                    yield frames[k]
                    k += 1
                    owed -= 1.0
            yield from frames[k:]

        paced_send(loop, interleaved())
        counted = loop.wait_counted(loop.sent)
        wall_s = time.monotonic() - started
        time.sleep(0.5)
        live = event_keys(e for e in loop.drain(loop.events_sub) if e["kind"] == "event")
        status = loop.status()
        alive = loop.alive()
    finally:
        rc = loop.stop()
    reference = reference_events(loop.config, model, encoded[:n_head], encoded[n_head:])
    ref = set(reference)
    hostile = len(frames) + spoofed
    return {
        "fuzz_frames": hostile,
        "fuzz_mix": {**mix, "spoofed_session_sources": spoofed, "kept_off_session_sources": len(frames)},
        "fuzz_session_messages": len(encoded),
        "fuzz_frames_per_s": loop.sent / wall_s,
        "fuzz_crashes": int(not alive) + int(rc not in (0, -signal.SIGTERM)),
        "fuzz_uncounted": loop.sent - counted,
        "fuzz_events": len(live),
        "fuzz_reference_events": len(reference),
        "fuzz_false_events": sum(1 for e in live if e not in ref),
        "fuzz_missed_events": sum(1 for e in reference if e not in set(live)),
        "fuzz_bad_reasons": status["bad_reasons"],
        "fuzz_sources_tracked": len(status["sources"]),
    }


# ----------------------------------------------------------------- 2. control

def _deep(depth: int) -> list:
    x: list = []
    for _ in range(depth):
        x = [x]
    return x


def model_files(tmp: Path, model: Path) -> dict[str, Path]:
    """Files a ``load_model`` must refuse, each for its own reason."""
    from decoder.space.environments import Arena

    d = tmp / "models"
    d.mkdir()
    good = PlaceModel.load(model)
    files = {"directory": d, "missing": d / "missing.npz", "dev_zero": Path("/dev/zero"), "dev_null": Path("/dev/null")}
    files["garbage"] = d / "garbage.npz"
    files["garbage"].write_bytes(os.urandom(4096))
    files["truncated"] = d / "truncated.npz"
    files["truncated"].write_bytes(model.read_bytes()[: model.stat().st_size // 2])
    files["empty"] = d / "empty.npz"
    files["empty"].write_bytes(b"")
    files["other_npz"] = d / "other.npz"
    np.savez(files["other_npz"], x=np.arange(3))
    files["fifo"] = d / "fifo"
    os.mkfifo(files["fifo"])
    files["loop_link"] = d / "loop_link"
    os.symlink(files["loop_link"], files["loop_link"])
    other = PlaceModel(Arena.rectangle(60.0, 60.0, bin_cm=4.0), unit_ids=good.unit_ids_)
    files["other_arena"] = d / "other_arena.npz"
    other.save(files["other_arena"])
    return files


def control_cases(tmp: Path, model: Path, seed: int, n_generated: int) -> list[tuple[str, list[bytes]]]:
    """(name, frames) for every command with bad arguments, and bad requests of every other shape."""
    bad_values = {"int": 7, "float": 1.5, "nan": float("nan"), "bool": True, "none": None, "list": ["a"],
                  "map": {"x": 1}, "deep": _deep(1000), "bytes": b"\x00\xff", "huge_int": 2**64 - 1,
                  "negative": -1, "empty": "", "long": "x" * 60_000, "nul": "a\x00b"}
    cases = []

    def request(command, args=None, **envelope):
        m = {"v": 1, "k": "control", "src": "bench", "seq": 0, "cmd": command, **envelope}
        if args is not None:
            m["args"] = args
        return msgpack.packb(m, use_bin_type=True)

    for cmd, allowed in CONTROL_ARGS.items():
        cases.append((f"{cmd}/unknown_arg", [request(cmd, {"bogus": 1})]))
        cases.append((f"{cmd}/args_list", [request(cmd, [1, 2])]))
        cases.append((f"{cmd}/args_deep", [request(cmd, _deep(1000))]))
        for name in allowed:
            for label, value in bad_values.items():
                if cmd == "disarm" and label in ("empty", "nul", "long"):
                    continue  # a string is a valid reason: those would disarm, as asked
                cases.append((f"{cmd}/{name}={label}", [request(cmd, {name: value})]))
        for key in ("v", "k", "src", "seq", "cmd"):
            cases.append((f"{cmd}/envelope_{key}_deep", [request(cmd, **{key: _deep(1000)})]))
            cases.append((f"{cmd}/envelope_{key}_huge_int", [request(cmd, **{key: 2**64 - 1})]))
        cases.append((f"{cmd}/multipart", [request(cmd), request(cmd)]))
        cases.append((f"{cmd}/empty_first_part", [b"", request(cmd)]))
        cases.append((f"{cmd}/oversized", [request(cmd, pad=[b"y" * 1000] * 70)]))
    for name, path in model_files(tmp, model).items():
        cases.append((f"load_model/{name}", [request("load_model", {"path": str(path)})]))
    cases += [("unknown_command", [request("launch")]), ("empty_frame", [b""]), ("not_msgpack", [b"\xc1" * 9]),
              ("not_a_map", [msgpack.packb([1, 2])]), ("rig_frame", [protocol.encode(Heartbeat("x", 0, 1.0))])]
    templates = [msgpack.unpackb(request(c, {n: "x" for n in a}), raw=False) for c, a in CONTROL_ARGS.items()]
    for i, frame in enumerate(fault_frames.structured_frames(templates, n_generated, seed)):
        if b"load_model" in frame:
            continue  # a generated path could name a real model file; the named cases cover paths
        cases.append((f"generated/{i}", [frame]))
    rng = np.random.default_rng(seed)
    cases += [(f"random_bytes/{i}", [f]) for i, f in enumerate(fault_frames.random_frames(n_generated // 4, rng))]
    return cases


def run_control(tmp: Path, model: Path, seed: int, n_generated: int) -> dict:
    cases = control_cases(tmp, model, seed, n_generated)
    loop = LoopUnderTest(tmp, "control", model, log=False, idle_exit_s=600.0)
    crashes, unanswered, accepted, restarts = [], 0, [], 0
    try:
        loop.wait_subscribed()
        before = loop.status()
        for name, parts in cases:
            reply = loop.raw_request(*parts, timeout_s=5.0)
            if reply is None:
                unanswered += 1
            elif reply["ok"] and not name.startswith(("generated/", "random_bytes/")):
                accepted.append(name)
            if reply is None or not loop.alive():
                crashes.append(name)
                if not loop.alive():
                    break
        after = loop.status()
        still_decoding = after["state"] == "decoding" and after["sources"] == before["sources"]
    finally:
        rc = loop.stop()
    return {
        "control_cases": len(cases),
        "control_crashes": len(crashes) + int(rc not in (0, -signal.SIGTERM)),
        "control_crashed_cases": crashes[:20],
        "control_unanswered": unanswered,
        "control_bad_cases_accepted": accepted,
        "control_model_unchanged": bool(still_decoding),
        "control_refused": after["control"]["refused"],
    }


# ----------------------------------------------------------------- 3. kill -9 during recording

def run_kill9(tmp: Path, model: Path, runs: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    messages = session_messages(seed + 200, 8.0)
    encoded = [protocol.encode(m) for m in messages]
    lost, unrecoverable, details = [], 0, []
    step_s = BASE["decoder"]["step_s"]
    flush_s = None
    for run in range(runs):
        loop = LoopUnderTest(tmp, f"kill9_{run}", model, idle_exit_s=60.0)
        try:
            loop.wait_subscribed()
            kill_after_s = float(rng.uniform(1.0, 6.0))
            started = time.monotonic()
            sent_t = -np.inf
            for msg, payload in zip(messages, encoded):
                t = spike_time(msg)
                if t is not None:
                    # Real time: the message goes out when its data time comes.
                    delay = t - (time.monotonic() - started)
                    if delay > 0:
                        time.sleep(delay)
                    if t > kill_after_s:
                        break
                loop.send(payload)
                if t is not None:
                    sent_t = max(sent_t, t)
            os.kill(loop.proc.pid, signal.SIGKILL)
            loop.proc.wait()
        finally:
            loop.stop()
        try:
            log = read_log(loop.log_dir)
            replay = replay_session(loop.log_dir)
            recovered_t = replay.pipeline.spike_watermark_s
            flush_s = float(replay.header.get("flush_interval_s", 0.05)) if replay.header else 0.05
            assert np.isfinite(recovered_t), "nothing was recovered"
            lost.append(sent_t - recovered_t)
            details.append({"records": len(log.records), "lost_s": sent_t - recovered_t, "damage": replay.damage})
        except Exception as exc:  # noqa: BLE001 - an unreadable log is what this part counts
            unrecoverable += 1
            details.append({"error": f"{type(exc).__name__}: {exc}"[:300]})
    return {
        "kill9_runs": runs,
        "kill9_unrecoverable": unrecoverable,
        "kill9_lost_s_max": max(lost) if lost else None,
        "kill9_lost_s_median": float(np.median(lost)) if lost else None,
        "kill9_bar_s": (flush_s or 0.05) + step_s,
        "kill9_details": details,
    }


# ----------------------------------------------------------------- 4. restart, 5. stall

def _send_real_time(loop: LoopUnderTest, messages, encoded, duration_s: float, watch=None) -> float:
    """Send ``duration_s`` of the session at real time, calling ``watch()`` between messages; the start (monotonic)."""
    started = time.monotonic()
    t0 = None
    for msg, payload in zip(messages, encoded):
        t = spike_time(msg)
        if t is not None:
            t0 = t if t0 is None else t0
            if t - t0 > duration_s:
                break
            while (t - t0) - (time.monotonic() - started) > 0:
                if watch is not None:
                    watch()
                time.sleep(0.001)
        loop.send(payload)
    return started


def run_restart_and_stall(tmp: Path, model: Path, restarts: int, seed: int) -> dict:
    messages = session_messages(seed + 300, 6.0)
    encoded = [protocol.encode(m) for m in messages]
    loop = LoopUnderTest(tmp, "restart", model, log=False)
    recoveries, stall_s = [], None
    stall_limit_s = BASE["safety"]["stall_limit_s"]
    try:
        loop.wait_subscribed()
        _send_real_time(loop, messages, encoded, 3.0)
        reply = loop.request("arm")
        assert reply and reply["ok"], reply
        # 5. stall: the rig goes silent while armed.
        _send_real_time(loop, messages[len(messages) // 2:], encoded[len(encoded) // 2:], 1.0)
        silent_from = time.monotonic()
        while loop.status()["armed"]:
            if time.monotonic() - silent_from > 10 * stall_limit_s:
                break
            time.sleep(0.005)
        stall_s = time.monotonic() - silent_from
        # 4. restart: the publisher goes away and comes back, numbering and stamping from zero,
        # sending at once (a real rig does not wait for its subscribers).
        for _ in range(restarts):
            loop.close_rig()
            time.sleep(0.5)
            loop.drain(loop.state_sub)
            loop.bind_rig()
            decoded_at = []

            def watch():
                if not decoded_at:
                    # A step on the new clock: its data time is below the old clock's 4 s.
                    if any(f["kind"] == "state" and f["state"] == "decoding" and f["t_s"] < 2.0
                           for f in loop.drain(loop.state_sub)):
                        decoded_at.append(time.monotonic())

            first = _send_real_time(loop, messages, encoded, 2.0, watch)
            recoveries.append(decoded_at[0] - first if decoded_at else float("inf"))
        alive = loop.alive()
    finally:
        loop.stop()
    step_s = BASE["decoder"]["step_s"]
    return {
        "restart_runs": restarts,
        "restart_recovery_s": recoveries,
        "restart_recovery_s_max": max(recoveries) if recoveries else None,
        "stall_disarm_s": stall_s,
        "stall_bar_s": stall_limit_s + step_s,
        "restart_loop_alive": alive,
    }


# ----------------------------------------------------------------- 6. flood, 7. soak

def tiled(messages: list, tiles: int):
    """The session repeated ``tiles`` times end to end: times, sync pulse ids and numbers carried on.

    The tracker's clock runs at its own rate (the simulated drift), so its
    times move on by the tile's length on that clock, from a fit of the
    tile's own sync pulses (decoder.session.clock.fit_clock).
    """
    from decoder.messages import SourceAnnounce, SyncPulse
    from decoder.session.clock import fit_clock

    length_s = max(spike_time(m) or 0.0 for m in messages)
    pulses = {}
    for m in messages:
        if isinstance(m, SyncPulse):
            pulses.setdefault(m.pulse_id, {})[m.source] = m.t_s
    pairs = [(p[SPIKE_SOURCE], p["tracker"]) for p in pulses.values() if len(p) == 2]
    fit = fit_clock([b for _, b in pairs], [a for a, _ in pairs])   # tracker = offset + slope * ephys
    tracker_length_s = fit.slope * length_s
    max_pulse = max(pulses)
    per_source: dict[str, int] = {}
    for m in messages:
        per_source[m.source] = per_source.get(m.source, 0) + 1
    body = [m for m in messages if not isinstance(m, SourceAnnounce)]
    yield from messages
    for k in range(1, tiles):
        for m in body:
            shift = tracker_length_s if m.source == "tracker" else length_s
            fields = {"seq": m.seq + k * (per_source[m.source] - 1), "t_s": m.t_s + k * shift}
            if isinstance(m, SyncPulse):
                fields["pulse_id"] = m.pulse_id + k * max_pulse
            yield dataclasses.replace(m, **fields)


def run_flood(tmp: Path, model: Path, seed: int, session_s: float) -> dict:
    """Ten times the session's rate: the session sent at ten times real time, then drained."""
    messages = session_messages(seed + 400, session_s)
    encoded = [protocol.encode(m) for m in messages]
    loop = LoopUnderTest(tmp, "flood", model, log=True)
    try:
        loop.wait_subscribed()
        started = time.monotonic()
        t_first = None
        for msg, payload in zip(messages, encoded):
            t = spike_time(msg)
            if t is not None:
                t_first = t if t_first is None else t_first
                delay = (t - t_first) / 10.0 - (time.monotonic() - started)
                if delay > 0:
                    time.sleep(delay)
            loop.send(payload)
        sent_at = time.monotonic()
        counted = loop.wait_counted(loop.sent, timeout_s=120.0)
        drain_s = time.monotonic() - sent_at
        status = loop.status()
        last_t = max(spike_time(m) or 0.0 for m in messages)
    finally:
        loop.stop()
    return {
        "flood_x_realtime": 10.0,
        "flood_messages": loop.sent,
        "flood_uncounted": loop.sent - counted,
        "flood_drain_s": drain_s,
        "flood_data_time_behind_s": last_t - (status["data_time_s"] or 0.0),
        "flood_drained": bool(counted == loop.sent and status["data_time_s"] == last_t),
    }


def run_soak(tmp: Path, model: Path, seed: int, hours: float) -> dict:
    tile_s = 120.0
    messages = session_messages(seed + 500, tile_s)
    tile_len = max(spike_time(m) or 0.0 for m in messages)
    tiles = int(np.ceil(hours * 3600.0 / tile_len))
    loop = LoopUnderTest(tmp, "soak", model, log=True, idle_exit_s=60.0)
    samples: list[tuple[float, int]] = []
    try:
        loop.wait_subscribed()
        reply = None
        started = time.monotonic()
        last_t = 0.0
        for i, msg in enumerate(tiled(messages, tiles)):
            loop.send(protocol.encode(msg))
            t = spike_time(msg)
            last_t = t if t is not None else last_t
            if i % 2000 == 1999:
                loop.wait_counted(loop.sent - MAX_BACKLOG)
                samples.append((last_t, loop.rss_kb()))
                if reply is None and last_t > 10.0:
                    reply = loop.request("arm")
        counted = loop.wait_counted(loop.sent, timeout_s=300.0)
        samples.append((last_t, loop.rss_kb()))
        wall_s = time.monotonic() - started
        status = loop.status()
    finally:
        loop.stop()
    t = np.array([s[0] for s in samples])
    rss = np.array([s[1] for s in samples], float)
    # Warm-up: the model installed, the kernels loaded, the first fifth of the run.
    after = rss[t >= t[-1] / 5]
    first, last = float(np.median(after[:5])), float(np.median(rss[-5:]))
    return {
        "soak_hours_simulated": (status["data_time_s"] or 0.0) / 3600.0,
        "soak_wall_s": wall_s,
        "soak_messages": loop.sent,
        "soak_uncounted": loop.sent - counted,
        "soak_steps": status["counters"]["decode_steps"],
        "soak_rss_mb_after_warm_up": first / 1024,
        "soak_rss_mb_end": last / 1024,
        "soak_rss_growth_pct": 100.0 * (last - first) / first,
    }


# ----------------------------------------------------------------- 8. dry run beside a consumer

def run_dry_run(tmp: Path, model: Path, seed: int, session_s: float) -> dict:
    messages = session_messages(seed + 600, session_s)
    encoded = [protocol.encode(m) for m in messages]
    n_head = next(i for i, m in enumerate(messages) if (spike_time(m) or 0.0) > 3.0)
    loop = LoopUnderTest(tmp, "dry_run", model, dry_run=True, idle_exit_s=5.0)
    standin_out = loop.dir / "standin.json"
    standin = subprocess.Popen([sys.executable, "-m", "rig_adapters.sim.stimulator_standin", "--events",
                                loop.ep["events"], "--out", str(standin_out)], cwd=ROOT)
    try:
        loop.wait_subscribed()
        for payload in encoded[:n_head]:
            loop.send(payload)
        loop.wait_counted(loop.sent)
        reply = loop.request("arm")
        assert reply and reply["ok"], reply
        paced_send(loop, encoded[n_head:])
        loop.wait_counted(loop.sent)
        time.sleep(0.5)
        heard = loop.drain(loop.events_sub)
        withheld = loop.status()["counters"]["events"]
    finally:
        loop.stop()
        standin.send_signal(signal.SIGTERM)
        standin.wait(timeout=30)
    received = json.loads(standin_out.read_text()) if standin_out.exists() else []
    return {
        "dry_run_actionable_events": len(heard) + len(received),
        "dry_run_events_withheld": withheld,
    }


# ----------------------------------------------------------------- the run

FULL = dict(fuzz_frames=105_000, fuzz_session_s=120.0, control_generated=2000, kill_runs=20, restarts=5,
            flood_s=30.0, soak_hours=1.0, dry_run_s=40.0)
QUICK = dict(fuzz_frames=3000, fuzz_session_s=12.0, control_generated=60, kill_runs=2, restarts=1,
             flood_s=5.0, soak_hours=0.02, dry_run_s=12.0)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--json", required=True, help="write the figures here")
    parser.add_argument("--quick", action="store_true", help="a short version of every part (for the test)")
    parser.add_argument("--seed", type=int, default=3)
    parser.add_argument("--only", action="append", default=None,
                        choices=["fuzz", "control", "kill9", "restart", "flood", "soak", "dry_run"],
                        help="run only these parts (repeatable)")
    args = parser.parse_args(argv)
    size = QUICK if args.quick else FULL
    parts = args.only or ["fuzz", "control", "kill9", "restart", "flood", "soak", "dry_run"]
    result: dict = {"quick": args.quick, "seed": args.seed}
    with tempfile.TemporaryDirectory(prefix="placeloop-faults-") as tmp:
        tmp = Path(tmp)
        started = time.monotonic()
        model = fit_model(tmp, args.seed)
        runs = {
            "fuzz": lambda: run_fuzz(tmp, model, size["fuzz_frames"], size["fuzz_session_s"], args.seed),
            "control": lambda: run_control(tmp, model, args.seed, size["control_generated"]),
            "kill9": lambda: run_kill9(tmp, model, size["kill_runs"], args.seed),
            "restart": lambda: run_restart_and_stall(tmp, model, size["restarts"], args.seed),
            "flood": lambda: run_flood(tmp, model, args.seed, size["flood_s"]),
            "soak": lambda: run_soak(tmp, model, args.seed, size["soak_hours"]),
            "dry_run": lambda: run_dry_run(tmp, model, args.seed, size["dry_run_s"]),
        }
        for name in parts:
            part_started = time.monotonic()
            result.update(runs[name]())
            result[f"{name}_bench_wall_s"] = time.monotonic() - part_started
            print(f"faults: {name} done in {time.monotonic() - part_started:.0f} s", file=sys.stderr)
        result["wall_s"] = time.monotonic() - started
    Path(args.json).parent.mkdir(parents=True, exist_ok=True)
    Path(args.json).write_text(json.dumps(result, indent=2, default=float))
    keys = [k for k in ("fuzz_frames", "fuzz_crashes", "fuzz_false_events", "fuzz_uncounted", "control_cases",
                        "control_crashes", "kill9_runs", "kill9_unrecoverable", "kill9_lost_s_max",
                        "restart_recovery_s_max", "stall_disarm_s", "soak_hours_simulated", "soak_rss_growth_pct",
                        "dry_run_actionable_events") if k in result]
    for k in keys:
        print(f"{k:28s} {result[k]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
