"""Online ripple detection: latency, hits and false detections against the offline reference; chunk cost.

    python bench/ripples.py --json out/ripples.json [--duration-s 300] [--chunk-s 0.002] [--seed 1]
                            [--marks] [--content-only | --detection-only]

One run, one simulated session (rig_adapters.sim.lfp: 1/f background, theta
while running, ripples with smoothly rising envelopes while resting; the
animal alternates runs of 3-6 s with rests of 6-14 s), LFP delivered in
chunks of ``chunk_s`` as an acquisition system would:

* the offline reference (decoder.signals.ripple_reference: filtfilt band-pass,
  Hilbert envelope, 3 s.d. of the whole session, 15 ms) gives the events;
* the online detector (decoder.signals.ripple_detector, its defaults) and a
  plain causal reference run on the same chunks. The plain reference is the
  textbook online detector: the reference's own band-pass run with
  ``scipy.signal.sosfilt`` and carried state, squared, smoothed by an 8 ms
  moving average, square-rooted, z-scored per channel with the mean and s.d.
  of the *whole* session (hindsight it could not have, in its favour),
  averaged over channels, fixed threshold 3 s.d., no minimum duration;
* latency: from the offline reference's first crossing in a ripple to the
  end of the chunk that completed the online detection (ms of data time);
  hits: share of the offline events caught (a detection from 50 ms before
  the onset to the offset); false detections per minute of rest (speed
  below 4 cm/s): detections matching neither an offline event nor a
  simulated ripple (``false_per_min``), and, stricter, detections matching
  no offline event (``unmatched_offline_per_min``: mostly weak simulated
  ripples the offline threshold leaves out);
* chunk cost: 64 channels at 1.5 kHz, one ``process`` call per chunk, p50
  and p99 over a minute of data (after the baseline's warm-up), as the
  thread's CPU time (``chunk_p99_ms``: the work itself; on this shared
  2-core machine the wall-clock figures, ``chunk_wall_*``, mostly measure
  when the scheduler lets the process run), and the chunk kernel against
  its numpy twin on the same chunks (a ratio).

* replay content (a second simulated session, ``configs/w_maze_ripples.toml``
  with ``[simulation.replay]``: during each ripple the place cells replay a
  path at 300-600 cm/s, half of them ending at the goal well, the others
  between random points): a place model learned from the first
  ``--learn-s`` of running, then every ripple detected at rest decoded in
  15 ms bins from 20 ms before its onset to its LFP offset, the resting
  animal's own place firing as a background at its tracked position
  (decoder.session.ripples, decoder.session.replay_content) and judged by
  one rule, "a sequence moving towards the goal" (on the sequence filter's
  posterior log odds, decoder.inference.sequence_filter, the one measure a
  sequence rule judges: fires once they exceed ``--min-log-odds`` after
  ``--min-bins`` bins with spikes; ``content_accuracy_fire_always`` is what
  firing on every event scores): towards a zone of one
  bin's radius at the well at (0, 80), which holds the well's own bin and no
  other. The experimenter's "towards the well" means towards the well, and
  so does the truth; a wider zone (12 cm until now) puts the last bins of a
  short path to the well at distance 0, where the rule sees none of the
  approach the truth counts. A replay's truth is the simulator's own record
  (``Replay.towards_goal``, rig_adapters.sim.replay_content): its path ends
  nearer to the goal along the track, the metric the rule measures with, by
  at least half the path's length. Not the draw (``to_goal``): a path between
  random points moves towards the goal about half the time; and not a
  straight line, which on a maze parts from the track (a path down the far
  arm nears the goal along the track and leaves it in a straight line).
  ``content_accuracy``: the share of the replays the offline reference found
  whose truth the rule matched (fired or stayed silent), with each class's
  share beside (``_towards``, ``_other``); ``content_decision_ms_p10/p50/p90``:
  when it fired on a true sequence, ms after the offline onset (an event's
  time: the deciding bin's end, or the ripple's detection for a bin that
  ended before it). ``--events`` prints each replay's truth,
  draw, approach and length, the decision and when, and the
  log odds bin by bin, with the reported (unjudged) tau-b beside. ``content_bin_cpu_ms_p50/p99``:
  the thread's CPU time per content bin decoded as the spikes close it
  (decoding, the sequence filter and judging; bins an LFP chunk completes
  are left out); ``sequence_step_us_p50/p99``: the filter's step alone, and
  against its numpy twin on the same bins (``sequence_step_kernel_vs_numpy_p50``).

* ``--marks``: the replay content a second time, on the same session
  (``configs/w_maze_ripples_marks.toml`` simulates the same cells, path, LFP
  and replays) sent as tetrode marks alone, a third of the cells small and
  every tetrode with multi-unit activity: a mark model learned by the
  session's ``MarkStream`` over the same ``--learn-s``, each content bin
  adding the marks' log-likelihood and expected count. Its figures carry the
  prefix ``marks_`` (``marks_content_accuracy``,
  ``marks_content_decision_ms_p50``, ...). ``--content-only`` skips the
  detection and chunk-cost parts, ``--detection-only`` the replay content.

Bar (issue 14): detection_latency_ms_p50 <= 12 and below
reference_latency_ms_p50, hit_rate >= 0.95, false_per_min <= 0.5,
chunk_p99_ms <= 1, content_accuracy >= 0.85, content_decision_ms_p50 <= 60.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy import signal

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from decoder.config import SafetyCaps, TriggerRule, load_config  # noqa: E402
from decoder.encoding.place_model import PlaceModel  # noqa: E402
from decoder.messages import GroupAnnounce, Heartbeat, MarkedSpikes, SpikeBatch, TrackerFrames  # noqa: E402
from decoder.session.marks import MarkStream  # noqa: E402
from decoder.session.replay_content import ReplayContent  # noqa: E402
from decoder.session.ripples import ContentOutput, RippleStream  # noqa: E402
from decoder.session.tracking import TrackHistory  # noqa: E402
from decoder.session.triggers import TriggerBank  # noqa: E402
from decoder.signals._kernels import ripple_chunk, ripple_chunk_numpy  # noqa: E402
from decoder.signals.lfp_chunk import LfpChunk  # noqa: E402
from decoder.signals.ripple_band import group_delay_s  # noqa: E402
from decoder.signals.ripple_detector import RippleDetection, RippleDetector  # noqa: E402
from decoder.signals.ripple_reference import offline_ripples  # noqa: E402
from decoder.space.zones import CircleZone, zone_masks  # noqa: E402
from rig_adapters.sim.lfp import LfpSettings, LfpSynth  # noqa: E402
from rig_adapters.sim.settings import SimulationSettings  # noqa: E402
from rig_adapters.sim.simulation import SPIKE_SOURCE, TRUTH_SOURCE, SimulatedSession  # noqa: E402

#: Speed below which the animal rests, for counting false detections (cm/s); common practice.
REST_SPEED_CM_S = 4.0
#: A detection this long before an offline onset still counts for that event (s).
EARLY_S = 0.05


def simulate(duration_s: float, rate_hz: float, n_channels: int, seed: int) -> tuple[np.ndarray, np.ndarray, list]:
    """Speed (n,), samples (n, n_channels) in µV and the simulated ripples of one session."""
    rng = np.random.default_rng(seed)
    n = int(duration_s * rate_hz)
    speed = np.zeros(n)
    t = 2.0
    while t < duration_s:
        run = rng.uniform(3, 6)
        speed[int(t * rate_hz):int(min(duration_s, t + run) * rate_hz)] = rng.uniform(12, 30)
        t += run + rng.uniform(6, 14)
    synth = LfpSynth(LfpSettings(rate_hz=rate_hz, n_channels=n_channels), [seed, 14])
    block = int(rate_hz * 10)
    x = np.concatenate([synth.block(speed[i:i + block]) for i in range(0, n, block)])
    return speed, x, synth.ripples


class PlainCausal:
    """The textbook online detector (see the module docstring), chunk by chunk."""

    def __init__(self, sos: np.ndarray, n_channels: int, rate_hz: float, mean: np.ndarray, sd: np.ndarray,
                 smooth_s: float = 0.008, threshold_sd: float = 3.0) -> None:
        self.sos = sos
        self.zi = np.zeros((sos.shape[0], 2, n_channels))
        w = int(round(smooth_s * rate_hz))
        self.b = np.ones(w) / w
        self.zi_ma = np.zeros((w - 1, n_channels))
        self.rate_hz, self.mean, self.sd, self.thr = rate_hz, mean, sd, threshold_sd
        self.above = False

    def process(self, t_s: float, x: np.ndarray) -> list[float]:
        y, self.zi = signal.sosfilt(self.sos, x, axis=0, zi=self.zi)
        p, self.zi_ma = signal.lfilter(self.b, [1.0], y**2, axis=0, zi=self.zi_ma)
        z = ((np.sqrt(p) - self.mean) / self.sd).mean(axis=1)
        out = []
        for zi in z:
            if zi >= self.thr and not self.above:
                out.append(t_s + x.shape[0] / self.rate_hz)
            self.above = zi >= self.thr
        return out


def plain_envelope_stats(sos: np.ndarray, x: np.ndarray, rate_hz: float, smooth_s: float = 0.008):
    y = signal.sosfilt(sos, x, axis=0)
    w = int(round(smooth_s * rate_hz))
    e = np.sqrt(signal.lfilter(np.ones(w) / w, [1.0], y**2, axis=0))
    return e.mean(axis=0), e.std(axis=0)


def score(detected_s: np.ndarray, onset_s, offset_s, ripples, speed, rate_hz) -> dict:
    latencies = []
    hits = 0
    for on, off in zip(onset_s, offset_s):
        m = detected_s[(detected_s >= on - EARLY_S) & (detected_s <= off)]
        if m.size:
            hits += 1
            latencies.append((m[0] - on) * 1e3)
    starts = np.array([r.start_s for r in ripples])
    ends = np.array([r.end_s for r in ripples])
    false = unmatched = 0
    for d in detected_s:
        i = min(int(d * rate_hz), speed.size - 1)
        if not speed[i] < REST_SPEED_CM_S:
            continue
        if np.any((d >= onset_s - EARLY_S) & (d <= offset_s + EARLY_S)):
            continue
        unmatched += 1
        if not np.any((d >= starts) & (d <= ends + 0.02)):
            false += 1
    rest_min = np.count_nonzero(speed < REST_SPEED_CM_S) / rate_hz / 60
    lat = np.array(latencies) if latencies else np.array([np.nan])
    return {
        "latency_ms_p50": float(np.median(lat)),
        "latency_ms_p90": float(np.percentile(lat, 90)),
        "hit_rate": hits / max(1, len(onset_s)),
        "hits": hits,
        "false_detections": false,
        "false_per_min": false / rest_min,
        "unmatched_offline_per_min": unmatched / rest_min,
        "rest_min": rest_min,
    }


def chunk_cost(chunk_s: float, seed: int) -> dict:
    """process() per chunk for 64 channels at 1.5 kHz, and the envelope kernel against its numpy twin."""
    rate, n_channels = 1500.0, 64
    warm_up_s = 10.0
    speed, x, _ = simulate(warm_up_s + 60.0, rate, n_channels, seed)
    det = RippleDetector(rate, n_channels, warm_up_s=warm_up_s)
    step = int(round(chunk_s * rate))
    times, walls, kernel, twin = [], [], [], []
    centre, inv_spread = np.ones(n_channels), np.ones(n_channels)
    sos = det.band.sos_
    for i in range(0, x.shape[0] - step + 1, step):
        chunk = x[i:i + step]
        c0, t0 = time.thread_time(), time.perf_counter()
        det.process(i / rate, chunk)
        t1, c1 = time.perf_counter(), time.thread_time()
        if i / rate >= warm_up_s:
            times.append((c1 - c0) * 1e3)
            walls.append((t1 - t0) * 1e3)
            y, env, z = np.empty_like(chunk), np.empty_like(chunk), np.empty(step)
            for fn, sink in ((ripple_chunk, kernel), (ripple_chunk_numpy, twin)):
                zi, tail = np.zeros((sos.shape[0], 2, n_channels)), np.zeros((2, n_channels))
                a = time.perf_counter()
                fn(chunk, sos, zi, tail, 0.5, centre, inv_spread, y, env, z)
                sink.append(time.perf_counter() - a)
    times, walls = np.array(times), np.array(walls)
    return {
        "chunk_p50_ms": float(np.median(times)),
        "chunk_p99_ms": float(np.percentile(times, 99)),
        "chunk_wall_p50_ms": float(np.median(walls)),
        "chunk_wall_p99_ms": float(np.percentile(walls, 99)),
        "chunk_channels": n_channels,
        "chunk_rate_hz": rate,
        "chunk_kernel_vs_numpy_p50": float(np.median(kernel) / np.median(twin)),
    }


#: The goal well of the content run (cm).
GOAL_CM = (0.0, 80.0)
#: The log-odds rule's threshold (natural log) and its least bins with spikes: chosen on seeds 1-3.
MIN_LOG_ODDS = 0.0
MIN_BINS = 2


def towards_goal_rule(min_bins: int, min_log_odds: float) -> TriggerRule:
    """The towards-the-goal rule on the sequence filter's log odds."""
    return TriggerRule("towards_goal", zone="goal", kind="replay_towards", min_bins=min_bins,
                       min_log_odds=min_log_odds)


def _loose_bank(rule: TriggerRule) -> TriggerBank:
    """Caps loose enough that every decision is seen: this measures the classification, not the caps."""
    bank = TriggerBank([rule], ["goal"], SafetyCaps(refractory_s=0.05, max_per_minute=10_000, max_per_session=100_000))
    bank.arm(0.0)
    return bank


def sequence_cost(content: ReplayContent, bins: list) -> dict:
    """The sequence filter's step (with its log odds), compiled kernel against its numpy twin, over the run's bins.

    Per bin, the thread's CPU time of the step alone (both backends on the same posteriors, event by event).
    """
    out = {}
    for backend in ("numba", "numpy"):
        f = content.sequence.copy(backend)
        f.step(bins[0].content.posterior, True)  # compiled before timing
        times = []
        for b in bins:
            if b.content.index == 0:
                f.reset()
            c0 = time.thread_time_ns()
            f.step(b.content.posterior, b.content.n_spikes >= content.min_spikes)
            times.append((time.thread_time_ns() - c0) * 1e-3)
        out[backend] = np.array(times)
    return {"sequence_step_us_p50": float(np.median(out["numba"])),
            "sequence_step_us_p99": float(np.percentile(out["numba"], 99)),
            "sequence_step_numpy_us_p50": float(np.median(out["numpy"])),
            "sequence_step_kernel_vs_numpy_p50": float(np.median(out["numba"]) / np.median(out["numpy"]))}


def content_run(duration_s: float, learn_s: float, seed: int, rule: TriggerRule, place_cells: int,
                show_events: bool = False, marks: bool = False, goal_radius_cm: float | None = None,
                events_out: list | None = None, ripples_overrides: dict | None = None) -> dict:
    """Replay content on the W maze: the towards-the-goal rule against the simulator's truth.

    ``rule`` judges inside the session's ``RippleStream`` (its cost is in ``content_bin_cpu_ms_*``).
    With ``marks``, the same session
    (``configs/w_maze_ripples_marks.toml``: the same cells, path, LFP and replays) reaches the decoder as
    tetrode marks alone, learned by the session's ``MarkStream``. ``ripples_overrides``: ``[ripples]``
    settings replaced (the sequence filter's, from the command line).
    """
    config = load_config(ROOT / "configs" / "w_maze_ripples.toml")
    if marks:
        sorted_config = config
        config = load_config(ROOT / "configs" / "w_maze_ripples_marks.toml")
        same = {k: v for k, v in config.simulation.items() if k != "marks"} == sorted_config.simulation
        assert same, "the marks scenario must simulate the sorted one's session"
    ripple_settings = dataclasses.replace(config.ripples, **(ripples_overrides or {}))
    env = config.environment
    settings = SimulationSettings.from_dict(dict(config.simulation, n_place_cells=place_cells,
                                                 replay={"goal_cm": list(GOAL_CM)}))
    session = SimulatedSession(env, settings, seed)
    m = config.model
    model = PlaceModel(env, unit_ids=np.zeros(0, np.int64) if marks else None, **m.place_model_kwargs())
    mark_stream = None
    if marks:
        mark_stream = MarkStream(config.marks, config.session, env, m.smooth_cm, m.min_speed_cm_s, m.rate_floor_hz, {})
        mark_stream.start_learning(model.fold_of)
    # One bin's radius: the zone is the goal's own bin, and its distance the truth's (see the module docstring).
    radius = env.bin_cm if goal_radius_cm is None else goal_radius_cm
    goal = CircleZone("goal", GOAL_CM, radius)
    masks = zone_masks([goal], env)
    tracked = TrackHistory()
    stream = RippleStream(ripple_settings, _loose_bank(rule), tracked)
    lfp, bins, bin_cpu_ms = [], [], []
    detected: dict[float, float] = {}
    watermark = -np.inf
    learning = True
    for msg in session.messages(until_s=duration_s):
        if isinstance(msg, TrackerFrames) and msg.source == TRUTH_SOURCE:
            tracked.add(msg.t_s.tolist(), msg.xy_cm.tolist())
            if learning:
                model.update_frames(msg.t_s, msg.xy_cm)
        elif isinstance(msg, GroupAnnounce) and mark_stream is not None:
            mark_stream.announce(msg)
        elif isinstance(msg, (SpikeBatch, MarkedSpikes, Heartbeat)) and msg.source == SPIKE_SOURCE:
            t = msg.t_s if isinstance(msg, Heartbeat) else (msg.t_s[-1] if msg.t_s.size else watermark)
            watermark = max(watermark, float(t))
            if learning and watermark >= learn_s:
                learning = False
                model.fit()
                mark_model = (mark_stream.fit(model.occupancy_s_, model.visited_mask_, tracked)
                              if mark_stream is not None else None)
                stream.install_model(model, env, masks, m.rate_floor_hz, mark_model, config.marks.max_spikes_per_step)
            if isinstance(msg, SpikeBatch):
                if learning:
                    model.update_spikes(msg.t_s, msg.unit_id)
                else:
                    stream.take_spikes(msg.t_s, msg.unit_id)
            elif isinstance(msg, MarkedSpikes) and mark_stream is not None:
                batch = mark_stream.accept(msg)
                if learning:
                    mark_stream.learn(batch, tracked)
                else:
                    # Times, model rows, marks: what the pipeline's MarkStream.take hands the content bins.
                    stream.take_marks((batch[0], mark_model.rows_of(batch[1]), batch[2]))
            c0 = time.thread_time()
            due = stream.content_due(watermark)
            if due:
                # The thread's CPU time per content bin of the call (decoding and judging), free of the scheduler.
                bin_cpu_ms.extend([(time.thread_time() - c0) * 1e3 / len(due)] * len(due))
                bins.extend(due)
        elif isinstance(msg, LfpChunk):
            lfp.append(msg.samples_uv())
            for out in stream.take(msg, watermark):
                if isinstance(out, ContentOutput):
                    bins.append(out)
                elif not out.moving:
                    detected[out.detection.onset_s] = out.t_s
    fired = np.array([e.t_s for b in bins for e in b.events])
    x = np.concatenate(lfp)
    rate = settings.lfp.rate_hz
    ref = offline_ripples(x, rate)
    min_spikes = ripple_settings.content_min_spikes
    rows = []
    for rep in session.replay.replays:
        r = rep.ripple
        if r.start_s < learn_s + 1.0:
            continue
        match = np.flatnonzero((ref.onset_s <= r.end_s) & (ref.offset_s >= r.start_s))
        if not match.size:
            continue  # the offline reference did not find this ripple
        onset = float(ref.onset_s[match[0]])
        mine = [b for b in bins if r.start_s - EARLY_S <= b.content.onset_s <= r.end_s]
        row = {"onset_s": onset, "truth": rep.towards_goal, "drawn_to_goal": rep.to_goal,
               "approach_cm": rep.goal_distance_cm[0] - rep.goal_distance_cm[1], "length_cm": rep.length_cm,
               "bins": len(mine), "used": mine[-1].content.n_used if mine else 0,
               "rest_goal_cm": float(np.hypot(*(mine[0].tracked_xy_cm - np.asarray(GOAL_CM)))) if mine else np.nan,
               "detected_s": detected.get(mine[0].content.onset_s, np.nan) if mine else np.nan,
               "bin_end_s": [b.t_s for b in mine], "n_used": [b.content.n_used for b in mine],
               "n_spikes": [b.content.n_spikes for b in mine],
               "tau": [round(float(b.content.rank_correlation[0]), 2) for b in mine],
               "log_odds": [round(float(b.content.log_odds[0, 0]), 2) for b in mine]}
        if events_out is not None:
            # Each bin's posterior, for looking at the filter's settings offline (on the choosing seeds only).
            row["observed"] = [b.content.n_spikes >= min_spikes for b in mine]
            row["posterior"] = [np.round(b.content.posterior, 6).tolist() for b in mine]
        hit = fired[(fired >= onset - EARLY_S) & (fired <= r.end_s + ripple_settings.content_max_s)]
        row["said"] = bool(hit.size)
        row["decision_ms"] = (hit[0] - onset) * 1e3 if hit.size else np.nan
        rows.append(row)
    if show_events:
        print("onset_s   truth    drawn   approach/length_cm  said  ms  bins used  "
              "log odds towards per bin; tau-b (reported, not judged)", file=sys.stderr)
        for e in rows:
            print(f"{e['onset_s']:8.2f}  {'towards' if e['truth'] else 'other':7s}  "
                  f"{'goal' if e['drawn_to_goal'] else 'random':6s}  {e['approach_cm']:6.0f}/{e['length_cm']:4.0f}"
                  f"         {'yes' if e['said'] else 'no':3s}  {e['decision_ms']:5.0f}  "
                  f"{e['bins']:4d} {e['used']:4d}  {e['log_odds']}; {e['tau']}", file=sys.stderr)
    if events_out is not None:
        events_out.extend(rows)
    truth = np.array([e["truth"] for e in rows], bool)
    said = np.array([e["said"] for e in rows], bool)
    decisions = np.array([e["decision_ms"] for e in rows if e["truth"] and e["said"]])
    result = {"content_accuracy": float(np.mean(truth == said)) if rows else None,
              "content_accuracy_towards": float(np.mean(said[truth])) if truth.any() else None,
              "content_accuracy_other": float(np.mean(~said[~truth])) if (~truth).any() else None}
    for q in (10, 50, 90):
        result[f"content_decision_ms_p{q}"] = float(np.percentile(decisions, q)) if decisions.size else None
    return {
        **result,
        # Firing on every event, without looking at its content: the share of events truly towards the goal.
        "content_accuracy_fire_always": float(np.mean(truth)) if rows else None,
        "content_events": len(rows),
        "content_towards_goal": int(truth.sum()),
        "content_drawn_to_goal": int(sum(e["drawn_to_goal"] for e in rows)),
        "content_min_bins": rule.min_bins,
        "content_min_log_odds": rule.min_log_odds,
        "content_min_spikes": min_spikes,
        "content_speed_cm_s": list(ripple_settings.content_speed_cm_s),
        "content_slack_cm": ripple_settings.content_slack_cm,
        "content_stray_p": ripple_settings.content_stray_p,
        "content_goal_radius_cm": radius,
        "content_bin_ms": 1e3 * ripple_settings.content_bin_s,
        "content_place_cells": place_cells,
        "content_input": "marks" if marks else "sorted units",
        "content_bin_cpu_ms_p50": float(np.median(bin_cpu_ms)) if bin_cpu_ms else None,
        "content_bin_cpu_ms_p99": float(np.percentile(bin_cpu_ms, 99)) if bin_cpu_ms else None,
        **(sequence_cost(stream.content, bins) if bins else {}),
    }


def detection_run(args: argparse.Namespace) -> dict:
    """Online detection and the plain causal reference on one simulated session, scored against the offline one."""
    rate = args.rate_hz
    speed, x, ripples = simulate(args.duration_s, rate, args.channels, args.seed)
    ref = offline_ripples(x, rate)
    det = RippleDetector(rate, args.channels)
    sos = signal.butter(3, (150.0, 250.0), btype="bandpass", fs=rate, output="sos")
    mean, sd = plain_envelope_stats(sos, x, rate)
    plain = PlainCausal(sos, args.channels, rate, mean, sd)
    step = int(round(args.chunk_s * rate))
    online, reference = [], []
    for i in range(0, x.shape[0] - step + 1, step):
        chunk = x[i:i + step]
        online.extend(d.detected_s for d in det.process(i / rate, chunk) if isinstance(d, RippleDetection))
        reference.extend(plain.process(i / rate, chunk))
    warm = 10.0  # both detectors are scored after the online baseline's warm-up
    keep = ref.onset_s >= warm
    on, off = ref.onset_s[keep], ref.offset_s[keep]
    ours = score(np.array([d for d in online if d >= warm]), on, off, ripples, speed, rate)
    theirs = score(np.array([d for d in reference if d >= warm]), on, off, ripples, speed, rate)
    return {
        "detection_latency_ms_p50": ours["latency_ms_p50"],
        "detection_latency_ms_p90": ours["latency_ms_p90"],
        "reference_latency_ms_p50": theirs["latency_ms_p50"],
        "reference_latency_ms_p90": theirs["latency_ms_p90"],
        "hit_rate": ours["hit_rate"],
        "hits": ours["hits"],
        "false_per_min": ours["false_per_min"],
        "false_detections": ours["false_detections"],
        "unmatched_offline_per_min": ours["unmatched_offline_per_min"],
        "reference_hit_rate": theirs["hit_rate"],
        "reference_false_per_min": theirs["false_per_min"],
        "reference_unmatched_offline_per_min": theirs["unmatched_offline_per_min"],
        "offline_events": int(on.size),
        "simulated_ripples": len(ripples),
        "rest_min": ours["rest_min"],
        "online_group_delay_ms": 1e3 * det.band.group_delay_s(),
        "reference_group_delay_ms": 1e3 * group_delay_s(sos, 200.0, rate),
        "chunk_s": args.chunk_s,
        "rate_hz": rate,
        "channels": args.channels,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default=None, help="write results here")
    parser.add_argument("--duration-s", type=float, default=300.0)
    parser.add_argument("--chunk-s", type=float, default=0.002, help="LFP chunk length (s), at most 0.005")
    parser.add_argument("--rate-hz", type=float, default=1500.0)
    parser.add_argument("--channels", type=int, default=8)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--content-duration-s", type=float, default=420.0,
                        help="simulated seconds of the replay-content run (W maze)")
    parser.add_argument("--learn-s", type=float, default=120.0, help="seconds of that run the place model learns from")
    parser.add_argument("--place-cells", type=int, default=150,
                        help="place cells of that run (50-150 units on a W track is common in the literature)")
    parser.add_argument("--min-log-odds", type=float, default=MIN_LOG_ODDS,
                        help=f"the rule's threshold on the log odds (natural log; {MIN_LOG_ODDS}: chosen on seeds 1-3)")
    parser.add_argument("--min-bins", type=int, default=MIN_BINS,
                        help=f"content bins with spikes before the rule may fire ({MIN_BINS}: chosen on seeds 1-3)")
    parser.add_argument("--speed-cm-s", type=float, nargs=2, default=None, metavar=("LOW", "HIGH"),
                        help="[ripples] content_speed_cm_s for the sequence filter (default: the config's)")
    parser.add_argument("--slack-cm", type=float, default=None, help="[ripples] content_slack_cm")
    parser.add_argument("--stray-p", type=float, default=None, help="[ripples] content_stray_p")
    parser.add_argument("--min-spikes", type=int, default=None, help="[ripples] content_min_spikes")
    parser.add_argument("--events", action="store_true", help="print each replay event's truth and decision")
    parser.add_argument("--events-json", default=None,
                        help="write each replay event's truth, bins (with posteriors) and decisions here "
                             "(a list per input)")
    parser.add_argument("--goal-radius-cm", type=float, default=None,
                        help="the goal zone's radius (default: one bin, the goal's own bin)")
    parser.add_argument("--marks", action="store_true",
                        help="run the replay content a second time on the same session sent as tetrode marks "
                             "(configs/w_maze_ripples_marks.toml), its figures under marks_content_*")
    parser.add_argument("--content-only", action="store_true",
                        help="skip the detection and chunk-cost parts: replay content only")
    parser.add_argument("--detection-only", action="store_true",
                        help="skip the replay-content part: detection and chunk cost only")
    args = parser.parse_args(argv)
    if args.content_only and args.detection_only:
        parser.error("--content-only and --detection-only exclude each other")
    result: dict = {}
    if not args.content_only:
        result.update(detection_run(args))
    if args.detection_only:
        result.update(chunk_cost(args.chunk_s, args.seed))
        return report(result, args.json)
    events: dict[str, list] = {"units": [], "marks": []}
    rule = towards_goal_rule(args.min_bins, args.min_log_odds)
    overrides = {key: value for key, value in (("content_speed_cm_s", args.speed_cm_s),
                                               ("content_slack_cm", args.slack_cm),
                                               ("content_stray_p", args.stray_p),
                                               ("content_min_spikes", args.min_spikes)) if value is not None}
    for marks, key in ((False, "units"), (True, "marks")):
        if marks and not args.marks:
            continue
        out = content_run(args.content_duration_s, args.learn_s, args.seed, rule, args.place_cells, args.events,
                          marks=marks, goal_radius_cm=args.goal_radius_cm,
                          events_out=events[key] if args.events_json else None, ripples_overrides=overrides)
        result.update({f"marks_{k}": v for k, v in out.items()} if marks else out)
    if args.events_json:
        Path(args.events_json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.events_json).write_text(json.dumps(events, default=float))
    if not args.content_only:
        result.update(chunk_cost(args.chunk_s, args.seed))
    return report(result, args.json)


def report(result: dict, json_path: str | None) -> int:
    """Print the figures as JSON, and write them to ``json_path`` if given; the exit status."""
    text = json.dumps(result, indent=2)
    print(text)
    if json_path:
        Path(json_path).parent.mkdir(parents=True, exist_ok=True)
        Path(json_path).write_text(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
