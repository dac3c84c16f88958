"""Accuracy of placeloop's shipped defaults against the textbook decoder, on the same sessions.

Run ``python bench/accuracy.py --json out/accuracy.json``. For each of three
invented sessions of the simulated rig with the nuisances of real recordings
on (``configs/accuracy_open_arena.toml``, ``accuracy_linear_track.toml``,
``accuracy_w_maze.toml``: a learning part, then a separate test part):

1. The session is written as a session log through the wire protocol
   (``record_simulated_session``) and replayed through the very pipeline a
   live run uses (``replay_session``), with every decoder and model setting
   at its shipped default. Each decoded step gives its decoded position
   (the point estimate chosen at fit time: the MAP or the posterior mean),
   dated at the step's end, and its posterior; the MAP and the mean are
   scored beside it.
2. The same spikes, tracker frames and sync pulses are read back from the
   log, and the plain numpy textbook decoder (``bench/textbook.py``; Zhang
   et al. 1998) learns rate maps from the learning part and decodes the test
   part with windows of 100, 250 and 500 ms moved by the same step; its best
   window (lowest median error) is taken.
3. Both are scored on the same test steps against the true position of the
   simulation at each step's time: median and 90th-percentile error (cm,
   distance along the track on a maze), the fraction of steps whose true
   bin lies in placeloop's 95 % HPD region (``bench/scores.py``), and the
   lag (``bench/scores.py``): the shift in -500..500 ms, 10 ms apart, that
   best aligns the decoded trajectory with the true one, over the steps
   where the animal runs (at standstill every shift fits alike).

Placeloop is replayed once per decoding method asked for (``--methods``;
by default the shipped ``filter`` and the ``sliding_window``), each scored
the same way. The filter's likelihood temperature is fitted at fit time
from the learning part, as shipped, unless ``--temperature`` sets one; its
learned walk, jump and temperature are reported beside it.

``ratio`` is placeloop's median error over the textbook's best median;
``ratio_worst`` the largest over sessions for the shipped default method
(the filter), ``ratio_worst_by_method`` the same per method. The sessions are simulated
(invented data): the figures measure the decoders on a generator with known
truth, not on any animal.
"""

from __future__ import annotations

import os

# Before numpy loads: one thread each, like every benchmark here.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import dataclasses  # noqa: E402
import json  # noqa: E402
import pathlib  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

# This folder holds scripts named like the packages they measure (decoder.py):
# drop it from the import path so that ``import decoder`` finds the package,
# and put the project root there so that ``bench.textbook`` is found.
_HERE = pathlib.Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if pathlib.Path(p or ".").resolve() != _HERE]
if str(_HERE.parent) not in sys.path:
    sys.path.insert(0, str(_HERE.parent))

import numpy as np  # noqa: E402
from scipy import ndimage  # noqa: E402

from bench.scores import best_lag_s, in_hpd  # noqa: E402
from bench.textbook import WINDOWS_S, decode_map, gaussian_kernel, rate_maps_hz  # noqa: E402
from decoder.config import ExperimentConfig, load_config  # noqa: E402
from decoder.messages import SourceAnnounce, SpikeBatch, SyncPulse, TrackerFrames  # noqa: E402
from decoder.session.outputs import Notice, StepOutput  # noqa: E402
from rig_adapters.sessions.recorder import iter_records  # noqa: E402
from rig_adapters.sessions.replay import replay_session  # noqa: E402
from rig_adapters.sim.recording import record_simulated_session  # noqa: E402
from rig_adapters.sim.simulation import SPIKE_SOURCE, TRACKER_SOURCE, TRUTH_SOURCE  # noqa: E402
from rig_adapters.wire import protocol  # noqa: E402
from rig_adapters.wire.ingest import CHANNEL_RIG  # noqa: E402

CONFIGS = _HERE.parent / "configs"

#: The sessions: name, scenario, seed.
SESSIONS = (
    ("open_arena", CONFIGS / "accuracy_open_arena.toml", 21),
    ("linear_track", CONFIGS / "accuracy_linear_track.toml", 22),
    ("w_maze", CONFIGS / "accuracy_w_maze.toml", 23),
)

#: Length of the test part after the learning part (s).
TEST_S = 120.0

#: Standard deviation of the Gaussian that smooths tracked positions before
#: the speed filter (s): frame-to-frame jitter of a centimetre would
#: otherwise read as tens of cm/s (common practice).
SPEED_SMOOTHING_S = 0.1


class Recorded:
    """The spikes, tracked and true positions of a session log, on the acquisition clock."""

    def __init__(self, log_dir: pathlib.Path) -> None:
        spikes_t, spikes_unit, frames_t, frames_xy, truth_t, truth_xy = [], [], [], [], [], []
        pulses: dict[str, dict[int, float]] = {SPIKE_SOURCE: {}, TRACKER_SOURCE: {}}
        self.unit_ids = None
        for record in iter_records(log_dir):
            if record.type != "input" or record.channel != CHANNEL_RIG:
                continue
            msg = protocol.decode(record.payload)
            if isinstance(msg, SpikeBatch):
                spikes_t.append(msg.t_s)
                spikes_unit.append(msg.unit_id)
            elif isinstance(msg, TrackerFrames) and msg.source == TRACKER_SOURCE:
                frames_t.append(msg.t_s)
                frames_xy.append(np.where((msg.quality > 0)[:, None], msg.xy_cm, np.nan))
            elif isinstance(msg, TrackerFrames) and msg.source == TRUTH_SOURCE:
                truth_t.append(msg.t_s)
                truth_xy.append(msg.xy_cm)
            elif isinstance(msg, SyncPulse) and msg.source in pulses:
                pulses[msg.source][msg.pulse_id] = msg.t_s
            elif isinstance(msg, SourceAnnounce) and msg.source == SPIKE_SOURCE:
                self.unit_ids = np.asarray(msg.unit_ids)
        self.spike_t_s = np.concatenate(spikes_t)
        self.spike_unit = np.concatenate(spikes_unit)
        # The tracker runs on its own clock: map it onto the acquisition clock
        # by the least-squares line through the sync pulses both sides saw.
        ids = sorted(set(pulses[SPIKE_SOURCE]) & set(pulses[TRACKER_SOURCE]))
        slope, offset = np.polyfit([pulses[TRACKER_SOURCE][i] for i in ids],
                                   [pulses[SPIKE_SOURCE][i] for i in ids], 1)
        self.frame_t_s = slope * np.concatenate(frames_t) + offset
        self.frame_xy_cm = np.concatenate(frames_xy)
        self.truth_t_s = np.concatenate(truth_t)
        self.truth_xy_cm = np.concatenate(truth_xy)

    def true_xy_at(self, t_s: np.ndarray) -> np.ndarray:
        """True position at times ``t_s`` (linear between the truth stream's samples), shape (n, 2)."""
        return np.column_stack([np.interp(t_s, self.truth_t_s, self.truth_xy_cm[:, i]) for i in (0, 1)])

    def running(self, t_s: np.ndarray, min_speed_cm_s: float) -> np.ndarray:
        """Whether the animal truly runs at ``min_speed_cm_s`` or faster at times ``t_s`` (over +-50 ms)."""
        ahead, behind = self.true_xy_at(t_s + 0.05), self.true_xy_at(t_s - 0.05)
        return np.hypot(*(ahead - behind).T) / 0.1 >= min_speed_cm_s

    def lag_ms(self, config: ExperimentConfig, t_s: np.ndarray, decoded_xy_cm: np.ndarray) -> float:
        """The lag of a decoded trajectory, over the steps where the animal runs.

        While it stands still every shift fits equally well, and long stops
        (at the ends of a track, in a maze) would bury the lag in the median.
        """
        run = self.running(t_s, config.model.min_speed_cm_s)
        lag_s, _ = best_lag_s(t_s[run], decoded_xy_cm[run], self.true_xy_at, config.environment.distance_cm)
        return 1e3 * lag_s

    def tracked_xy_at(self, t_s: np.ndarray) -> np.ndarray:
        """Tracked position at times ``t_s``, lost frames left out, shape (n, 2)."""
        ok = np.all(np.isfinite(self.frame_xy_cm), axis=1)
        return np.column_stack([np.interp(t_s, self.frame_t_s[ok], self.frame_xy_cm[ok, i]) for i in (0, 1)])


def _errors_cm(config: ExperimentConfig, decoded_xy: np.ndarray, true_xy: np.ndarray) -> np.ndarray:
    return config.environment.distance_cm(decoded_xy, true_xy)


def _placeloop(config: ExperimentConfig, log_dir: pathlib.Path, rec: Recorded) -> dict:
    env = config.environment
    step_s = config.decoder.step_s
    times, decoded_xy, map_xy, mean_xy, covered = [], [], [], [], []
    fitted = {}

    def on_output(out: object) -> None:
        if isinstance(out, Notice) and out.kind == "fitted":
            fitted.update(out.detail["readiness"].get("filter", {}))
        if isinstance(out, StepOutput):
            times.append(out.t_s)
            decoded_xy.append(out.step.decoded_xy_cm)
            map_xy.append(out.step.map_xy_cm)
            mean_xy.append(out.step.mean_xy_cm)
            true_bin = int(env.bin_index(rec.true_xy_at(np.array([out.t_s])))[0])
            covered.append(in_hpd(out.step.posterior, true_bin))

    started = time.perf_counter()
    result = replay_session(log_dir, config, on_output=on_output)
    t = np.array(times)
    truth = rec.true_xy_at(t)
    decoded = np.array(decoded_xy)
    err = _errors_cm(config, decoded, truth)
    return {
        "map_median_cm": float(np.nanmedian(_errors_cm(config, np.array(map_xy), truth))),
        "mean_median_cm": float(np.nanmedian(_errors_cm(config, np.array(mean_xy), truth))),
        "t_s": t,
        "median_cm": float(np.nanmedian(err)),
        "p90_cm": float(np.nanpercentile(err, 90)),
        "hpd95_coverage": float(np.mean(covered)),
        "lag_ms": rec.lag_ms(config, t, decoded),
        "summary_median_cm": result.summary["decode"].get("median_error_cm"),
        "steps": int(t.size),
        "replay_s": time.perf_counter() - started,
        "step_s": step_s,
        "filter": fitted,
    }


def _textbook(config: ExperimentConfig, rec: Recorded, test_t_s: np.ndarray) -> dict:
    env = config.environment
    step_s = config.decoder.step_s
    learn_s = config.session.learn_s
    n_steps = round(test_t_s.max() / step_s)
    order = np.argsort(rec.unit_ids)
    unit_row = order[np.searchsorted(rec.unit_ids, rec.spike_unit, sorter=order)]
    step_of_spike = np.floor(rec.spike_t_s / step_s).astype(np.int64)
    inside = step_of_spike < n_steps
    counts = np.zeros((n_steps, rec.unit_ids.size), np.int64)
    np.add.at(counts, (step_of_spike[inside], unit_row[inside]), 1)

    centres_s = (np.arange(n_steps) + 0.5) * step_s
    tracked = rec.tracked_xy_at(centres_s)
    smooth = ndimage.gaussian_filter1d(tracked, SPEED_SMOOTHING_S / step_s, axis=0)
    speed = np.hypot(*np.gradient(smooth, step_s, axis=0).T)
    learning = (np.arange(n_steps) + 1) * step_s <= learn_s
    position_bin = np.where(learning, env.bin_index(tracked), -1)
    if env.ndim_spatial == 2:
        centres = env.bin_centers_cm
        distance = np.hypot(centres[:, None, 0] - centres[None, :, 0], centres[:, None, 1] - centres[None, :, 1])
    else:
        distance = env.bin_distance_matrix_cm()
    kernel = gaussian_kernel(distance, config.model.smooth_cm)
    rates, visited = rate_maps_hz(position_bin, counts, step_s, speed >= config.model.min_speed_cm_s, kernel,
                                  config.model.min_occupancy_s)

    # A placeloop step dated t ends the window of steps before t: the textbook
    # window ending with step k is dated (k + 1) * step_s.
    rows = np.round(test_t_s / step_s).astype(np.int64) - 1
    truth = rec.true_xy_at(test_t_s)
    by_window = {}
    for window_s in WINDOWS_S:
        map_bin = decode_map(counts, round(window_s / step_s), step_s, rates, visited)[rows]
        decoded = env.bin_centers_cm[map_bin]
        err = _errors_cm(config, decoded, truth)
        by_window[window_s] = (float(np.nanmedian(err)), float(np.nanpercentile(err, 90)), decoded)
    best = min(by_window, key=lambda w: by_window[w][0])
    return {
        "best_median_cm": by_window[best][0],
        "best_p90_cm": by_window[best][1],
        "best_window_s": best,
        "median_cm_by_window": {str(w): round(v[0], 3) for w, v in by_window.items()},
        "lag_ms": rec.lag_ms(config, test_t_s, by_window[best][2]),
    }


def run_session(name: str, path: pathlib.Path, seed: int, work: pathlib.Path, test_s: float,
                methods: tuple[str, ...] = ("filter",), temperature: float | None = None) -> list[dict]:
    """Record the session once, replay it once per method; one row per method."""
    recorded_config = load_config(path)
    until_s = recorded_config.session.learn_s + test_s
    log_dir = work / name
    started = time.perf_counter()
    record_simulated_session(recorded_config, log_dir, until_s, seed=seed)
    record_s = time.perf_counter() - started
    rec = Recorded(log_dir)
    rows = []
    for method in methods:
        decoder = dataclasses.replace(recorded_config.decoder, method=method, likelihood_temperature=temperature)
        config = dataclasses.replace(recorded_config, decoder=decoder)
        ours = _placeloop(config, log_dir, rec)
        theirs = _textbook(config, rec, ours["t_s"])
        rows.append(_row(name, path, seed, config, test_s, method, ours, theirs, record_s))
    return rows


def _row(name: str, path: pathlib.Path, seed: int, config: ExperimentConfig, test_s: float, method: str,
         ours: dict, theirs: dict, record_s: float) -> dict:
    return {
        "name": name,
        "method": method,
        "filter": ours["filter"],
        "config": str(path.relative_to(_HERE.parent)),
        "seed": seed,
        "learn_s": config.session.learn_s,
        "test_s": test_s,
        "test_steps": ours["steps"],
        "placeloop_median_cm": round(ours["median_cm"], 3),
        "placeloop_p90_cm": round(ours["p90_cm"], 3),
        "placeloop_map_median_cm": round(ours["map_median_cm"], 3),
        "placeloop_mean_median_cm": round(ours["mean_median_cm"], 3),
        "placeloop_summary_median_cm": ours["summary_median_cm"],
        "textbook_best_median_cm": round(theirs["best_median_cm"], 3),
        "textbook_best_p90_cm": round(theirs["best_p90_cm"], 3),
        "textbook_best_window_s": theirs["best_window_s"],
        "textbook_median_cm_by_window_s": theirs["median_cm_by_window"],
        "ratio": round(ours["median_cm"] / theirs["best_median_cm"], 3),
        "hpd95_coverage": round(ours["hpd95_coverage"], 4),
        "lag_ms": round(ours["lag_ms"], 1),
        "textbook_lag_ms": round(theirs["lag_ms"], 1),
        "record_s": round(record_s, 1),
        "replay_s": round(ours["replay_s"], 1),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=pathlib.Path, help="write the results here")
    parser.add_argument("--sessions", nargs="+", choices=[s[0] for s in SESSIONS], help="only these sessions")
    parser.add_argument("--test-s", type=float, default=TEST_S, help=f"test part (s), default {TEST_S:g}")
    parser.add_argument("--methods", nargs="+", choices=("sliding_window", "filter"),
                        default=["filter", "sliding_window"], help="decoding methods to replay with")
    parser.add_argument("--temperature", type=float, default=None,
                        help="the filter's likelihood_temperature (default: fitted at fit time, as shipped)")
    args = parser.parse_args(argv)
    chosen = [s for s in SESSIONS if not args.sessions or s[0] in args.sessions]
    started = time.perf_counter()
    rows = []
    with tempfile.TemporaryDirectory(prefix="placeloop-accuracy-") as tmp:
        for name, path, seed in chosen:
            rows.extend(run_session(name, path, seed, pathlib.Path(tmp), args.test_s, tuple(args.methods),
                                    args.temperature))
            print(f"{name}: done in {time.perf_counter() - started:.0f} s", file=sys.stderr)
    out = {
        "sessions": rows,
        "ratio_worst": max((r["ratio"] for r in rows if r["method"] == "filter"), default=None),
        "ratio_worst_by_method": {m: max(r["ratio"] for r in rows if r["method"] == m) for m in args.methods},
        "filter_temperature": args.temperature,
        "bar": {"ratio_worst_max": 0.8, "hpd95_coverage": [0.90, 0.98], "lag_ms": "below the textbook's"},
        "wall_s": round(time.perf_counter() - started, 1),
    }
    head = (f"{'method':<15}{'session':<13}{'ours med':>9}{'ours p90':>9}{'book med':>9}{'book w':>8}{'ratio':>7}"
            f"{'hpd95':>7}{'lag ms':>8}{'book lag':>9}")
    print(head)
    for r in rows:
        print(f"{r['method']:<15}{r['name']:<13}{r['placeloop_median_cm']:>9.2f}{r['placeloop_p90_cm']:>9.2f}"
              f"{r['textbook_best_median_cm']:>9.2f}{r['textbook_best_window_s']:>8.2f}{r['ratio']:>7.2f}"
              f"{r['hpd95_coverage']:>7.3f}{r['lag_ms']:>8.0f}{r['textbook_lag_ms']:>9.0f}")
    for r in rows:
        if r["filter"]:
            f = r["filter"]
            print(f"filter {r['name']}: walk s.d. {f['walk_sd_cm']:.2f} cm per {f['step_s'] * 1e3:.0f} ms step, "
                  f"jump {f['uniform_weight']:.2e}, temperature {f['likelihood_temperature']:.3g}, drift gain "
                  f"{f.get('drift_gain', 0.0):.2f} over {f.get('velocity_time_constant_s', 1.0):.2f} s, decodes the "
                  f"{f['point_estimate']} (test medians: MAP {r['placeloop_map_median_cm']:.2f}, "
                  f"mean {r['placeloop_mean_median_cm']:.2f} cm)")
    worst = ", ".join(f"{m} {v:.3f}" for m, v in out["ratio_worst_by_method"].items())
    print(f"ratio_worst {worst} (bar <= 0.8); wall {out['wall_s']} s")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(out, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
