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

#: How long the simulated rig waits for the decoder to subscribe (s): the decoder loads its
#: kernels first, which takes about a minute on a machine whose numba cache is still empty.
RIG_WAIT_S = 300.0


def free_loopback_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def demo_config_text(config_path: str | Path, learn_s: float | None, ports: dict[str, int]) -> str:
    """The config the demo runs: the given file, plus the automatic plan and free loopback ports."""
    doc = tomllib.loads(Path(config_path).read_text())
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
                   "--idle-exit-s", "3"]
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
            rig_rc = rig.wait()
            decoder_rc = decoder.wait(timeout=120)
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


def format_summary(s: dict) -> str:
    d, t, lat, inp = s["decode"], s["triggers"], s["latency_ms"], s["input"]
    ready = (s.get("session") or {}).get("readiness") or {}
    lines = [
        "",
        "placeloop demo summary",
        "----------------------",
        f"learning   coverage {_fmt(ready.get('coverage'), '.0%')}, spatially tuned units "
        f"{ready.get('n_tuned_units', 'n/a')}, cross-validated error {_fmt(ready.get('median_cv_error_cm'))} cm",
        f"zones      share of each zone in the learned map: "
        f"{', '.join(f'{z} {c:.0%}' for z, c in (ready.get('zone_coverage') or {}).items()) or 'n/a'}",
        f"decoding   {d['steps']} steps, median error {_fmt(d['median_error_cm'])} cm "
        f"(90th percentile {_fmt(d.get('p90_error_cm'))} cm)",
        f"triggers   {t['count']} events, {t['false_count']} while the animal was far from the zone; "
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
