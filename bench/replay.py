"""Benchmark of offline replay and of parameter sweeps.

Run ``python bench/replay.py --json out/replay.json`` (``--quick`` for a
short run). Three measurements, each against a baseline taken in the same
run:

1. Replay throughput on one core: a 30-minute session of the simulated rig
   (300 units on a 2,500-bin arena, tracker at 50 Hz) is recorded to a
   temporary session log, then replayed through the full pipeline with this
   process pinned to one core; the figure is recorded seconds per wall
   second (``replay_x_realtime``, target >= 200), the median of three
   replays. The baseline beside it is the time to read the same log without
   decoding (the floor any replay pays). Each replay's CPU time is reported
   beside its wall time (``replay_x_realtime_cpu``), with the load average:
   on a shared machine the wall time includes other processes' share of the
   core, and a loaded machine inflates even the CPU time (shared caches), so
   figures are comparable only within one run. The time taken to make the
   session is reported too, and so is the replay of the same session with a
   heartbeat from the tracker and the truth stream beside every frame
   (``replay_x_realtime_position_heartbeats``), the message mix of earlier
   versions of the simulated rig.
2. Where a replay's time goes, on a shorter session of the same rig: CPU
   time by message kind (the wire reader over each kind's payloads, then the
   pipeline fed the decoded messages in their recorded order, learning and
   decoding apart, spike batches that closed a step apart from those that
   did not), the decoding phase's CPU time per step; and cProfile's top
   functions by own time.
3. Sweep scaling: the same grid of settings (``rules.min_mass`` at four
   values, each replay costing the same) over a shorter session, on 1 and
   on 2 worker processes, alternated and repeated; ``sweep_speedup_2cores``
   is the median 1-worker wall time over the median 2-worker one
   (target >= 1.7).

4. With ``--against DIR``, instead of the above: an A/B of this checkout
   against another placeloop checkout (``git worktree add /tmp/base main``)
   on one shorter session (``--session-s``, default 90 s, a third learned),
   in subprocesses that alternate between the two, ``--rounds`` each; every
   subprocess replays the log ``--ab-replays`` times (the thread's CPU time)
   and times its parts by message kind as in 2. Printed: the medians over the
   rounds of each side, their ratio, and each side's x real time in CPU time.

The sessions are simulated (invented data), for timing only. BLAS and
OpenMP threads are held to one so that "one core" and "two workers" mean
what they say.
"""

from __future__ import annotations

import os

# Before numpy loads: one thread each, so a worker is one core.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import concurrent.futures  # noqa: E402
import cProfile  # noqa: E402
import json  # noqa: E402
import pathlib  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import pstats  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

# This folder holds scripts named like the packages they measure (decoder.py);
# drop it from the import path so that ``import decoder`` finds the package.
_HERE = pathlib.Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if pathlib.Path(p or ".").resolve() != _HERE]

import numpy as np  # noqa: E402
import tomli_w  # noqa: E402

from decoder.config import parse_config  # noqa: E402
from decoder.session.outputs import StepOutput  # noqa: E402
from decoder.session.pipeline import Pipeline  # noqa: E402
from rig_adapters.sessions.recorder import iter_records  # noqa: E402
from rig_adapters.sessions.replay import replay_session, session_config  # noqa: E402
from rig_adapters.wire import protocol  # noqa: E402
from rig_adapters.wire.ingest import CHANNEL_CONTROL, CHANNEL_RIG, Ingest  # noqa: E402
from rig_adapters.sim.recording import record_simulated_session  # noqa: E402
from rig_adapters.offline.sweep import default_workers, plan_sweep, pool_context, run_sweep  # noqa: E402

TARGET_X_REALTIME = 200.0
TARGET_SPEEDUP_2 = 1.7
SWEEP_GRID = {"rules.min_mass": [0.5, 0.6, 0.7, 0.8]}


def bench_config(units: int, learn_s: float, position_heartbeats: bool = False) -> str:
    """TOML of the benchmark rig: a 100 cm square at 2 cm bins (2,500 bins), ``units`` cells.

    The cells are 80 % place cells, 10 % grid cells and 10 % without spatial
    tuning. Cross-validation at fitting time is off: it is a one-off cost
    that is not part of the per-message path this benchmark times. With
    ``position_heartbeats`` the tracker and the truth stream send a heartbeat
    beside every frame as well (the simulated rig did so before; a third
    more messages, which placeloop reads and counts but otherwise ignores).
    """
    n_grid = units // 10
    n_nonspatial = units // 10
    doc = {
        "environment": {"kind": "rectangle", "width_cm": 100.0, "height_cm": 100.0, "bin_cm": 2.0},
        "model": {"smooth_cm": 4.0},
        "decoder": {"window_s": 0.2, "step_s": 0.02, "prior": "state_space", "random_walk_sd_cm": 3.0},
        "sources": {"truth": "truth"},
        "session": {"learn_s": learn_s, "arm_after_fit": True, "cross_validate": False},
        "safety": {"refractory_s": 2.0, "max_per_minute": 30, "max_per_session": 100000},
        "zones": [{"name": "goal", "kind": "circle", "center_cm": [70.0, 70.0], "radius_cm": 12.0}],
        "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
        "simulation": {"n_place_cells": units - n_grid - n_nonspatial, "n_grid_cells": n_grid,
                       "n_nonspatial_cells": n_nonspatial, "position_heartbeats": position_heartbeats},
    }
    return tomli_w.dumps(doc)


def one_core() -> set[int] | None:
    """Pin this process to one core; return the cores it had (None where pinning is unsupported)."""
    if not hasattr(os, "sched_setaffinity"):
        return None
    before = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {min(before)})
    return before


def read_only_s(log_dir: pathlib.Path) -> float:
    """Wall time to read every record of a log without decoding: the floor of any replay."""
    started = time.perf_counter()
    n = 0
    for _ in iter_records(log_dir):
        n += 1
    return time.perf_counter() - started


def profile_replay(log_dir: pathlib.Path, top: int) -> tuple[list[dict], list[dict], float]:
    """Own-time leaders of one profiled replay: by function, and summed by source file."""
    profiler = cProfile.Profile()
    profiler.enable()
    replay_session(log_dir)
    profiler.disable()
    stats = pstats.Stats(profiler)
    total = stats.total_tt
    rows = []
    by_file: dict[str, float] = {}
    for (filename, line, name), (_, ncalls, tottime, cumtime, _) in stats.stats.items():
        where = _source_name(filename)
        rows.append({"function": f"{where}:{line}({name})", "calls": ncalls,
                     "own_s": tottime, "cumulative_s": cumtime, "own_share": tottime / total if total else 0.0})
        by_file[where] = by_file.get(where, 0.0) + tottime
    rows.sort(key=lambda r: r["own_s"], reverse=True)
    files = [{"file": name, "own_s": own, "own_share": own / total if total else 0.0}
             for name, own in sorted(by_file.items(), key=lambda kv: kv[1], reverse=True)]
    return rows[:top], files[:top], total


def time_by_kind(log_dir: pathlib.Path) -> dict:
    """CPU time of a replay's parts by message kind (µs per message), and of the decoding phase per step.

    The wire reader is timed over each kind's payloads in one batch (one
    clock read per kind); the pipeline is fed the decoded messages in their
    recorded order (control records through ``Ingest`` as a replay does),
    with the thread's CPU clock read around each message; the clock's own
    cost, measured here, is taken off. Kinds are split by the session's state
    when the message came (``learning``, ``decoding``) and spike batches by
    whether they closed a step.
    """
    clock = time.thread_time
    records = [r for r in iter_records(log_dir) if r.type == "input" and r.channel in (CHANNEL_RIG, CHANNEL_CONTROL)]
    decoded = [protocol.decode(r.payload) if r.channel == CHANNEL_RIG else None for r in records]
    by_kind: dict[str, list[bytes]] = {}
    for record, msg in zip(records, decoded):
        if msg is not None:
            by_kind.setdefault(type(msg).__name__, []).append(record.payload)
    wire = {}
    for kind, payloads in by_kind.items():
        started = clock()
        for payload in payloads:
            protocol.decode(payload)
        wire[kind] = {"messages": len(payloads), "us_per_message": (clock() - started) / len(payloads) * 1e6}
    started = clock()
    for _ in range(10000):
        clock()
    clock_s = (clock() - started) / 10000
    pipeline = Pipeline(session_config(log_dir))
    ingest = Ingest(pipeline)
    on_message = pipeline.on_message
    spent: dict[str, list[float]] = {}
    steps = 0
    decoding_s = 0.0
    for record, msg in zip(records, decoded):
        state = pipeline.state
        t0 = clock()
        outputs = on_message(msg) if msg is not None else ingest.control_bytes(record.payload)[0]
        took = clock() - t0 - clock_s
        n_steps = sum(type(o) is StepOutput for o in outputs)
        kind = "control" if msg is None else type(msg).__name__
        if kind == "SpikeBatch" and state == "decoding":
            kind += " (closed a step)" if n_steps else " (no step)"
        spent.setdefault(f"{state} {kind}", []).append(took)
        if state == "decoding":
            steps += n_steps
            decoding_s += took + wire.get(type(msg).__name__, {"us_per_message": 0.0})["us_per_message"] * 1e-6
    pipe = {name: {"messages": len(v), "us_per_message": float(np.mean(v)) * 1e6,
                   "us_p50": float(np.median(v)) * 1e6, "share": float(np.sum(v))}
            for name, v in sorted(spent.items())}
    total = sum(p["share"] for p in pipe.values())
    for p in pipe.values():
        p["share"] = p["share"] / total if total else 0.0
    return {"wire": wire, "pipeline": pipe, "decoding_steps": steps,
            "decoding_us_per_step": decoding_s / steps * 1e6 if steps else None, "clock_read_us": clock_s * 1e6}


def _source_name(filename: str) -> str:
    """``decoder/session/pipeline.py`` for placeloop's files, ``numpy`` for a library, ``builtins`` for C."""
    path = pathlib.Path(filename)
    if filename.startswith("~") or filename.startswith("<"):
        return "builtins"
    for package in ("decoder", "rig_adapters"):
        if package in path.parts[:-1]:
            # The last such part: a checkout's own folder may share the package's name.
            at = len(path.parts) - 1 - path.parts[::-1].index(package)
            return "/".join(path.parts[at:])
    for part in path.parts:
        if part in ("numpy", "numba", "scipy", "msgpack"):
            return part
    return path.name


class PhaseClock:
    """Splits a replay's wall and CPU time at its first decoded step: learning and fitting, then decoding."""

    def __init__(self) -> None:
        self.started = time.perf_counter()
        self.started_cpu = time.process_time()
        self.first_step_wall: float | None = None
        self.first_step_cpu: float | None = None
        self.learning_wall_s = 0.0
        self.decoding_wall_s = 0.0
        self.learning_cpu_s = 0.0
        self.decoding_cpu_s = 0.0
        self.cpu_s = 0.0
        self.decoded_data_s = 0.0

    def see(self, output: object) -> None:
        if self.first_step_wall is None and isinstance(output, StepOutput):
            self.first_step_wall = time.perf_counter()
            self.first_step_cpu = time.process_time()

    def finish(self, result) -> None:
        """Called as the replay returns: its CPU time ends here (the summary it built included)."""
        ended_cpu = time.process_time()
        ended = self.started + result.wall_s
        first = self.first_step_wall if self.first_step_wall is not None else ended
        first_cpu = self.first_step_cpu if self.first_step_cpu is not None else ended_cpu
        self.learning_wall_s = first - self.started
        self.decoding_wall_s = ended - first
        self.learning_cpu_s = first_cpu - self.started_cpu
        self.decoding_cpu_s = ended_cpu - first_cpu
        self.cpu_s = ended_cpu - self.started_cpu
        self.decoded_data_s = result.data_s


def time_sweep(log_dir: pathlib.Path, workers: int) -> float:
    plan = plan_sweep([log_dir], SWEEP_GRID, {})
    started = time.perf_counter()
    result = run_sweep(plan, workers=workers)
    wall = time.perf_counter() - started
    failed = sum(r["figures"]["failed"] for r in result.rows)
    if failed:
        raise RuntimeError(f"{failed} replay(s) of the sweep failed; see the log")
    return wall


def ab_worker(log_dir: pathlib.Path, replays: int) -> dict:
    """One side of an A/B, in its own process: CPU time of whole replays, then the parts by message kind."""
    replay_session(log_dir)  # numba's caches and the imports, before anything is timed
    cpu = []
    for _ in range(replays):
        started = time.thread_time()
        replay_session(log_dir)
        cpu.append(time.thread_time() - started)
    started = time.thread_time()
    for _ in iter_records(log_dir):
        pass
    return {"replay_cpu_s": cpu, "read_cpu_s": time.thread_time() - started, "parts": time_by_kind(log_dir)}


def run_ab(args: argparse.Namespace) -> int:
    """This checkout against ``args.against``, alternating subprocesses; medians per part and overall."""
    other = args.against.resolve()
    if not (other / "decoder" / "__init__.py").exists():
        raise SystemExit(f"--against {other}: not a placeloop checkout (no decoder/ package there)")
    here = _HERE.parent
    session_s = args.session_s or 90.0
    sides = {"this": here, "other": other}
    runs: dict[str, list[dict]] = {"this": [], "other": []}
    with tempfile.TemporaryDirectory(prefix="placeloop-bench-ab-") as tmp:
        log_dir = record_simulated_session(parse_config(bench_config(args.units, session_s / 3)),
                                           pathlib.Path(tmp) / "ab", until_s=session_s, seed=12)
        for k in range(args.rounds):
            for side in ("other", "this") if k % 2 == 0 else ("this", "other"):
                print(f"round {k + 1}/{args.rounds}: {side} ({sides[side]}) ...", file=sys.stderr)
                # This script, with the side's packages first on the path.
                env = {**os.environ, "PYTHONPATH": str(sides[side])}
                done = subprocess.run([sys.executable, __file__, "--ab-worker", str(log_dir),
                                       "--ab-replays", str(args.ab_replays)],
                                      env=env, cwd=sides[side], capture_output=True, text=True, check=True)
                runs[side].append(json.loads(done.stdout.strip().splitlines()[-1]))

    def median(side: str, pick) -> float:
        values = [pick(r) for r in runs[side]]
        values = [v for v in values if v is not None]
        return float(np.median(values)) if values else float("nan")

    rows = [("replay, CPU s (median of each run's median)", lambda r: float(np.median(r["replay_cpu_s"])))]
    rows.append(("read the log only, CPU ms", lambda r: r["read_cpu_s"] * 1e3))
    kinds = sorted(set().union(*(r["parts"]["wire"] for r in runs["this"] + runs["other"])))
    for kind in kinds:
        rows.append((f"wire reader {kind}, us/msg", lambda r, k=kind: r["parts"]["wire"].get(k, {}).get("us_per_message")))
    parts = sorted(set().union(*(r["parts"]["pipeline"] for r in runs["this"] + runs["other"])))
    for part in parts:
        rows.append((f"pipeline {part}, us/msg (p50)",
                     lambda r, k=part: r["parts"]["pipeline"].get(k, {}).get("us_p50")))
        rows.append((f"pipeline {part}, us/msg (mean)",
                     lambda r, k=part: r["parts"]["pipeline"].get(k, {}).get("us_per_message")))
    print(f"\nA/B on a {session_s:.0f} s session ({args.units} units, 2,500 bins, {session_s / 3:.0f} s learned), "
          f"{args.rounds} alternating rounds, medians; load average now {os.getloadavg()[0]:.1f}")
    print(f"  this: {here}\n  other: {other}")
    print(f"{'':58s}{'other':>10s}{'this':>10s}{'this/other':>12s}")
    table = []
    for name, pick in rows:
        a, b = median("other", pick), median("this", pick)
        table.append({"part": name, "other": a, "this": b})
        print(f"{name:58s}{a:10.2f}{b:10.2f}{b / a if a else float('nan'):12.3f}")
    cpu_other, cpu_this = table[0]["other"], table[0]["this"]
    print(f"x real time in CPU time: other {session_s / cpu_other:.0f}x, this {session_s / cpu_this:.0f}x "
          f"(target {TARGET_X_REALTIME:g}x)")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps({"session_s": session_s, "this": str(here), "other": str(other),
                                         "table": table, "runs": runs}, indent=2))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", type=pathlib.Path, help="write the results here as JSON")
    parser.add_argument("--quick", action="store_true", help="a 5-minute session and one sweep repeat")
    parser.add_argument("--session-s", type=float, default=None, help="length of the long session (default 1800)")
    parser.add_argument("--units", type=int, default=300)
    parser.add_argument("--learn-s", type=float, default=300.0, help="seconds the replay learns from before decoding")
    parser.add_argument("--sweep-session-s", type=float, default=None,
                        help="length of the session each sweep replay runs (default 180)")
    parser.add_argument("--repeats", type=int, default=None, help="sweep repeats per worker count (default 5)")
    parser.add_argument("--replay-repeats", type=int, default=3, help="repeats of the long replay (default 3)")
    parser.add_argument("--top", type=int, default=15, help="functions to show from the profile")
    parser.add_argument("--against", type=pathlib.Path, default=None,
                        help="A/B against the placeloop checkout in this folder instead (default: off)")
    parser.add_argument("--rounds", type=int, default=5, help="A/B rounds, each side once a round (default 5)")
    parser.add_argument("--ab-replays", type=int, default=3, help="replays timed per A/B subprocess (default 3)")
    parser.add_argument("--ab-worker", type=pathlib.Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.ab_worker is not None:
        print(json.dumps(ab_worker(args.ab_worker, args.ab_replays)))
        return 0
    if args.against is not None:
        return run_ab(args)
    session_s = args.session_s or (300.0 if args.quick else 1800.0)
    learn_s = min(args.learn_s, session_s / 3)
    sweep_session_s = args.sweep_session_s or (90.0 if args.quick else 180.0)
    sweep_learn_s = sweep_session_s / 3
    repeats = args.repeats or (1 if args.quick else 5)
    cores = default_workers()

    with tempfile.TemporaryDirectory(prefix="placeloop-bench-replay-") as tmp:
        tmp = pathlib.Path(tmp)
        print(f"recording a {session_s:.0f} s session, {args.units} units, 2,500 bins ...", file=sys.stderr)
        started = time.perf_counter()
        long_log = record_simulated_session(parse_config(bench_config(args.units, learn_s)), tmp / "long",
                                            until_s=session_s, seed=11)
        make_s = time.perf_counter() - started
        log_mb = (long_log / "session.plog").stat().st_size / 2**20
        beats_log = record_simulated_session(parse_config(bench_config(args.units, learn_s, True)), tmp / "beats",
                                             until_s=session_s, seed=11)
        short_cfg = parse_config(bench_config(args.units, sweep_learn_s))
        short_log = record_simulated_session(short_cfg, tmp / "short", until_s=sweep_session_s, seed=12)

        # Warm numba's caches and the imports in this process before anything is timed.
        replay_session(short_log)

        previous = one_core()
        load_before = os.getloadavg()[0]
        try:
            floor_s = float(np.median([read_only_s(long_log) for _ in range(3)]))
            replays, phases = [], []
            for _ in range(args.replay_repeats):
                print("replaying it on one core ...", file=sys.stderr)
                phase = PhaseClock()
                result = replay_session(long_log, on_output=phase.see)
                phase.finish(result)
                replays.append(result)
                phases.append(phase)
            beats_walls, beats_cpus = [], []
            for _ in range(args.replay_repeats):
                print("replaying the same session with heartbeats from every source ...", file=sys.stderr)
                started_cpu = time.process_time()
                beats_walls.append(replay_session(beats_log).wall_s)
                beats_cpus.append(time.process_time() - started_cpu)
            load_after = os.getloadavg()[0]
            print("timing a short replay by message kind, then profiling it ...", file=sys.stderr)
            parts = time_by_kind(short_log)
            profile, profile_files, profiled_s = profile_replay(short_log, args.top)
        finally:
            if previous is not None:
                os.sched_setaffinity(0, previous)
        wall_s = float(np.median([r.wall_s for r in replays]))
        cpu_s = float(np.median([p.cpu_s for p in phases]))
        beats_wall_s = float(np.median(beats_walls))
        beats_cpu_s = float(np.median(beats_cpus))
        summary = replays[0].summary
        x_realtime = session_s / wall_s

        sweep_walls: dict[int, list[float]] = {1: [], 2: []}
        if cores >= 2:
            # Start the worker fork server (it imports placeloop once) before anything is timed.
            with concurrent.futures.ProcessPoolExecutor(1, mp_context=pool_context()) as pool:
                pool.submit(os.getpid).result()
            for k in range(repeats):
                for workers in (1, 2) if k % 2 == 0 else (2, 1):
                    print(f"sweep of {len(SWEEP_GRID['rules.min_mass'])} settings on {workers} worker(s), "
                          f"repeat {k + 1}/{repeats} ...", file=sys.stderr)
                    sweep_walls[workers].append(time_sweep(short_log, workers))
        else:
            print("only one core available: the sweep scaling is not measured", file=sys.stderr)

    sweep_1 = float(np.median(sweep_walls[1])) if sweep_walls[1] else None
    sweep_2 = float(np.median(sweep_walls[2])) if sweep_walls[2] else None
    speedup = sweep_1 / sweep_2 if sweep_1 and sweep_2 else None
    n_replays = len(SWEEP_GRID["rules.min_mass"])

    print()
    print(f"session: {session_s:.0f} s simulated, {args.units} units, 2,500 bins, {log_mb:.0f} MB log; "
          f"made in {make_s:.1f} s ({session_s / make_s:.0f}x real time)")
    print(f"load average {load_before:.1f} before the replays, {load_after:.1f} after")
    print(f"{'':44s}{'wall s':>10s}{'x real time':>14s}{'CPU s':>10s}{'x (CPU)':>10s}")
    print(f"{'read the log only (floor, median of 3)':44s}{floor_s:10.2f}{session_s / floor_s:14.0f}")
    print(f"{'replay, one core (median of ' + str(len(replays)) + ')':44s}{wall_s:10.2f}{x_realtime:14.0f}"
          f"{cpu_s:10.2f}{session_s / cpu_s:10.0f}")
    if len(replays) > 1:
        each = ", ".join(f"{session_s / r.wall_s:.0f}x ({session_s / p.cpu_s:.0f}x CPU)" for r, p in zip(replays, phases))
        print(f"  each replay: {each}")
    # The phases of the median replay.
    phase = sorted(phases, key=lambda p: p.learning_wall_s + p.decoding_wall_s)[len(phases) // 2]
    decode_phase = phase.decoded_data_s / phase.decoding_wall_s if phase.decoding_wall_s > 0 else None
    learn_phase = learn_s / phase.learning_wall_s if phase.learning_wall_s > 0 else None
    per_step = summary["latency_stages_ms"]["decode_per_step"]
    n_steps = summary["decode"]["steps"]
    print(f"  learning and fitting ({learn_s:.0f} s of data): {phase.learning_wall_s:.2f} s, "
          f"{learn_phase or 0:.0f}x real time; CPU {phase.learning_cpu_s:.2f} s")
    print(f"  decoding ({phase.decoded_data_s:.0f} s of data): {phase.decoding_wall_s:.2f} s, "
          f"{decode_phase or 0:.0f}x real time; {n_steps} steps, "
          f"work on the message that closed a step p50 {per_step['p50']:.3f} ms; CPU {phase.decoding_cpu_s:.2f} s, "
          f"{phase.decoding_cpu_s / max(n_steps, 1) * 1e6:.0f} us per step all-in")
    print(f"  replay / floor: {wall_s / floor_s:.1f}x the time of reading the log")
    print(f"{'the same, heartbeats from every source':44s}{beats_wall_s:10.2f}{session_s / beats_wall_s:14.0f}"
          f"{beats_cpu_s:10.2f}{session_s / beats_cpu_s:10.0f}")
    print()
    print(f"where a replay's CPU time goes by message kind ({sweep_session_s:.0f} s session; "
          f"clock read {parts['clock_read_us']:.2f} us, taken off):")
    print(f"  the wire reader{'':24s}{'messages':>10s}{'us/msg':>9s}")
    for kind, row in parts["wire"].items():
        print(f"  {kind:38s}{row['messages']:10d}{row['us_per_message']:9.1f}")
    print(f"  the pipeline, by state and kind{'':8s}{'messages':>10s}{'us/msg':>9s}{'p50':>9s}{'share':>8s}")
    for kind, row in parts["pipeline"].items():
        print(f"  {kind:38s}{row['messages']:10d}{row['us_per_message']:9.1f}{row['us_p50']:9.1f}{row['share']:8.1%}")
    if parts["decoding_us_per_step"] is not None:
        print(f"  decoding phase, wire reader and pipeline: {parts['decoding_us_per_step']:.0f} us per step "
              f"({parts['decoding_steps']} steps)")
    print()
    print(f"where a replay's time goes (cProfile, {sweep_session_s:.0f} s session, {profiled_s:.1f} s profiled):")
    print(f"{'own s':>8s}{'share':>7s}{'calls':>10s}  function")
    for row in profile:
        print(f"{row['own_s']:8.2f}{row['own_share']:7.1%}{row['calls']:10d}  {row['function']}")
    print("summed by source file:")
    for row in profile_files:
        print(f"{row['own_s']:8.2f}{row['own_share']:7.1%}{'':10s}  {row['file']}")
    print()
    if speedup is not None:
        print(f"sweep of {n_replays} replays of a {sweep_session_s:.0f} s session (median of {repeats}):")
        print(f"  1 worker {sweep_1:.2f} s ({n_replays / sweep_1 * 60:.1f} replays/min), "
              f"2 workers {sweep_2:.2f} s ({n_replays / sweep_2 * 60:.1f} replays/min): {speedup:.2f}x")
    print()
    checks = [
        (f"replay >= {TARGET_X_REALTIME:g}x real time on one core", x_realtime >= TARGET_X_REALTIME),
        (f"sweep >= {TARGET_SPEEDUP_2:g}x on 2 workers", None if speedup is None else speedup >= TARGET_SPEEDUP_2),
    ]
    for text, ok in checks:
        print(f"  {'met   ' if ok else 'n/a   ' if ok is None else 'MISSED'} {text}")
    if args.quick:
        print("  (--quick: a shorter session than the target's 30 minutes)")

    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        report = {
            "replay_x_realtime": x_realtime,
            "sweep_speedup_2cores": speedup,
            "replay_wall_s": wall_s,
            "replay_wall_s_all": [r.wall_s for r in replays],
            "replay_x_realtime_cpu": session_s / cpu_s,
            "replay_cpu_s": cpu_s,
            "replay_cpu_s_all": [p.cpu_s for p in phases],
            "load_average": [round(load_before, 2), round(load_after, 2)],
            "replay_x_realtime_position_heartbeats": session_s / beats_wall_s,
            "replay_wall_s_all_position_heartbeats": beats_walls,
            "replay_cpu_s_all_position_heartbeats": beats_cpus,
            "decode_phase_x_realtime": decode_phase,
            "decode_phase_wall_s": phase.decoding_wall_s,
            "learn_phase_x_realtime": learn_phase,
            "learn_phase_wall_s": phase.learning_wall_s,
            "learn_phase_cpu_s": phase.learning_cpu_s,
            "decode_phase_cpu_s": phase.decoding_cpu_s,
            "read_only_wall_s": floor_s,
            "read_only_x_realtime": session_s / floor_s,
            "session_s": session_s,
            "learn_s": learn_s,
            "units": args.units,
            "bins": 2500,
            "log_mb": log_mb,
            "make_session_s": make_s,
            "decode_steps": summary["decode"]["steps"],
            "decode_per_step_ms": summary["latency_stages_ms"]["decode_per_step"],
            "median_error_cm": summary["decode"]["median_error_cm"],
            "time_by_kind": parts,
            "profile_top": profile,
            "profile_by_file": profile_files,
            "profile_session_s": sweep_session_s,
            "sweep": {"grid": SWEEP_GRID, "session_s": sweep_session_s, "repeats": repeats,
                      "wall_s_1_worker": sweep_walls[1], "wall_s_2_workers": sweep_walls[2],
                      "median_s_1_worker": sweep_1, "median_s_2_workers": sweep_2},
            "targets": {"replay_x_realtime": TARGET_X_REALTIME, "sweep_speedup_2cores": TARGET_SPEEDUP_2},
            "meta": {"quick": args.quick, "cores_available": cores, "python": platform.python_version(),
                     "machine": platform.machine(), "processor": platform.processor()},
        }
        args.json.write_text(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
