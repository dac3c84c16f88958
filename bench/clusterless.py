"""Benchmark of clusterless decoding: the mark kernel against its numpy twin, and clusterless against sorted.

Run ``python bench/clusterless.py --json out/clusterless.json`` (``--quick``
for a short run). Two parts, each measured in the same run as its baseline:

1. **The decoding step.** 32 tetrodes (4 channels each) on a 2,500-bin
   arena (100 x 100 cm, 2 cm bins), a mark model learned from 20 minutes at
   2,000 spikes/s in total (2.4 million spikes, 20,000 kept per tetrode by
   reservoir sampling), 20 ms steps of the state-space filter with its
   uniform jump: every step the window's marked spikes (40 on average) go
   through the mark kernel and the fused decoding step. ``--merge-sd``
   compresses the encoding marks at fit (``[marks] merge_sd``, kernel
   density compression, Sodkomkham et al. 2016); by default they are not. The compiled path
   and the numpy twins decode the same steps; the figures are the per-step
   p50 and p99, their ratio, and the memory of the fitted model. Each step
   is timed twice: wall time (``step_*``, what the bar reads) and the
   thread's CPU time (``cpu_*``), which leaves out the time the scheduler
   gave to other processes, so a run on a shared, loaded machine still
   says what the step itself costs; the load average is written beside. The spikes
   are invented for timing only: five place cells and some multi-unit
   activity per tetrode, marks drawn around each cell's mean amplitudes.
2. **Clusterless against sorted.** One simulated session
   (``rig_adapters.sim``, ``[simulation.marks] send = "both"``: overlapping
   clusters, small units near the threshold, multi-unit activity) decoded
   twice by the same pipeline: once from its marked spikes only, once from
   the sorted spikes of the units a sorter would keep (the simulator's
   ground truth minus the small units and the multi-unit activity). The
   figures are the median decoding errors of the position each pipeline
   decodes (``*_median_cm``), and beside them, for both, the median error of
   the MAP and of the posterior mean, the 95 % HPD coverage of the tracked
   bin (``filtering.hpd_contains``), and the likelihood temperature and
   point estimate the filter decoded with, each path's own, fitted on its
   held-out learning steps (``decoder.encoding.calibration``; the
   clusterless path's steps decoded from their marks by the mark model
   fitted without their fold, ``PlaceModel.calibrate``), with the held-out
   coverage at temperature 1 and at the fitted one beside. A sanity
   comparison on invented data, not a claim about recordings.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import pathlib
import platform
import sys
import time

# This script sits beside a folder named like the package; keep its own folder off the import path.
_HERE = pathlib.Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if pathlib.Path(p or ".").resolve() != _HERE]

import numpy as np  # noqa: E402
import tomli_w  # noqa: E402

from decoder.config import parse_config  # noqa: E402
from decoder.encoding.mark_model import MarkModel  # noqa: E402
from decoder.inference.decoding import BayesDecoder  # noqa: E402
from decoder.inference.filtering import hpd_contains  # noqa: E402
from decoder.messages import MarkedSpikes, SpikeBatch  # noqa: E402
from decoder.session.outputs import StepOutput  # noqa: E402
from decoder.session.pipeline import Pipeline  # noqa: E402
from decoder.space.environments import Arena  # noqa: E402
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings  # noqa: E402

N_GROUPS, CHANNELS, CELLS_PER_GROUP = 32, 4, 5
TOTAL_RATE_HZ, LEARN_S, STEP_S = 2000.0, 1200.0, 0.02
KEEP_PER_GROUP = 20_000
#: Kernel density compression of the encoding marks ([marks] merge_sd), in kernel s.d.
MERGE_SD = 0.0
TARGET_P99_MS, TARGET_RATIO, TARGET_MODEL_MB = 5.0, 10.0, 500.0


def _draw_spikes(rng, centers_cm, amplitudes_uv, n, xy_cm=None):
    """``n`` invented spikes of one tetrode: positions (at ``xy_cm`` if given), marks."""
    cell = rng.integers(0, CELLS_PER_GROUP + 1, n)  # the last "cell" is multi-unit activity
    if xy_cm is None:
        xy = np.where(cell[:, None] < CELLS_PER_GROUP,
                      centers_cm[np.minimum(cell, CELLS_PER_GROUP - 1)] + rng.normal(0, 8.0, (n, 2)),
                      rng.uniform(0, 100, (n, 2)))
        xy = np.clip(xy, 0.5, 99.5)
    else:
        xy = np.repeat(xy_cm[None], n, axis=0)
    marks = amplitudes_uv[cell] + rng.normal(0, 10.0, (n, CHANNELS))
    return xy, marks.astype(np.float32)


def step_benchmark(n_steps: int, n_numpy_steps: int, merge_sd: float = MERGE_SD, seed: int = 1) -> dict:
    rng = np.random.default_rng(seed)
    env = Arena.rectangle(100, 100, bin_cm=2.0)
    model = MarkModel(env, bandwidth_uv=20.0, smooth_cm=5.0, max_spikes_per_group=KEEP_PER_GROUP, merge_sd=merge_sd)
    per_group = int(TOTAL_RATE_HZ * LEARN_S / N_GROUPS)
    groups = []
    t0 = time.perf_counter()
    for g in range(N_GROUPS):
        centers = rng.uniform(10, 90, (CELLS_PER_GROUP, 2))
        amplitudes = rng.uniform(40, 250, (CELLS_PER_GROUP + 1, CHANNELS))
        amplitudes[-1] = rng.uniform(40, 60, CHANNELS)
        groups.append((centers, amplitudes))
        model.add_group(g, CHANNELS)
        for lo in range(0, per_group, 50_000):  # learned in batches, as a session delivers them
            n = min(50_000, per_group - lo)
            xy, marks = _draw_spikes(rng, centers, amplitudes, n)
            model.update(np.full(n, g), marks, xy, np.full(n, 10.0))
    occupancy = np.full(env.n_bins, LEARN_S / env.n_bins)
    model.fit(occupancy, env.valid_mask)
    learn_fit_s = time.perf_counter() - t0
    model_bytes = sum(a.nbytes for a in (model.enc_marks_, model.enc_bins_, model.enc_weights_, *model.spread_,
                                         model.kernel_1d_,
                                         model.bin_scale_, model.ground_rate_hz_, model.ground_total_hz_))
    model_bytes += sum(m.nbytes + b.nbytes for m, b in zip(model._marks, model._bins))

    # The steps: an animal on a smooth random walk, Poisson spikes of each tetrode's cells at its position.
    xy = np.array([50.0, 50.0])
    windows = []
    for _ in range(max(n_steps, n_numpy_steps)):
        xy = np.clip(xy + rng.normal(0, 1.0, 2), 1, 99)
        n = rng.poisson(TOTAL_RATE_HZ * STEP_S)
        g = rng.integers(0, N_GROUPS, n)
        marks = np.empty((n, CHANNELS), np.float32)
        for i in range(n):
            _, marks[i:i + 1] = _draw_spikes(rng, groups[g[i]][0], groups[g[i]][1], 1, xy)
        windows.append((model.rows_of(g), marks))

    def run(backend: str, count: int) -> np.ndarray:
        dec = BayesDecoder(np.zeros((0, env.n_bins)), env, model.valid_mask_, window_s=STEP_S, prior="state_space",
                           random_walk_sd_cm=2.0, uniform_weight=1e-3, backend=backend)
        scratch, ll = model.scratch(), np.empty(env.n_bins)
        expected = STEP_S * model.ground_total_hz_
        empty_rows, empty_counts = np.zeros(0, np.int64), np.zeros(0)
        times, cpu, weighed = np.empty(count), np.empty(count), np.empty(count)
        for k in range(count):
            rows, marks = windows[k]
            t, c = time.perf_counter(), time.thread_time()
            weighed[k] = model.log_intensity_sum(rows, marks, ll, scratch, backend=backend)
            dec.decode(empty_rows, empty_counts, ll, expected)
            cpu[k], times[k] = time.thread_time() - c, time.perf_counter() - t
        return times * 1e3, cpu * 1e3, weighed

    run("numba", 5)
    load_before = os.getloadavg()[0]
    fast, fast_cpu, weighed = run("numba", n_steps)
    slow, slow_cpu, _ = run("numpy", n_numpy_steps)
    return {
        "n_bins": env.n_bins, "groups": N_GROUPS, "channels": CHANNELS, "spikes_per_s": TOTAL_RATE_HZ,
        "learned_spikes": per_group * N_GROUPS, "kept_spikes": sum(model._kept), "merge_sd": merge_sd,
        "encoding_kernels": int(model.group_start_[-1]),
        "learn_and_fit_s": round(learn_fit_s, 2),
        "steps": n_steps, "numpy_steps": n_numpy_steps,
        "step_p50_ms": float(np.percentile(fast, 50)), "step_p99_ms": float(np.percentile(fast, 99)),
        "numpy_p50_ms": float(np.percentile(slow, 50)), "numpy_p99_ms": float(np.percentile(slow, 99)),
        "ratio_p50": float(np.percentile(slow, 50) / np.percentile(fast, 50)),
        "cpu_step_p50_ms": float(np.percentile(fast_cpu, 50)), "cpu_step_p99_ms": float(np.percentile(fast_cpu, 99)),
        "cpu_numpy_p50_ms": float(np.percentile(slow_cpu, 50)),
        "cpu_ratio_p50": float(np.percentile(slow_cpu, 50) / np.percentile(fast_cpu, 50)),
        "weighed_per_step_p50": float(np.percentile(weighed, 50)),
        "load_average": [round(load_before, 2), round(os.getloadavg()[0], 2)],
        "model_mb": model_bytes / 1e6,
    }


ACCURACY_CONFIG = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    # Five folds, as the scenario: each held-out step is weighed by models of four fifths of the learning,
    # nearer the full model that decodes than half of it (quick mode's fitted temperature 1.93, not 2.22).
    "model": {"smooth_cm": 5.0, "cv_folds": 5},
    "marks": {"enabled": True, "merge_sd": MERGE_SD},
    "decoder": {"method": "filter", "step_s": 0.02, "prior": "state_space"},
    "sources": {"truth": "truth"},
    "session": {"learn_s": 300.0, "cross_validate": False},
    "simulation": {"n_place_cells": 48, "n_grid_cells": 0, "n_nonspatial_cells": 8, "units_per_tetrode": 7,
                   "place_peak_hz": [5.0, 15.0],
                   "marks": {"send": "both", "small_fraction": 0.35, "noise_uv": 12.0, "mua_rate_hz": 30.0}},
}


def accuracy_benchmark(learn_s: float, decode_s: float, seed: int = 11) -> dict:
    doc = json.loads(json.dumps(ACCURACY_CONFIG))
    doc["session"]["learn_s"] = learn_s
    config = parse_config(tomli_w.dumps(doc))
    plain = parse_config(tomli_w.dumps({**doc, "marks": {"enabled": False}}))
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    pipelines = {"clusterless": Pipeline(config), "sorted": Pipeline(plain)}
    skips = {"clusterless": SpikeBatch, "sorted": MarkedSpikes}
    # Per decoded step with a true position: decoded, MAP and mean error (cm), and whether the true bin is in the HPD.
    scored: dict[str, list[tuple[float, float, float, bool]]] = {"clusterless": [], "sorted": []}
    env = pipelines["sorted"].environment
    for msg in session.messages(until_s=learn_s + decode_s):
        # The same session both ways: marked spikes to one pipeline, the sorter's units to the other.
        for name, pipeline in pipelines.items():
            if type(msg) is skips[name]:
                continue
            for out in pipeline.on_message(msg):
                if isinstance(out, StepOutput) and math.isfinite(out.error_cm):
                    step, truth = out.step, np.asarray(out.true_xy_cm, np.float64)[np.newaxis]
                    true_bin = env.bin_index(truth)
                    scored[name].append((out.error_cm, float(env.distance_cm(step.map_xy_cm[np.newaxis], truth)[0]),
                                         float(env.distance_cm(step.mean_xy_cm[np.newaxis], truth)[0]),
                                         bool(hpd_contains(step.posterior[np.newaxis], true_bin)[0])))
    tetrodes = session.tetrodes
    figures = {
        "learn_s": learn_s, "decode_s": decode_s, "seed": seed,
        "units": int(tetrodes.unit_ids.size), "sorted_units": int(tetrodes.sorted_unit_ids.size),
        "tetrodes": int(tetrodes.group_ids.size),
    }
    for name, pipeline in pipelines.items():
        decoded, map_cm, mean_cm, inside = (np.array(column) for column in zip(*scored[name]))
        figures.update({
            f"{name}_median_cm": float(np.median(decoded)), f"{name}_steps": int(decoded.size),
            f"{name}_map_median_cm": float(np.median(map_cm)), f"{name}_mean_median_cm": float(np.median(mean_cm)),
            f"{name}_hpd95_coverage": float(inside.mean()),
            f"{name}_temperature": pipeline.steps.decoder.likelihood_temperature,
            f"{name}_point_estimate": pipeline.steps.decoder.point_estimate,
        })
        fit = pipeline.model.temperature_fits_.get(STEP_S)
        if fit is not None:
            figures.update({f"{name}_held_out_coverage": fit.coverage,
                            f"{name}_held_out_coverage_at_1": fit.coverage_at_1,
                            f"{name}_held_out_with_marks": fit.with_marks, f"{name}_drift_gain": fit.drift_gain})
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=pathlib.Path, help="write the figures here")
    parser.add_argument("--quick", action="store_true", help="fewer steps and a shorter session")
    parser.add_argument("--merge-sd", type=float, default=MERGE_SD, help="kernel density compression, kernel s.d.")
    args = parser.parse_args(argv)
    ACCURACY_CONFIG["marks"]["merge_sd"] = args.merge_sd
    steps = step_benchmark(n_steps=200 if args.quick else 1000, n_numpy_steps=10 if args.quick else 30,
                           merge_sd=args.merge_sd)
    print(f"step   p50 {steps['step_p50_ms']:.2f} ms, p99 {steps['step_p99_ms']:.2f} ms (target <= {TARGET_P99_MS}); "
          f"numpy twin p50 {steps['numpy_p50_ms']:.1f} ms: {steps['ratio_p50']:.1f}x (target >= {TARGET_RATIO}); "
          f"model {steps['model_mb']:.1f} MB (target <= {TARGET_MODEL_MB})")
    print(f"cpu    p50 {steps['cpu_step_p50_ms']:.2f} ms, p99 {steps['cpu_step_p99_ms']:.2f} ms; numpy twin p50 "
          f"{steps['cpu_numpy_p50_ms']:.1f} ms: {steps['cpu_ratio_p50']:.1f}x; "
          f"{steps['weighed_per_step_p50']:.0f} kernel weights per step; load average {steps['load_average']}")
    accuracy = accuracy_benchmark(learn_s=120.0 if args.quick else 300.0, decode_s=60.0 if args.quick else 200.0)
    print(f"error  clusterless median {accuracy['clusterless_median_cm']:.2f} cm, "
          f"sorted median {accuracy['sorted_median_cm']:.2f} cm "
          f"({accuracy['sorted_units']} of {accuracy['units']} units sorted)")
    for name in ("clusterless", "sorted"):
        print(f"       {name}: MAP {accuracy[f'{name}_map_median_cm']:.2f} cm, "
              f"mean {accuracy[f'{name}_mean_median_cm']:.2f} cm, "
              f"95 % HPD coverage {accuracy[f'{name}_hpd95_coverage']:.3f}; decoded the "
              f"{accuracy[f'{name}_point_estimate']} at temperature {accuracy[f'{name}_temperature']:.3f} "
              f"(held-out coverage {accuracy.get(f'{name}_held_out_coverage_at_1', math.nan):.3f} at 1, "
              f"{accuracy.get(f'{name}_held_out_coverage', math.nan):.3f} fitted)")
    figures = {**steps, **accuracy, "machine": platform.platform(), "python": platform.python_version()}
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
