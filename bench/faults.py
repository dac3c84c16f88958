"""The fault probe: hostile input, bad commands, crashes, restarts, stalls and floods against the real loop.

    python bench/faults.py --json out/faults.json [--quick] [--seed 3] [--only PART ...]

Every part runs ``placeloop run`` as a process of its own (with ``--quick``,
all but the dry run share one), with real ZeroMQ sockets on 127.0.0.1 only,
decoding with a model fitted in this process first on a simulated session
(invented data). The bench plays the rig (an XPUB socket, so that it knows
when the loop has subscribed), the experiment script (REQ on the control
socket) and the consumers (SUB on the events and state sockets);
bench/fault_loop.py holds that harness. The JSON is written after every
part, so a run stopped early keeps what it measured.

1. **fuzz**: a valid simulated session, armed, with hostile frames
   interleaved (bench/fault_frames.py: hypothesis-built maps, random bytes,
   mutated real frames, broken copies of the session's own frames under its
   own sources, valid frames from thousands of invented sources). Sending is
   paced on the loop's own status counters so that no frame is dropped by a
   high-water mark: every frame sent must be counted, accepted or rejected
   (``fuzz_uncounted`` = sent - counted). Events are compared with a
   reference: the same valid session and the same arm request fed through
   the same ``Ingest`` and ``Pipeline`` in this process, without the fuzz
   (``fuzz_false_events`` = events not in the reference; ``fuzz_missed`` =
   reference events that did not reach the bench's subscriber, which joins
   the loop's events socket before the session starts).
2. **control**: every control command with bad arguments, bad envelopes,
   model files that cannot be used, multipart and oversized requests, and
   hypothesis-built requests; a case crashes if the loop dies or does not
   answer (``control_crashes``).
3. **kill -9** during recording at real time, 20 times; the log left behind
   is read (``read_log``) and replayed (``replay_session``);
   ``kill9_lost_s_max`` is the data time sent before the kill minus the data
   time the replay recovered, against the recorder's flush interval plus one
   step (``kill9_lost_after_receipt_s_max``: only what the loop had received).
4. **restart**: the rig's publisher closes and binds again, starting its
   numbers and its clock from zero without waiting for the loop to
   reconnect; ``restart_recovery_s_max`` is the wall time from its first
   message to the first state frame of a step on its new clock.
5. **stall**: the rig goes silent while armed; ``stall_disarm_s`` is the wall
   time from its last message to the status showing the triggers disarmed.
6. **flood**: the session sent at ten times real time, drained: all counted,
   the data time caught up.
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

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench import fault_frames
from bench.fault_loop import (
    BASE,
    MAX_BACKLOG,
    SESSION_SOURCES,
    Loops,
    LoopUnderTest,
    event_keys,
    fit_model,
    paced_send,
    send_real_time,
    session_messages,
    spike_time,
    tiled,
)
from decoder.encoding.place_model import PlaceModel
from decoder.messages import Heartbeat
from decoder.session.outputs import StepOutput
from decoder.session.pipeline import Pipeline
from rig_adapters.sessions.log_reader import read_log
from rig_adapters.sessions.replay import replay_session
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CONTROL_ARGS, Ingest

# ----------------------------------------------------------------- 1. fuzz

def reference_events(config, model: Path, head: list[bytes], rest: list[bytes]) -> list[tuple]:
    """The valid session's events through the same Ingest and Pipeline in this process, armed where the loop was."""
    ingest = Ingest(Pipeline(config, PlaceModel.load(model)))
    events = []
    for payload in head:
        ingest.rig_bytes(payload)
    _, reply = ingest.control_bytes(protocol.encode_control_request("arm"))
    assert reply["ok"], reply
    for payload in rest:
        for out in ingest.rig_bytes(payload):
            if isinstance(out, StepOutput):
                events.extend((e.rule, e.zone, round(float(out.t_s), 6)) for e in out.events)
    return events


def fuzz_frames(messages: list, n: int, rng: np.random.Generator, seed: int) -> tuple[list[bytes], dict]:
    """``n`` hostile frames in a shuffled mix, and how many of each kind.

    Hypothesis builds a twentieth of them (at least 200): it takes about 10 ms
    a frame here, the other generators microseconds.
    """
    valid = fault_frames.renamed(messages[:2000])
    templates = [msgpack.unpackb(v, raw=False) for v in valid[:200]]
    parts = {
        "structured": fault_frames.structured_frames(templates, max(n // 20, 200), seed),
        "random_bytes": fault_frames.random_frames(n * 4 // 10, rng),
        "mutated": fault_frames.mutated_frames(valid, n * 45 // 100, rng),
    }
    # Valid frames from ever new invented sources: the per-source table must stay bounded.
    n_sources = n - sum(len(p) for p in parts.values())
    parts["many_sources"] = [protocol.encode(Heartbeat(f"bogus{i}", 1, 1.0)) for i in range(n_sources)]
    frames = [f for p in parts.values() for f in fault_frames.keep_off_session(p, SESSION_SOURCES)]
    rng.shuffle(frames)
    return frames, {k: len(v) for k, v in parts.items()}


def run_fuzz(loops: Loops, n_frames: int, session_s: float, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    # The dry run's session: its animal visits the goal within the first seconds, so that both fire.
    messages = session_messages(seed + 600, session_s)
    encoded = [protocol.encode(m) for m in messages]
    n_head = next(i for i, m in enumerate(messages) if (spike_time(m) or 0.0) > 3.0)
    frames, mix = fuzz_frames(messages, n_frames, rng, seed)
    # A spoofed frame per 100 valid ones: the session's own source and number, broken.
    last_seq: dict[str, int] = {}
    loop = loops.get("fuzz")
    sent_before = loop.sent
    try:
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
    finally:
        ran_well = loops.done(loop)
    reference = reference_events(loop.config, loops.model, encoded[:n_head], encoded[n_head:])
    ref = set(reference)
    hostile = len(frames) + spoofed
    return {
        "fuzz_frames": hostile,
        "fuzz_mix": {**mix, "spoofed_session_sources": spoofed, "kept_off_session_sources": len(frames)},
        "fuzz_session_messages": len(encoded),
        "fuzz_frames_per_s": (loop.sent - sent_before) / wall_s,
        "fuzz_crashes": int(not ran_well),
        "fuzz_uncounted": loop.sent - counted,
        "fuzz_events": len(live),
        "fuzz_reference_events": len(reference),
        "fuzz_false_events": sum(1 for e in live if e not in ref),
        "fuzz_missed_events": sum(1 for e in reference if e not in set(live)),
        "fuzz_missed": [e for e in reference if e not in set(live)],
        "fuzz_unmatched": [e for e in live if e not in ref],
        "fuzz_reference": reference,
        "fuzz_bad_reasons": status["bad_reasons"],
        "fuzz_sources_tracked": len(status["sources"]),
        # Disarmed at the end means a stall (the sender starved for the stall limit) cut the session short.
        "fuzz_armed_at_end": bool(status["armed"]),
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
                if cmd in ("disarm", "stall") and label in ("empty", "nul", "long"):
                    continue  # any string is a valid reason or stream name: those would disarm, as asked
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


def run_control(loops: Loops, seed: int, n_generated: int) -> dict:
    """Every case answered; none of the named (bad) cases accepted; the model in use kept through them.

    Generated requests come after the named ones: some are valid commands
    (a ``start_learning`` with its arguments intact changes the state, as asked).
    """
    cases = control_cases(loops.tmp, loops.model, seed, n_generated)
    loop = loops.get("control", log=False, idle_exit_s=600.0)
    crashes, unanswered, accepted, generated_accepted = [], 0, [], 0
    after_named = None
    try:
        for name, parts in cases:
            generated = name.startswith(("generated/", "random_bytes/"))
            if generated and after_named is None:
                after_named = loop.status()
            reply = loop.raw_request(*parts, timeout_s=5.0)
            if reply is None:
                unanswered += 1
            elif reply["ok"]:
                generated_accepted += generated
                if not generated:
                    accepted.append(name)
            if reply is None or not loop.alive():
                crashes.append(name)
                if not loop.alive():
                    break
        after = loop.status()
    finally:
        ran_well = loops.done(loop)
    return {
        "control_cases": len(cases),
        "control_crashes": len(crashes) + int(not ran_well),
        "control_crashed_cases": crashes[:20],
        "control_unanswered": unanswered,
        "control_bad_cases_accepted": accepted,
        "control_generated_accepted": generated_accepted,
        "control_still_decoding": (after_named or after)["state"] == "decoding",
        "control_refused": after["control"]["refused"],
    }


# ----------------------------------------------------------------- 3. kill -9 during recording

def run_kill9(loops: Loops, runs: int, seed: int, kill_within_s: float) -> dict:
    """Kill -9 while recording at real time; read and replay what is left.

    ``kill9_lost_s`` is the data time sent before the kill minus the data
    time recovered: on a starved machine it includes what still sat in the
    socket queues, never received. ``kill9_lost_after_receipt_s`` counts only
    data the loop had provably received, recorded and decoded before it died
    (its newest state frame, sent after the recorder took the message that
    closed the step) and the log did not keep: the recorder's own loss.
    """
    rng = np.random.default_rng(seed)
    messages = session_messages(seed + 200, 8.0)
    encoded = [protocol.encode(m) for m in messages]
    lost, lost_received, unrecoverable, details = [], [], 0, []
    step_s = BASE["decoder"]["step_s"]
    flush_s = None
    for run in range(runs):
        # Shared (--quick), the loop killed has recorded every earlier part, hostile frames included.
        loop = loops.take(f"kill9_{run}", idle_exit_s=60.0)
        try:
            loop.drain(loop.state_sub)
            kill_after_s = float(rng.uniform(1.0, kill_within_s))
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
            time.sleep(0.2)  # the state frames it sent before it died, still on their way
            decoded_t = max((f["t_s"] for f in loop.drain(loop.state_sub)
                             if f["kind"] == "state" and f["state"] == "decoding"), default=-np.inf)
        finally:
            loop.stop()
        try:
            log = read_log(loop.log_dir)
            replay = replay_session(loop.log_dir)
            recovered_t = replay.pipeline.spike_watermark_s
            flush_s = float(replay.header.get("flush_interval_s", 0.05)) if replay.header else 0.05
            assert np.isfinite(recovered_t), "nothing was recovered"
            lost.append(sent_t - recovered_t)
            lost_received.append(max(decoded_t - recovered_t, 0.0))
            details.append({"records": len(log.records), "lost_s": sent_t - recovered_t,
                            "lost_after_receipt_s": lost_received[-1], "damage": replay.damage})
        except Exception as exc:  # noqa: BLE001 - an unreadable log is what this part counts
            unrecoverable += 1
            details.append({"error": f"{type(exc).__name__}: {exc}"[:300]})
    return {
        "kill9_runs": runs,
        "kill9_unrecoverable": unrecoverable,
        "kill9_lost_s_max": max(lost) if lost else None,
        "kill9_lost_s_median": float(np.median(lost)) if lost else None,
        "kill9_lost_after_receipt_s_max": max(lost_received) if lost_received else None,
        "kill9_bar_s": (flush_s or 0.05) + step_s,
        "kill9_details": details,
    }


# ----------------------------------------------------------------- 4. restart, 5. stall

def run_restart_and_stall(loops: Loops, restarts: int, seed: int) -> dict:
    messages = session_messages(seed + 300, 6.0)
    encoded = [protocol.encode(m) for m in messages]
    loop = loops.get("restart", log=False)
    recoveries, stall_s = [], None
    stall_limit_s = BASE["safety"]["stall_limit_s"]
    try:
        _, sent = send_real_time(loop, messages, encoded, 3.0)
        reply = loop.request("arm")
        assert reply and reply["ok"], reply
        # 5. stall: the rig goes silent while armed.
        send_real_time(loop, messages, encoded, 1.0, start=sent)
        silent_from = time.monotonic()
        assert loop.status()["armed"], "the loop disarmed before the stall"
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
            decoded_at: list[float] = []

            def watch(decoded_at=decoded_at):
                # A step on the new clock: its data time is below the old clock's 4 s.
                if not decoded_at and any(f["kind"] == "state" and f["state"] == "decoding" and f["t_s"] < 2.0
                                          for f in loop.drain(loop.state_sub)):
                    decoded_at.append(time.monotonic())

            first, _ = send_real_time(loop, messages, encoded, 2.0, watch)
            recoveries.append(decoded_at[0] - first if decoded_at else float("inf"))
    finally:
        ran_well = loops.done(loop)
    step_s = BASE["decoder"]["step_s"]
    return {
        "restart_runs": restarts,
        "restart_recovery_s": recoveries,
        "restart_recovery_s_max": max(recoveries) if recoveries else None,
        "stall_disarm_s": stall_s,
        "stall_bar_s": stall_limit_s + step_s,
        "restart_loop_ran_well": ran_well,
    }


# ----------------------------------------------------------------- 6. flood, 7. soak

def run_flood(loops: Loops, seed: int, session_s: float) -> dict:
    """Ten times the session's rate: the session sent at ten times real time, then drained."""
    messages = session_messages(seed + 400, session_s)
    encoded = [protocol.encode(m) for m in messages]
    loop = loops.get("flood")
    sent_before = loop.sent
    try:
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
        ran_well = loops.done(loop)
    return {
        "flood_x_realtime": 10.0,
        "flood_messages": loop.sent - sent_before,
        "flood_uncounted": loop.sent - counted,
        "flood_drain_s": drain_s,
        "flood_data_time_behind_s": last_t - (status["data_time_s"] or 0.0),
        "flood_drained": bool(counted == loop.sent and status["data_time_s"] == last_t and ran_well),
    }


def run_soak(loops: Loops, seed: int, hours: float, tile_s: float) -> dict:
    """``hours`` of simulated data as fast as the loop takes it: a session of ``tile_s`` repeated (bench.fault_loop.tiled)."""
    messages = session_messages(seed + 500, tile_s)
    tile_len = max(spike_time(m) or 0.0 for m in messages)
    tiles = int(np.ceil(hours * 3600.0 / tile_len))
    loop = loops.get("soak", idle_exit_s=60.0)
    sent_before = loop.sent
    samples: list[tuple[float, int]] = []
    try:
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
        ran_well = loops.done(loop)
    t = np.array([s[0] for s in samples])
    rss = np.array([s[1] for s in samples], float)
    # Warm-up: the model installed, the kernels loaded, the first fifth of the run.
    after = rss[t >= t[-1] / 5]
    first, last = float(np.median(after[:5])), float(np.median(rss[-5:]))
    return {
        "soak_hours_simulated": (status["data_time_s"] or 0.0) / 3600.0,
        "soak_wall_s": wall_s,
        "soak_messages": loop.sent - sent_before,
        "soak_uncounted": loop.sent - counted,
        "soak_loop_ran_well": ran_well,
        "soak_steps": status["counters"]["decode_steps"],
        "soak_counters": {k: status["counters"][k] for k in ("bad_messages", "stale_messages", "time_jumps",
                                                             "clock_mismatch", "steps_skipped", "events")},
        "soak_rss_mb_after_warm_up": first / 1024,
        "soak_rss_mb_end": last / 1024,
        "soak_rss_growth_pct": 100.0 * (last - first) / first,
    }


# ----------------------------------------------------------------- 8. dry run beside a consumer

def run_dry_run(loops: Loops, seed: int, session_s: float) -> dict:
    messages = session_messages(seed + 600, session_s)
    encoded = [protocol.encode(m) for m in messages]
    n_head = next(i for i, m in enumerate(messages) if (spike_time(m) or 0.0) > 3.0)
    # Never shared: the loop runs with --dry-run. The consumers connect first: whatever it published, they would get.
    loop = LoopUnderTest(loops.tmp, "dry_run", loops.model, overrides=loops.overrides, dry_run=True, idle_exit_s=5.0)
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

FULL = {"fuzz_frames": 105_000, "fuzz_session_s": 120.0, "control_generated": 2000, "kill_runs": 20, "kill_within_s": 6.0,
        "restarts": 5, "flood_s": 30.0, "soak_hours": 1.0, "soak_tile_s": 120.0, "dry_run_s": 40.0}
QUICK = {"fuzz_frames": 2000, "fuzz_session_s": 12.0, "control_generated": 40, "kill_runs": 1, "kill_within_s": 2.0,
         "restarts": 1, "flood_s": 4.0, "soak_hours": 0.01, "soak_tile_s": 12.0, "dry_run_s": 12.0}

#: With ``--quick``, a goal zone large enough for a few seconds of session to fire in it.
QUICK_ZONES = {"zones": [{"kind": "circle", "name": "goal", "center_cm": [50.0, 50.0], "radius_cm": 30.0}]}

#: The parts in the order they run. With ``--quick`` all but the dry run share one loop, each
#: picking up its count where the last left it: a restart loses messages on purpose and a kill
#: ends the loop, so they come last.
PARTS = ("fuzz", "control", "flood", "soak", "restart", "kill9", "dry_run")

#: The order of a full run, each part on a loop of its own: the longest, the soak, last.
FULL_ORDER = ("fuzz", "control", "restart", "flood", "dry_run", "kill9", "soak")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--json", required=True, help="write the figures here")
    parser.add_argument("--quick", action="store_true", help="a short version of every part (for the test)")
    parser.add_argument("--seed", type=int, default=3)
    parser.add_argument("--only", action="append", default=None,
                        choices=PARTS,
                        help="run only these parts (repeatable)")
    args = parser.parse_args(argv)
    size = QUICK if args.quick else FULL
    parts = [p for p in (PARTS if args.quick else FULL_ORDER) if p in (args.only or PARTS)]
    result: dict = {"quick": args.quick, "seed": args.seed}
    with tempfile.TemporaryDirectory(prefix="placeloop-faults-") as tmp:
        tmp = Path(tmp)
        started = time.monotonic()
        loops = Loops(tmp, fit_model(tmp, args.seed, learn_s=30.0 if args.quick else 60.0), shared=args.quick,
                      overrides=QUICK_ZONES if args.quick else None)
        runs = {
            "fuzz": lambda: run_fuzz(loops, size["fuzz_frames"], size["fuzz_session_s"], args.seed),
            "control": lambda: run_control(loops, args.seed, size["control_generated"]),
            "flood": lambda: run_flood(loops, args.seed, size["flood_s"]),
            "soak": lambda: run_soak(loops, args.seed, size["soak_hours"], size["soak_tile_s"]),
            "restart": lambda: run_restart_and_stall(loops, size["restarts"], args.seed),
            "kill9": lambda: run_kill9(loops, size["kill_runs"], args.seed, size["kill_within_s"]),
            "dry_run": lambda: run_dry_run(loops, args.seed, size["dry_run_s"]),
        }
        out = Path(args.json)
        out.parent.mkdir(parents=True, exist_ok=True)
        try:
            for name in parts:
                part_started = time.monotonic()
                result.update(runs[name]())
                result[f"{name}_bench_wall_s"] = time.monotonic() - part_started
                print(f"faults: {name} done in {time.monotonic() - part_started:.0f} s", file=sys.stderr)
                # Written after every part: a long run stopped early keeps what it measured.
                out.write_text(json.dumps(result, indent=2, default=float))
        finally:
            result["shared_loop_ran_well"] = loops.close()
        result["wall_s"] = time.monotonic() - started
    out.write_text(json.dumps(result, indent=2, default=float))
    keys = [k for k in ("fuzz_frames", "fuzz_crashes", "fuzz_false_events", "fuzz_uncounted", "control_cases",
                        "control_crashes", "kill9_runs", "kill9_unrecoverable", "kill9_lost_s_max",
                        "restart_recovery_s_max", "stall_disarm_s", "soak_hours_simulated", "soak_rss_growth_pct",
                        "dry_run_actionable_events") if k in result]
    for k in keys:
        print(f"{k:28s} {result[k]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
