"""Benchmark of the Bayesian decoder: compiled kernels against their numpy twins.

Run ``python bench/decoder.py --json out/decoder.json`` (``--quick`` for a
short run). For 50, 300 and 1000 units on a 200-bin linear track, a
2,500-bin and a 10,000-bin arena, with the uniform and the state-space
prior over sliding windows (``[decoder] method = "sliding_window"``) and
as the filter (``method = "filter"``, the default: non-overlapping 20 ms
bins, a uniform jump, a likelihood temperature; ``filter_drift`` the same
with the walk tilted towards the decoded velocity), the numba decoder and the
same decoder on the numpy twins decode the same steps in the same run; the
table gives per-step latency (median and 99th percentile, after warm-up)
and the ratio of the medians.

Spikes are simulated, for timing only: place-cell-like Gaussian rate maps
with mean rates of 0.5-2 Hz over the environment, a smooth random walk for
the animal, a 200 ms window moved in 20 ms steps (so that most units are
silent in any one step).

One more case stands for the offline replay of a 30-minute session: 300
units on the 2,500-bin arena with the state-space prior and one circular
zone, with a per-unit background rate on top of the place fields so that
about 100 units fire per window. Its figure feeds the replay benchmark
(``bench/replay.py``), which holds the replay's own target.

The held-out pass of calibration is timed as one compiled call
(``BayesDecoder.decode_held_out``), on its numpy twin, and as the compiled
``decode`` called window by window, which it replaced.

Three more figures: the time for :class:`decoder.encoding.place_model.PlaceModel` to
take 30 simulated minutes (tracker at 50 Hz, 300 units) through its update
methods and fit them, the time it then takes to fit the filter's likelihood
temperature and its drift for 20 ms steps (``PlaceModel.likelihood_temperature``), and the
time for a fresh Python process, with numba's on-disk cache warm, to import
the decoder and decode its first windows.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import pathlib
import platform
import subprocess
import sys
import time

# This script is named like the package it measures; drop its own folder from
# the import path so that ``import decoder`` finds the package.
_HERE = pathlib.Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if pathlib.Path(p or ".").resolve() != _HERE]

import numba  # noqa: E402
import numpy as np  # noqa: E402

from decoder.inference.decoding import BayesDecoder  # noqa: E402
from decoder.space.environments import Arena, Environment, LinearTrack  # noqa: E402
from decoder.encoding.place_model import PlaceModel  # noqa: E402
from decoder.space.zones import CircleZone, zone_masks  # noqa: E402

WINDOW_S = 0.2
STEP_S = 0.02
RANDOM_WALK_SD_CM = 3.0
#: The filter case: walk s.d. per 20 ms step (about what a rat's tracked
#: movement gives, bench/accuracy.py), the default jump and a typical
#: fitted temperature.
FILTER_WALK_SD_CM, FILTER_UNIFORM_WEIGHT, FILTER_TEMPERATURE = 1.7, 1e-3, 2.0
#: The filter with a drift towards the decoded velocity (``"filter_drift"``):
#: a gain and time constant like those fitted on bench/accuracy.py's sessions.
FILTER_DRIFT_GAIN, FILTER_VELOCITY_TIME_CONSTANT_S = 1.0, 1.0
KINDS = ("uniform", "state_space", "filter", "filter_drift")
BACKGROUND_HZ = 0.05
TARGET_UNITS, TARGET_BINS = 300, 10_000
TARGET_P99_MS, TARGET_RATIO = 0.5, 3.0
TARGET_FIT_S, TARGET_WARM_START_S = 5.0, 2.0
TARGET_TEMPERATURE_FIT_S = 5.0

ENVIRONMENTS = {
    200: lambda: LinearTrack((0, 0), (400, 0), bin_cm=2.0),
    2_500: lambda: Arena.rectangle(100, 100, bin_cm=2.0),
    10_000: lambda: Arena.rectangle(200, 200, bin_cm=2.0),
}


def place_maps(env: Environment, n_units: int, rng: np.random.Generator) -> np.ndarray:
    """Gaussian place fields whose mean rate over the environment is 0.5-2 Hz.

    Returns
    -------
    ndarray of float64, shape (n_units, n_bins)
    """
    centers = env.bin_centers_cm
    lo, hi = centers.min(axis=0), centers.max(axis=0)
    field_sd_cm = 0.05 * float(np.max(hi - lo)) + 5.0
    field_xy = rng.uniform(lo, hi, (n_units, 2))
    d2 = ((centers[None, :, :] - field_xy[:, None, :]) ** 2).sum(axis=-1)
    shape = np.exp(-0.5 * np.minimum(d2 / field_sd_cm**2, 600.0))
    mean_hz = rng.uniform(0.5, 2.0, n_units)
    return BACKGROUND_HZ + shape * ((mean_hz - BACKGROUND_HZ) / shape.mean(axis=1))[:, None]


def trajectory(
    env: Environment, n: int, dt_s: float, rng: np.random.Generator, speed_cm_s: float = 20.0
) -> np.ndarray:
    """A smooth random run that stays inside the environment.

    Returns
    -------
    ndarray of float64, shape (n, 2)
    """
    centers = env.bin_centers_cm[env.valid_mask]
    if env.grid_shape is None:
        lo, hi = centers.min(axis=0), centers.max(axis=0)
        direction = (hi - lo) / np.linalg.norm(hi - lo)
        length = float(np.linalg.norm(hi - lo))
        s = np.cumsum(np.full(n, speed_cm_s * dt_s))
        along = length - np.abs(np.mod(s, 2 * length) - length)
        return lo + along[:, None] * direction[None, :]
    lo, hi = centers.min(axis=0), centers.max(axis=0)
    xy = np.empty((n, 2))
    pos = (lo + hi) / 2
    heading = 0.0
    for i in range(n):
        heading += rng.normal(0, 0.3)
        step = speed_cm_s * dt_s * np.array([np.cos(heading), np.sin(heading)])
        nxt = pos + step
        if np.any(nxt < lo) or np.any(nxt > hi):
            heading += np.pi
            nxt = np.clip(pos - step, lo, hi)
        pos = nxt
        xy[i] = pos
    return xy


def window_counts(
    env: Environment, rates: np.ndarray, n_steps: int, rng: np.random.Generator, window_s: float = WINDOW_S
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Spike counts of ``n_steps`` windows of ``window_s`` moved by ``STEP_S``."""
    per_window = round(window_s / STEP_S)
    xy = trajectory(env, n_steps + per_window, STEP_S, rng)
    bins = env.bin_index(xy)
    step_counts = rng.poisson(rates[:, bins].T * STEP_S)
    cum = np.vstack([np.zeros((1, rates.shape[0]), np.int64), np.cumsum(step_counts, axis=0)])
    windows = []
    for k in range(n_steps):
        counts = cum[k + per_window] - cum[k]
        rows = np.flatnonzero(counts).astype(np.int64)
        windows.append((rows, counts[rows].astype(np.float64)))
    return windows


def time_steps(decoder: BayesDecoder, windows: list, warmup: int) -> tuple[np.ndarray, np.ndarray]:
    """Latency of each ``decode`` call in ms, after ``warmup`` untimed calls.

    Returns
    -------
    wall_ms, cpu_ms : ndarray of float64, shape (len(windows) - warmup,)
        Elapsed time, and this thread's CPU time (which leaves out the time
        the scheduler gave to other processes on a shared machine).
    """
    for rows, counts in windows[:warmup]:
        decoder.decode(rows, counts)
    gc.collect()
    n = len(windows) - warmup
    wall, cpu = np.empty(n), np.empty(n)
    wall_clock, cpu_clock = time.perf_counter, time.thread_time
    for i, (rows, counts) in enumerate(windows[warmup:]):
        c0 = cpu_clock()
        t0 = wall_clock()
        decoder.decode(rows, counts)
        wall[i] = wall_clock() - t0
        cpu[i] = cpu_clock() - c0
    return wall * 1e3, cpu * 1e3


def run_case(env: Environment, n_units: int, kind: str, n_steps: int, warmup: int, seed: int,
             temperature: float = FILTER_TEMPERATURE) -> dict:
    """One case; ``kind`` is a prior of the sliding window (``"uniform"``, ``"state_space"``) or ``"filter"``."""
    rng = np.random.default_rng(seed)
    rates = place_maps(env, n_units, rng)
    windows = window_counts(env, rates, n_steps + warmup, rng, STEP_S if kind.startswith("filter") else WINDOW_S)
    return time_backends(env, rates, windows, kind, warmup, temperature=temperature)


def _decoder(env: Environment, rates: np.ndarray, kind: str, zones: np.ndarray | None, backend: str,
             temperature: float) -> BayesDecoder:
    """The decoder of a case, as ``decoder.session.steps.build_decoder`` makes it for that method."""
    if kind in ("filter", "filter_drift"):
        drift = kind == "filter_drift"
        return BayesDecoder(
            rates, env, env.valid_mask, STEP_S, prior="state_space", random_walk_sd_cm=FILTER_WALK_SD_CM,
            uniform_weight=FILTER_UNIFORM_WEIGHT, likelihood_temperature=temperature, zone_masks=zones,
            drift_gain=FILTER_DRIFT_GAIN if drift else 0.0,
            velocity_time_constant_s=FILTER_VELOCITY_TIME_CONSTANT_S, backend=backend,
        )
    return BayesDecoder(
        rates, env, env.valid_mask, WINDOW_S, prior=kind, random_walk_sd_cm=RANDOM_WALK_SD_CM, zone_masks=zones,
        backend=backend,
    )


def time_backends(
    env: Environment, rates: np.ndarray, windows: list, kind: str, warmup: int, zones: np.ndarray | None = None,
    temperature: float = FILTER_TEMPERATURE,
) -> dict:
    """Per-step latency of the numba decoder and of the same decoder on the numpy twins."""
    result = {"units": rates.shape[0], "bins": env.n_bins, "prior": kind}
    for backend in ("numba", "numpy"):
        decoder = _decoder(env, rates, kind, zones, backend, temperature)
        wall_ms, cpu_ms = time_steps(decoder, windows, warmup)
        result[f"{backend}_p50_ms"] = float(np.median(wall_ms))
        result[f"{backend}_p99_ms"] = float(np.percentile(wall_ms, 99))
        result[f"{backend}_cpu_p99_ms"] = float(np.percentile(cpu_ms, 99))
    result["ratio_p50"] = result["numpy_p50_ms"] / result["numba_p50_ms"]
    result["fired_units_mean"] = float(np.mean([w[0].size for w in windows]))
    return result


def replay_case(n_steps: int, warmup: int, seed: int) -> dict:
    """The replay case: 300 units, 2,500 bins, state space, one zone, ~100 units firing per window."""
    env = ENVIRONMENTS[2_500]()
    rng = np.random.default_rng(seed)
    rates = place_maps(env, 300, rng) * 1.6 + rng.uniform(0.3, 2.5, 300)[:, None]
    windows = window_counts(env, rates, n_steps + warmup, rng)
    zones = zone_masks([CircleZone("reward", center_cm=(70.0, 30.0), radius_cm=10.0)], env)
    return time_backends(env, rates, windows, "state_space", warmup, zones)


def held_out_pass_case(n_steps: int, seed: int) -> dict:
    """Calibration's held-out pass (300 units, 2,500 bins, the filter): µs per window, three ways.

    ``BayesDecoder.decode_held_out`` compiled and on its numpy twin (the
    baseline), and the compiled ``decode`` called window by window from
    Python with the mass above the known bin summed in numpy, as the pass
    did before it was one call. Median of five runs each.
    """
    env = ENVIRONMENTS[2_500]()
    rng = np.random.default_rng(seed)
    rates = place_maps(env, 300, rng)
    windows = window_counts(env, rates, n_steps, rng, STEP_S)
    rows = np.concatenate([w[0] for w in windows])
    counts = np.concatenate([w[1] for w in windows])
    start = np.concatenate([[0], np.cumsum([w[0].size for w in windows])]).astype(np.int64)
    true_bins = rng.integers(0, env.n_bins, n_steps)
    keep = np.arange(n_steps) % 8 == 0

    def one_call(backend: str) -> float:
        decoder = _decoder(env, rates, "filter", None, backend, FILTER_TEMPERATURE)
        t0 = time.thread_time()
        decoder.decode_held_out(rows, counts, start, true_bins, keep)
        return time.thread_time() - t0

    def window_by_window() -> float:
        decoder = _decoder(env, rates, "filter", None, "numba", FILTER_TEMPERATURE)
        t0 = time.thread_time()
        for (r, c), true_bin in zip(windows, true_bins):
            p = decoder.decode(r, c).posterior
            float(p[p > p[true_bin]].sum())
        return time.thread_time() - t0

    one_call("numba")
    window_by_window()
    per_window_us = {
        "numba_us": float(np.median([one_call("numba") for _ in range(5)])) / n_steps * 1e6,
        "decode_loop_us": float(np.median([window_by_window() for _ in range(5)])) / n_steps * 1e6,
        "numpy_us": float(np.median([one_call("numpy") for _ in range(5)])) / n_steps * 1e6,
    }
    return {"steps": n_steps, **per_window_us}


def fit_time_s(minutes: float, n_units: int, seed: int) -> tuple[float, float]:
    """Seconds to feed ``minutes`` of 50 Hz frames and spikes to a PlaceModel and fit it, then its temperature."""
    env = ENVIRONMENTS[2_500]()
    rng = np.random.default_rng(seed)
    rates = place_maps(env, n_units, rng)
    frame_dt = 0.02
    n_frames = int(round(minutes * 60 / frame_dt))
    xy = trajectory(env, n_frames, frame_dt, rng)
    t = np.arange(n_frames) * frame_dt
    chunk = 50  # one second of frames per update, as a live session delivers them
    batches = []
    for start in range(0, n_frames, chunk):
        sl = slice(start, start + chunk)
        counts = rng.poisson(rates[:, env.bin_index(xy[sl])] * frame_dt)
        unit, frame = np.nonzero(counts)
        reps = counts[unit, frame]
        spike_t = np.repeat(t[sl][frame], reps) + rng.uniform(0, frame_dt, reps.sum())
        order = np.argsort(spike_t)
        batches.append((t[sl], xy[sl], spike_t[order], np.repeat(unit, reps)[order]))
    model = PlaceModel(env)
    t0 = time.perf_counter()
    for frame_t, frame_xy, spike_t, spike_unit in batches:
        model.update_frames(frame_t, frame_xy)
        model.update_spikes(spike_t, spike_unit)
    model.fit()
    t1 = time.perf_counter()
    model.likelihood_temperature(STEP_S)
    return t1 - t0, time.perf_counter() - t1


WARM_START_SCRIPT = """
import numpy as np
from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Arena
env = Arena.rectangle(100, 100, bin_cm=2.0)
rates = np.full((300, env.n_bins), 1.0)
dec = BayesDecoder(rates, env, env.valid_mask, 0.2, prior="state_space", random_walk_sd_cm=3.0)
dec.decode(np.array([3, 7]), np.array([1.0, 2.0]))
dec.decode(np.array([5]), np.array([1.0]))
"""


def warm_start_s(root: pathlib.Path) -> float:
    """Wall time of a fresh interpreter from start to its first decoded windows (cache warm).

    The script decodes two windows so that the prediction kernel, first
    needed at the second window, is loaded as well. A first run fills the
    cache in case this process did not; the second is timed.
    """
    cmd = [sys.executable, "-c", WARM_START_SCRIPT]
    subprocess.run(cmd, cwd=root, check=True)
    t0 = time.perf_counter()
    subprocess.run(cmd, cwd=root, check=True)
    return time.perf_counter() - t0


def print_table(cases: list[dict]) -> None:
    head = (
        f"{'units':>6} {'bins':>6} {'kind':>12} {'fired':>6} {'numba p50':>10} {'numba p99':>10} "
        f"{'(cpu p99)':>10} {'numpy p50':>10} {'numpy p99':>10} {'ratio':>6}"
    )
    print(head)
    print("-" * len(head))
    for c in cases:
        print(
            f"{c['units']:>6} {c['bins']:>6} {c['prior']:>12} {c['fired_units_mean']:>6.1f} "
            f"{c['numba_p50_ms']:>10.3f} {c['numba_p99_ms']:>10.3f} {c['numba_cpu_p99_ms']:>10.3f} "
            f"{c['numpy_p50_ms']:>10.3f} "
            f"{c['numpy_p99_ms']:>10.3f} {c['ratio_p50']:>6.1f}"
        )
    print("(latency in ms per decode call; cpu p99 counts only this thread's CPU time, so it leaves out\n"
          " preemption by other processes; fired = mean units with a spike per window)")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=pathlib.Path, help="write the results here as JSON")
    parser.add_argument(
        "--quick", action="store_true", help="few steps, 300 units only, 3 simulated minutes of fitting"
    )
    parser.add_argument("--steps", type=int, help="timed steps per case (default 400, quick 60)")
    parser.add_argument(
        "--temperature", type=float, default=FILTER_TEMPERATURE,
        help=f"likelihood temperature of the filter cases (default {FILTER_TEMPERATURE:g}, a typical fitted one)",
    )
    args = parser.parse_args(argv)
    n_steps = args.steps or (60 if args.quick else 400)
    warmup = 10 if args.quick else 30
    unit_counts = (300,) if args.quick else (50, 300, 1000)
    fit_minutes = 3.0 if args.quick else 30.0

    print(
        f"window {WINDOW_S * 1e3:.0f} ms, step {STEP_S * 1e3:.0f} ms, random walk sd {RANDOM_WALK_SD_CM} cm/step, "
        f"{n_steps} timed steps per case after {warmup} warm-up; numba {numba.__version__}, "
        f"numpy {np.__version__}, {os.cpu_count()} cores"
    )
    load_before = os.getloadavg()
    cases = []
    seed = 0
    for n_bins, make_env in ENVIRONMENTS.items():
        env = make_env()
        assert env.n_bins == n_bins
        for n_units in unit_counts:
            for kind in KINDS:
                seed += 1
                cases.append(run_case(env, n_units, kind, n_steps, warmup, seed, args.temperature))
    replay = replay_case(max(n_steps, 2000), warmup, seed=77)
    load_after = os.getloadavg()
    print_table(cases)
    print(
        f"replay case (300 units, 2,500 bins, state space, 1 zone, {replay['fired_units_mean']:.0f} units firing "
        f"per window): numba p50 {replay['numba_p50_ms'] * 1e3:.1f} us, p99 {replay['numba_p99_ms'] * 1e3:.1f} us; "
        f"numpy p50 {replay['numpy_p50_ms'] * 1e3:.1f} us; ratio {replay['ratio_p50']:.1f}x"
    )
    print(
        f"1-min load average {load_before[0]:.2f} before the cases, {load_after[0]:.2f} after "
        f"({os.cpu_count()} cores)"
    )

    held_out = held_out_pass_case(500 if args.quick else 2000, seed=78)
    print(
        f"calibration's held-out pass (300 units, 2,500 bins, filter, {held_out['steps']} windows, thread CPU): "
        f"one compiled call {held_out['numba_us']:.1f} us per window, the compiled decode() window by window "
        f"{held_out['decode_loop_us']:.1f} us, the numpy twin {held_out['numpy_us']:.1f} us; "
        f"ratio to the twin {held_out['numpy_us'] / held_out['numba_us']:.1f}x"
    )

    fit_s, temperature_s = fit_time_s(fit_minutes, 300, seed=99)
    print(
        f"PlaceModel, {fit_minutes:g} simulated min at 50 Hz, 300 units, 2,500 bins: updates + fit {fit_s:.2f} s, "
        f"then the likelihood temperature for 20 ms steps {temperature_s:.2f} s"
    )
    warm_s = warm_start_s(_HERE.parent)
    print(f"fresh process to first decoded windows with a warm cache: {warm_s:.2f} s")

    target, target_filter, target_drift = (
        next(c for c in cases if (c["units"], c["bins"], c["prior"]) == (TARGET_UNITS, TARGET_BINS, kind))
        for kind in ("state_space", "filter", "filter_drift")
    )
    checks = [
        (
            f"{TARGET_UNITS} units x {TARGET_BINS} bins, state space: numba p99 <= {TARGET_P99_MS} ms",
            target["numba_p99_ms"] <= TARGET_P99_MS,
        ),
        (
            f"... counting CPU time only: numba p99 <= {TARGET_P99_MS} ms",
            target["numba_cpu_p99_ms"] <= TARGET_P99_MS,
        ),
        (f"... and >= {TARGET_RATIO:g}x the numpy twin at the median", target["ratio_p50"] >= TARGET_RATIO),
        (
            f"{TARGET_UNITS} units x {TARGET_BINS} bins, filter: numba p99 <= {TARGET_P99_MS} ms",
            target_filter["numba_p99_ms"] <= TARGET_P99_MS,
        ),
        (
            f"... counting CPU time only: numba p99 <= {TARGET_P99_MS} ms",
            target_filter["numba_cpu_p99_ms"] <= TARGET_P99_MS,
        ),
        (f"... and >= {TARGET_RATIO:g}x the numpy twin at the median", target_filter["ratio_p50"] >= TARGET_RATIO),
        (
            f"{TARGET_UNITS} units x {TARGET_BINS} bins, filter with drift: numba p99 <= {TARGET_P99_MS} ms",
            target_drift["numba_p99_ms"] <= TARGET_P99_MS,
        ),
        (
            f"... counting CPU time only: numba p99 <= {TARGET_P99_MS} ms",
            target_drift["numba_cpu_p99_ms"] <= TARGET_P99_MS,
        ),
        (f"... and >= {TARGET_RATIO:g}x the numpy twin at the median", target_drift["ratio_p50"] >= TARGET_RATIO),
        (f"temperature fit < {TARGET_TEMPERATURE_FIT_S:g} s", temperature_s < TARGET_TEMPERATURE_FIT_S),
        (f"30 min fit < {TARGET_FIT_S:g} s", fit_s < TARGET_FIT_S if not args.quick else None),
        (f"warm start < {TARGET_WARM_START_S:g} s", warm_s < TARGET_WARM_START_S),
    ]
    for text, ok in checks:
        print(f"  {'met   ' if ok else 'n/a   ' if ok is None else 'MISSED'} {text}")

    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        report = {
            "cases": cases,
            "replay_case": replay,
            "held_out_pass": held_out,
            "fit_s_30min_300units": None if args.quick else fit_s,
            "temperature_fit_s": temperature_s,
            "warm_start_s": warm_s,
            "settings": {
                "window_s": WINDOW_S,
                "step_s": STEP_S,
                "random_walk_sd_cm": RANDOM_WALK_SD_CM,
                "filter": {"walk_sd_cm": FILTER_WALK_SD_CM, "uniform_weight": FILTER_UNIFORM_WEIGHT,
                           "likelihood_temperature": args.temperature, "drift_gain": FILTER_DRIFT_GAIN,
                           "velocity_time_constant_s": FILTER_VELOCITY_TIME_CONSTANT_S},
                "timed_steps": n_steps,
                "warmup_steps": warmup,
                "fit_minutes": fit_minutes,
                "quick": args.quick,
            },
            "machine": {
                "load_average_1min": [load_before[0], load_after[0]],
                "cpu_count": os.cpu_count(),
                "python": platform.python_version(),
                "numba": numba.__version__,
                "numpy": np.__version__,
            },
        }
        args.json.write_text(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
