"""End-to-end latency and memory of the live loop under load.

    python bench/loop.py --json out/loop.json [--duration-s 600] [--speed 4] [--config SCENARIO]

Three measurements in one run:

1. the floor: raw ZeroMQ one-way latency between two processes on this
   machine (PUB → SUB over loopback TCP, a payload the size of a spike batch),
   stamped with the monotonic clock both processes share;
2. the loop: the simulated rig publishing at ``speed`` × real time into
   ``placeloop run``, which learns for ``learn_s`` simulated seconds, fits,
   arms and then decodes every step; the loop's own added latency (receipt
   of the message that closed a step → its output handed to ZeroMQ) for
   every step, beside the decoding step's own time (the ingest and pipeline
   work of that message per step closed: ``decode_step_ms``), so that what
   the loop adds beyond the step is a figure of its own
   (``added_minus_step_ms``: each percentile of the added latency less the
   same percentile of the step). The session is ours (300 units, a
   10,000-bin arena, 20 ms steps with the state-space prior) unless
   ``--config`` names a scenario or a config file, whose rig, learning time
   and decoding it runs (``--config tetrode_marks_arena``: clusterless);
3. memory: the loop's resident set sampled every second; growth is the last
   sample against the sample after warm-up (the model fitted, numba compiled,
   and at least the first fifth of the run).

Targets (issue 3): added p99 ≤ 2 ms and ≤ 10× the floor's p99; no growth of
memory over a 10-minute accelerated run. Clusterless (issue 13): p99 ≤ 2 ms
beyond the decoding step itself.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

import numpy as np
import psutil
import tomli_w
import zmq

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from decoder.config import load_config  # noqa: E402
from rig_adapters.console import config_path  # noqa: E402
from rig_adapters.sim.demo import demo_config_text, free_loopback_port  # noqa: E402


def bench_config(ports: dict, units: int, learn_s: float) -> dict:
    n_grid = units // 10
    n_nonspatial = units // 10
    return {
        "environment": {"kind": "rectangle", "width_cm": 200.0, "height_cm": 200.0, "bin_cm": 2.0},
        "model": {"smooth_cm": 4.0, "cv_folds": 2},
        "decoder": {"window_s": 0.2, "step_s": 0.02, "prior": "state_space", "random_walk_sd_cm": 3.0},
        "sources": {"truth": "truth"},
        "session": {"learn_s": learn_s, "arm_after_fit": True, "cross_validate": False},
        "safety": {"refractory_s": 2.0, "max_per_minute": 30, "max_per_session": 100000},
        "zones": [{"name": "goal", "kind": "circle", "center_cm": [150.0, 150.0], "radius_cm": 12.0}],
        "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
        "endpoints": {
            "rig": [f"tcp://127.0.0.1:{ports['rig']}"],
            "events": f"tcp://127.0.0.1:{ports['events']}",
            "state": f"tcp://127.0.0.1:{ports['state']}",
            "control": f"tcp://127.0.0.1:{ports['control']}",
        },
        "simulation": {
            "n_place_cells": units - n_grid - n_nonspatial,
            "n_grid_cells": n_grid,
            "n_nonspatial_cells": n_nonspatial,
        },
    }


def floor_child(endpoint: str, n: int, payload_bytes: int) -> None:
    ctx = zmq.Context.instance()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 1000)
    pub.bind(endpoint)
    time.sleep(1.0)  # let the subscriber join
    pad = os.urandom(payload_bytes)
    for _ in range(n):
        pub.send(np.float64(time.perf_counter()).tobytes() + pad)
        time.sleep(0.005)
    pub.close()


def measure_floor(n: int, payload_bytes: int) -> dict:
    port = free_loopback_port()
    endpoint = f"tcp://127.0.0.1:{port}"
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.setsockopt(zmq.LINGER, 0)
    sub.connect(endpoint)
    child = subprocess.Popen([sys.executable, __file__, "--floor-child", endpoint, str(n), str(payload_bytes)])
    lat = []
    try:
        while len(lat) < n:
            if not sub.poll(5000):
                break
            data = sub.recv()
            lat.append((time.perf_counter() - np.frombuffer(data[:8], np.float64)[0]) * 1e3)
    finally:
        sub.close()
        child.wait(30)
    a = np.asarray(lat)
    return {"p50": float(np.percentile(a, 50)), "p99": float(np.percentile(a, 99)), "n": int(a.size)}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default=None, help="write results here")
    parser.add_argument("--duration-s", type=float, default=600.0, help="wall seconds of the loaded run")
    parser.add_argument("--speed", type=float, default=4.0, help="simulated seconds per wall second")
    parser.add_argument("--units", type=int, default=300, help="units of the default session")
    parser.add_argument("--learn-s", type=float, default=None,
                        help="simulated seconds the loop learns from (default 240, or the scenario's)")
    parser.add_argument("--config", default=None, metavar="SCENARIO",
                        help="a scenario name or config file to run instead of the default session")
    parser.add_argument("--floor-child", nargs=3, metavar=("ENDPOINT", "N", "BYTES"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.floor_child:
        floor_child(args.floor_child[0], int(args.floor_child[1]), int(args.floor_child[2]))
        return 0

    print("measuring the ZeroMQ floor ...", file=sys.stderr)
    floor = measure_floor(3000, payload_bytes=600)
    with tempfile.TemporaryDirectory(prefix="placeloop-bench-") as tmp:
        tmp = Path(tmp)
        ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
        cfg = tmp / "bench.toml"
        if args.config:
            # The demo's plan: learn, fit and arm on data time, on free loopback ports, no TTL.
            text = demo_config_text(config_path(args.config), args.learn_s, ports)
            cfg.write_text(text)
            learn_s = tomllib.loads(text)["session"]["learn_s"]
        else:
            learn_s = 240.0 if args.learn_s is None else args.learn_s
            cfg.write_text(tomli_w.dumps(bench_config(ports, args.units, learn_s)))
        summary_path = tmp / "summary.json"
        loop = subprocess.Popen([sys.executable, "-m", "rig_adapters.cli", "run", "--config", str(cfg),
                                 "--summary", str(summary_path), "--idle-wall-s", "3"],
                                cwd=ROOT, stderr=subprocess.DEVNULL)
        sim_s = args.duration_s * args.speed
        rig = subprocess.Popen([sys.executable, "-m", "rig_adapters.sim.simulated_rig", "--config", str(cfg), "--pub",
                                f"tcp://127.0.0.1:{ports['rig']}", "--speed", str(args.speed), "--duration-s",
                                str(sim_s), "--seed", "12", "--wait-s", "300"], cwd=ROOT)
        proc = psutil.Process(loop.pid)
        rss = []
        print(f"running the loop for {args.duration_s:.0f} s at {args.speed:g}x ...", file=sys.stderr)
        while rig.poll() is None:
            try:
                rss.append((time.monotonic(), proc.memory_info().rss))
            except psutil.Error:
                break
            time.sleep(1.0)
        loop.wait(60)
        summary = json.loads(summary_path.read_text())
        summary_bins = int(load_config(cfg).environment.valid_mask.sum())
    t = np.array([r[0] for r in rss])
    mem = np.array([r[1] for r in rss], float)
    # Warm-up ends after the model is fitted (learning grows memory by design) and
    # after the first fifth of the run, whichever is later.
    warm_s = max(0.2 * (t[-1] - t[0]), learn_s / args.speed + 20.0) if mem.size else 0.0
    after_warmup = mem[min(np.searchsorted(t, t[0] + warm_s), mem.size - 1)] if mem.size else float("nan")
    growth = float((mem[-1] - after_warmup) / after_warmup * 100) if mem.size else float("nan")
    added = summary["latency_ms"]
    step = summary["latency_stages_ms"]["decode_per_step"]
    beyond = {q: added[q] - step[q] for q in ("p50", "p99")}
    result = {
        "config": args.config or "default",
        "added_ms": {"p50": added["p50"], "p99": added["p99"], "max": added["max"], "n": added["n"]},
        "decode_step_ms": {"p50": step["p50"], "p99": step["p99"], "max": step["max"], "n": step["n"]},
        "added_minus_step_ms": beyond,
        "floor_one_way_ms": floor,
        "ratio_p99_to_floor": added["p99"] / floor["p99"],
        "rss_growth_pct": growth,
        "rss_mb": {"after_warmup": after_warmup / 2**20, "end": float(mem[-1]) / 2**20 if mem.size else None},
        "decode_steps": summary["decode"]["steps"],
        "median_error_cm": summary["decode"]["median_error_cm"],
        "units": None if args.config else args.units,
        "bins": summary_bins,
        "learn_s": learn_s,
        "duration_s": args.duration_s,
        "speed": args.speed,
    }
    print()
    print(f"{'':24s}{'p50 ms':>10s}{'p99 ms':>10s}{'max ms':>10s}")
    print(f"{'ZeroMQ floor (one way)':24s}{floor['p50']:10.3f}{floor['p99']:10.3f}{'':>10s}")
    print(f"{'added by placeloop':24s}{added['p50']:10.3f}{added['p99']:10.3f}{added['max']:10.3f}")
    print(f"{'the decoding step':24s}{step['p50']:10.3f}{step['p99']:10.3f}{step['max']:10.3f}")
    print(f"{'added less the step':24s}{beyond['p50']:10.3f}{beyond['p99']:10.3f}{'':>10s}")
    print(f"added p99 / floor p99: {result['ratio_p99_to_floor']:.1f}x (target <= 10x, and p99 <= 2 ms)")
    print(f"steps decoded: {result['decode_steps']}, median error {result['median_error_cm']} cm")
    print(f"resident memory: {result['rss_mb']['after_warmup']:.0f} MB after warm-up, "
          f"{result['rss_mb']['end']:.0f} MB at the end ({growth:+.1f}%)")
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
