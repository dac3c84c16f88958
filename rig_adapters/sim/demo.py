"""``placeloop demo``: the whole closed loop on the built-in simulated rig.

Three processes talk over loopback ZeroMQ, exactly as on a rig:

- the simulated rig (``rig_adapters.sim.simulated_rig``) publishes spikes, tracker
  frames, heartbeats and sync pulses paced at ``speed`` × real time;
- the decoder (``placeloop run``) learns for ``learn_s`` simulated seconds,
  fits, arms, decodes every step and publishes events;
- a stimulator stand-in subscribes to the events.

The demo writes the effective config beside the session, waits for the rig to
finish, and prints a summary.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

import tomli_w
import zmq

from rig_adapters.wire import protocol

#: How long the simulated rig waits for the decoder to subscribe (s): the decoder loads its
#: kernels first, which takes about a minute on a machine whose numba cache is still empty.
RIG_WAIT_S = 300.0


def free_loopback_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def demo_config_text(config_path: str | Path, learn_s: float | None, ports: dict[str, int]) -> str:
    """The config the demo runs: the given file, plus the automatic plan and free loopback ports.

    The ``[ttl]`` table is left out: a demo drives no hardware, whatever config it is given.
    """
    doc = tomllib.loads(Path(config_path).read_text())
    doc.pop("ttl", None)
    session = dict(doc.get("session", {}))
    if learn_s is not None:
        session["learn_s"] = float(learn_s)
    session.setdefault("learn_s", 180.0)
    session["arm_after_fit"] = True
    doc["session"] = session
    doc["endpoints"] = {
        "rig": [f"tcp://127.0.0.1:{ports['rig']}"],
        "events": f"tcp://127.0.0.1:{ports['events']}",
        "state": f"tcp://127.0.0.1:{ports['state']}",
        "control": f"tcp://127.0.0.1:{ports['control']}",
    }
    return tomli_w.dumps(doc)


#: The decoder stops after this many wall-clock seconds without rig input.
IDLE_EXIT_WALL_S = 3.0

#: The decoder has reached the end of the rig's data when its data time is this close to it (s).
END_OF_DATA_SLACK_S = 0.5

#: How long the demo waits for the decoder after the rig has finished (wall-clock s).
DECODER_WAIT_S = 120.0


def _request(control_port: int, command: str) -> dict | None:
    """One control request to the demo's decoder; None if it does not answer within 5 s."""
    sock = zmq.Context.instance().socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVTIMEO, 5000)
    try:
        sock.connect(f"tcp://127.0.0.1:{control_port}")
        sock.send(protocol.encode_control_request(command))
        return protocol.decode_control_reply(sock.recv())
    except zmq.ZMQError:
        return None
    finally:
        sock.close()


def _follow_to_end_of_data(control_port: int, data_s: float, speed: float, rig: subprocess.Popen,
                           decoder: subprocess.Popen) -> None:
    """Follow the decoder's data time; at the end of the rig's data, disarm and say the input ended cleanly.

    After its last message the simulated rig falls silent, and the loop's
    stall watchdog would take that for a fault (an ERROR line, "rig silent")
    one stall limit later. The decoder's own data time says when it has
    worked through the last message, backlog included; then the demo disarms
    first. Status requests are spaced by half the wall time left (at most
    1 s), so a long demo sends few of them (each is recorded in the log).
    """
    rig_ended_s = None
    while decoder.poll() is None:
        reply = _request(control_port, "status")
        t_s = ((reply or {}).get("status") or {}).get("data_time_s")
        if t_s is not None and t_s >= data_s - END_OF_DATA_SLACK_S:
            if (_request(control_port, "disarm") or {}).get("ok"):
                print(f"demo: the simulated rig finished its {data_s:.0f} s of data (a clean end of input); "
                      f"triggers disarmed; the decoder stops after {IDLE_EXIT_WALL_S:g} s without input",
                      file=sys.stderr)
            return
        if rig.poll() is not None:
            if rig.returncode != 0:
                return
            rig_ended_s = rig_ended_s or time.monotonic()
            if time.monotonic() - rig_ended_s > DECODER_WAIT_S:
                return
        left_s = (data_s - t_s) / speed if t_s is not None and speed > 0 else 1.0
        time.sleep(min(max(left_s / 2, 0.05), 1.0))


def run_demo(config_path: str, speed: float, log_dir: str | None, summary_path: str | None,
             learn_s: float | None, decode_s: float, seed: int, monitor_state_endpoint: list | None = None,
             loop_cpu: int | None = None) -> int:
    ports = {name: free_loopback_port() for name in ("rig", "events", "state", "control")}
    text = demo_config_text(config_path, learn_s, ports)
    learn = tomllib.loads(text)["session"]["learn_s"]
    duration_s = learn + decode_s
    with tempfile.TemporaryDirectory(prefix="placeloop-demo-") as tmp:
        tmp = Path(tmp)
        cfg = tmp / "demo.toml"
        cfg.write_text(text)
        summary = Path(summary_path) if summary_path else tmp / "summary.json"
        events_out = tmp / "standin.json"
        py = sys.executable
        env = dict(os.environ)
        # With a core reserved for the loop, everything else keeps off it.
        others = None
        if loop_cpu is not None and len(os.sched_getaffinity(0)) > 1:
            cpus = os.sched_getaffinity(0) - {loop_cpu}
            others = lambda: os.sched_setaffinity(0, cpus)  # noqa: E731
        standin = subprocess.Popen([py, "-m", "rig_adapters.sim.stimulator_standin", "--events",
                                   f"tcp://127.0.0.1:{ports['events']}", "--out", str(events_out)], env=env,
                                  preexec_fn=others)
        run_cmd = [py, "-m", "rig_adapters.cli", "run", "--config", str(cfg), "--summary", str(summary),
                   "--idle-wall-s", str(IDLE_EXIT_WALL_S)]
        if log_dir:
            run_cmd += ["--log", str(log_dir)]
        if loop_cpu is not None:
            run_cmd += ["--cpu", str(loop_cpu)]
        decoder = subprocess.Popen(run_cmd, env=env)
        rig = subprocess.Popen([py, "-m", "rig_adapters.sim.simulated_rig", "--config", str(cfg), "--pub",
                                f"tcp://127.0.0.1:{ports['rig']}", "--speed", str(speed), "--duration-s",
                                str(duration_s), "--seed", str(seed), "--wait-s", str(RIG_WAIT_S)],
                               env=env, preexec_fn=others)
        if monitor_state_endpoint is not None:
            monitor_state_endpoint.append(f"tcp://127.0.0.1:{ports['state']}")
        started = time.monotonic()
        print(f"demo: rig, decoder and stimulator stand-in started; {learn:.0f} s of learning then "
              f"{decode_s:.0f} s of closed loop at {speed:g}x", file=sys.stderr)
        try:
            _follow_to_end_of_data(ports["control"], duration_s, speed, rig, decoder)
            rig_rc = rig.wait()
            decoder_rc = decoder.wait(timeout=DECODER_WAIT_S)
        except (KeyboardInterrupt, subprocess.TimeoutExpired):
            for proc in (rig, decoder):
                if proc.poll() is None:
                    proc.send_signal(signal.SIGTERM)
            rig.wait(10)
            decoder.wait(30)
            rig_rc, decoder_rc = rig.returncode, decoder.returncode
        finally:
            standin.send_signal(signal.SIGTERM)
            standin.wait(10)
        wall_s = time.monotonic() - started
        if rig_rc != 0 or decoder_rc != 0 or not summary.exists():
            print(f"demo: failed (rig exit {rig_rc}, decoder exit {decoder_rc})", file=sys.stderr)
            return 1
        result = json.loads(summary.read_text())
        received = json.loads(events_out.read_text()) if events_out.exists() else []
        result["standin"] = {"events_received": len(received)}
        result["demo"] = {"wall_s": wall_s, "speed": speed, "learn_s": learn, "decode_s": decode_s}
        summary.write_text(json.dumps(result, indent=2))
        print(format_summary(result))
        if summary_path:
            print(f"summary written to {summary_path}")
        if log_dir:
            print(f"session log kept in {log_dir}")
    return 0


def _fmt(x, spec=".1f") -> str:
    return "n/a" if x is None else format(x, spec)


def _marks_line(ready: dict, unit: str) -> str:
    """The marks' held-out error, for a session that decodes waveform marks; else nothing."""
    held_out = (ready.get("marks") or {}).get("held_out_median_cm")
    return "" if held_out is None else f"; with marks, held out {_fmt(held_out)} {unit}"


def format_summary(s: dict) -> str:
    d, t, lat, inp = s["decode"], s["triggers"], s["latency_ms"], s["input"]
    ready = (s.get("session") or {}).get("readiness") or {}
    # A heading session measures its errors in degrees of heading (decoder.space.headings).
    unit, far = ("deg", "the true heading was far from the arc") if "heading_median_error_deg" in d else (
        "cm", "the animal was far from the zone")
    lines = [
        "",
        "placeloop demo summary",
        "----------------------",
        f"learning   coverage {_fmt(ready.get('coverage'), '.0%')}, spatially tuned units "
        f"{ready.get('n_tuned_units', 'n/a')}, cross-validated error {_fmt(ready.get('median_cv_error_cm'))} {unit}"
        + _marks_line(ready, unit),
        f"zones      share of each zone in the learned map: "
        f"{', '.join(f'{z} {c:.0%}' for z, c in (ready.get('zone_coverage') or {}).items()) or 'n/a'}",
        f"decoding   {d['steps']} steps, median error {_fmt(d['median_error_cm'])} {unit} "
        f"(90th percentile {_fmt(d.get('p90_error_cm'))} {unit})",
        f"triggers   {t['count']} events, {t['false_count']} while {far}; "
        f"stand-in received {s.get('standin', {}).get('events_received', 'n/a')}",
        f"latency    added p50 {_fmt(lat['p50'], '.2f')} ms, p99 {_fmt(lat['p99'], '.2f')} ms, "
        f"max {_fmt(lat['max'], '.2f')} ms",
        f"input      {inp['bad_messages']} bad messages, {inp['gaps']} sequence gaps",
        f"replay     digest {d['digest'][:16]}…",
        f"wall time  {s.get('demo', {}).get('wall_s', 0):.0f} s",
    ]
    ripples = s.get("ripples") or {}
    if ripples.get("source"):
        c = ripples["counters"]
        lines.insert(-2, f"ripples    {c['ripples']} detected ({c['ripples_moving']} while moving), {c['events']} "
                         f"ripple events; {c['lfp_chunks']} LFP chunks, {c['lfp_gaps']} gaps")
    return "\n".join(lines)
