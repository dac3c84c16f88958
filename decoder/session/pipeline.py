"""The session pipeline: typed messages in, decoded steps and events out.

This is the one data path that live runs and replays share::

    message ─► stream health ─► clock alignment ─► learning (place model)
                                              └─► spike window ─► decode ─► triggers ─► outputs

Everything here runs on data time (acquisition seconds on the spike
source's clock). The pipeline never reads the wall clock, a socket or a file,
so feeding it the recorded messages in their recorded order reproduces a live
run exactly, down to the digest of every decoded step and event.

Session states (our own names): ``idle`` (nothing learnt, not learning),
``learning`` (the place model accumulates), ``decoding`` (a fitted or loaded
model decodes every step; triggers may be armed).
"""

from __future__ import annotations

import hashlib
import logging
import math
import struct
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from decoder.inference.binning import SpikeWindow, StepSchedule
from decoder.session.clock import ClockAligner, ClockFit, ClockMismatchError
from decoder.config import ExperimentConfig
from decoder.inference.decoding import BayesDecoder, DecodedStep
from decoder.space.environments import Arena
from decoder.messages import (
    ControlCommand,
    Heartbeat,
    InputMessage,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)
from decoder.encoding.place_model import PlaceModel
from decoder.session.scoring import ErrorHistogram, VisitScore
from decoder.session.streams import StreamHealth
from decoder.session.tracking import TrackHistory
from decoder.session.triggers import SessionCapError, StepInput, TriggerBank, TriggerEvent
from decoder.space.zones import zone_masks

log = logging.getLogger(__name__)

#: A message whose timestamps run further ahead of its source's watermark
#: than this (s) is refused: a corrupt clock would otherwise close thousands
#: of steps at once and leave every later spike "late".
MAX_TIME_JUMP_S = 30.0

#: Steps closed by one message at most; beyond it the schedule skips ahead
#: (counted), so one message can never stall the loop.
MAX_STEPS_PER_MESSAGE = 500

#: Data time between two learning progress reports (s).
LEARNING_REPORT_S = 1.0

#: Data time between two counts of spatially tuned units while learning (s);
#: each count fits rate maps, so it is kept rare.
TUNING_REPORT_S = 15.0

#: Below this fraction of its bins in the learned map, a zone gets a warning at fitting time.
ZONE_COVERAGE_WARNING = 0.8

#: Tracker frames held while waiting for the first clock fit.
MAX_PENDING_FRAMES = 5000


class StepOutput(NamedTuple):
    """One decoded step and what it triggered.

    Attributes
    ----------
    k : int
        Step number; the step ends at ``t_s = k * step_s``.
    t_s : float
        Data time of the step's end (s).
    step : DecodedStep
        The decoder's output (posterior, MAP, zone masses, ...).
    tracked_xy_cm, true_xy_cm : ndarray, shape (2,)
        Tracked position at ``t_s`` and, on a simulated rig, the true one
        (NaN when unknown).
    tracked_speed_cm_s : float
    error_cm : float
        Distance from the MAP to the true position (or the tracked one
        without truth); NaN when neither is known.
    events : tuple of TriggerEvent
    false_events : tuple of bool
        For each event, whether the animal was farther than the false margin
        from the zone (only judged where a position is known).
    armed : bool

    Notes
    -----
    A named tuple rather than a frozen dataclass: just as immutable, and
    built for a fraction of the cost, once per decoded step.
    """

    k: int
    t_s: float
    step: DecodedStep
    tracked_xy_cm: np.ndarray
    true_xy_cm: np.ndarray
    tracked_speed_cm_s: float
    error_cm: float
    events: tuple[TriggerEvent, ...]
    false_events: tuple[bool, ...]
    armed: bool


@dataclass(frozen=True, slots=True)
class LearningProgress:
    """How learning is going, every ``LEARNING_REPORT_S`` of data time.

    Attributes
    ----------
    t_s : float
    occupancy_s : ndarray, shape (n_bins,)
        Running time per bin so far (s).
    coverage : float
        Fraction of the environment's valid bins visited so far.
    n_tuned_units : int or None
        Spatially tuned units, refreshed every ``TUNING_REPORT_S`` (None
        before); an estimate on bins about ``smooth_cm`` wide
        (``PlaceModel.n_tuned_units_so_far``), the exact count comes with the fit.
    learn_elapsed_s : float
    """

    t_s: float
    occupancy_s: np.ndarray
    coverage: float
    n_tuned_units: int | None
    learn_elapsed_s: float


@dataclass(frozen=True, slots=True)
class Notice:
    """A change of the session worth telling the operator and the log."""

    kind: str
    t_s: float
    detail: dict = field(default_factory=dict)


class Pipeline:
    """The closed loop's core, driven one message at a time.

    Parameters
    ----------
    config : ExperimentConfig
    model : PlaceModel, optional
        A fitted model to decode with from the start (state ``decoding``).
    """

    def __init__(self, config: ExperimentConfig, model: PlaceModel | None = None) -> None:
        self.config = config
        self.environment = config.environment
        self.state = "idle"
        self.health = StreamHealth()
        self.counters: dict[str, int] = {
            "bad_messages": 0,
            "stale_messages": 0,
            "unknown_source": 0,
            "time_jumps": 0,
            "unknown_units": 0,
            "late_spikes": 0,
            "frames_dropped_unaligned": 0,
            "clock_mismatch": 0,
            "steps_skipped": 0,
            "decode_steps": 0,
            "events": 0,
            "false_events": 0,
        }
        self.bad_reasons: dict[str, int] = {}
        self.announced: dict[str, SourceAnnounce] = {}
        self._spike_source = config.sources.spikes
        self._truth_source = config.sources.truth
        self._position_sources = (config.sources.tracker, config.sources.truth)
        self.clock = ClockAligner(config.sources.spikes, tolerance_s=config.sources.clock_tolerance_s)
        self.tracked = TrackHistory()
        self.truth = TrackHistory()
        self._pending_frames: list[TrackerFrames] = []
        self.spike_watermark_s = -math.inf
        self.schedule = StepSchedule(config.decoder.step_s, config.decoder.allowed_lateness_s)
        self.zone_names = config.zone_names()
        self.bank = TriggerBank(config.rules, self.zone_names, config.safety)
        self.model: PlaceModel | None = None
        self.decoder: BayesDecoder | None = None
        self.window: SpikeWindow | None = None
        self._unit_rows: dict[int, int] = {}
        self._unit_lut: np.ndarray | None = None
        self._unit_lut_offset = 0
        self._learn_started_s: float | None = None
        self._plan_started = False
        self._plan_done = False
        self._next_progress_s = -math.inf
        self._next_tuning_s = -math.inf
        self._n_tuned: int | None = None
        self.readiness: dict | None = None
        self.model_is_loaded = False
        self._digest = hashlib.sha256()
        self.errors = ErrorHistogram()
        self.visits = VisitScore(len(config.zones))
        self._zone_masks = zone_masks(config.zones, self.environment)
        self._euclidean = type(self.environment).distance_cm is Arena.distance_cm
        self._near_zone = self._near_zone_masks(config.session.false_margin_cm)
        if model is not None:
            self.install_model(model, t_s=-math.inf)

    # -- the one entry point -------------------------------------------------

    def on_message(self, msg: InputMessage) -> list[StepOutput | LearningProgress | Notice]:
        """Feed one validated message; return the steps it closed and any notices."""
        verdict = self.health.accept(msg.source, msg.seq)
        if verdict == "stale":
            self.counters["stale_messages"] += 1
            log.warning("dropped message %d from %r: sequence number not above the last one", msg.seq, msg.source)
            return []
        source = msg.source
        kind = type(msg)
        if verdict != "restart":
            # Nearly every message of a session is one of these: straight to its handler.
            if source == self._spike_source and (kind is SpikeBatch or kind is Heartbeat):
                return self._on_spike_source(msg)
            if kind is TrackerFrames and source in self._position_sources:
                self._on_frames(msg)
                return []
        out: list[StepOutput | Notice] = []
        if verdict == "restart":
            out.append(Notice("source_restart", self.spike_watermark_s, {"source": source}))
            log.warning("source %r restarted its sequence numbers", source)
            # A restarted source may restart its clock: its old clock fit no longer holds.
            self.clock.forget(source)
            if source == self._spike_source:
                out.extend(self._on_spike_source_restart())
        if kind is ControlCommand:
            out.extend(self.on_control(msg))
        elif kind is SourceAnnounce:
            self.announced[source] = msg
        elif kind is SyncPulse:
            out.extend(self._on_sync(msg))
        elif source == self._spike_source:
            out.extend(self._on_spike_source(msg))
        elif source in self._position_sources:
            if kind is TrackerFrames:
                self._on_frames(msg)
        else:
            self.counters["unknown_source"] += 1
        return out

    def count_bad_message(self, reason: str) -> None:
        """Count a message the shell could not decode (the shell logs why)."""
        self.counters["bad_messages"] += 1
        self.bad_reasons[reason] = self.bad_reasons.get(reason, 0) + 1

    # -- control ---------------------------------------------------------------

    def on_control(self, cmd: ControlCommand) -> list[Notice]:
        """Apply a control command at the current data time."""
        t = self.spike_watermark_s
        c = cmd.command
        if c == "start_learning":
            return self.start_learning(t)
        if c == "stop_learning":
            if self.state != "learning":
                return [Notice("refused", t, {"command": c, "why": f"not learning (state {self.state})"})]
            self.state = "idle"
            return [Notice("state", t, {"state": self.state})]
        if c == "fit":
            return self.fit(t)
        if c == "arm":
            return self._arm(t)
        if c == "disarm":
            self.bank.disarm(t, str(cmd.args.get("reason", "operator")))
            return [Notice("disarmed", t, {"reason": cmd.args.get("reason", "operator")})]
        if c == "stall":
            self.bank.disarm(t, "stall")
            return [Notice("disarmed", t, {"reason": "stall", "stream": cmd.args.get("stream", "")})]
        # status and load_model are answered by the shell, which owns files.
        return []

    def _arm(self, t_s: float) -> list[Notice]:
        if self.state != "decoding":
            return [Notice("refused", t_s, {"command": "arm", "why": "no model is decoding yet"})]
        if not math.isfinite(t_s):
            return [Notice("refused", t_s, {"command": "arm", "why": "no spike data has arrived yet"})]
        try:
            self.bank.arm(t_s)
        except SessionCapError as exc:
            return [Notice("refused", t_s, {"command": "arm", "why": str(exc)})]
        return [Notice("armed", t_s, {})]

    def start_learning(self, t_s: float) -> list[Notice]:
        if self.state == "learning":
            return []
        announce = self.announced.get(self.config.sources.spikes)
        unit_ids = announce.unit_ids if announce is not None and announce.unit_ids.size else None
        if self.model is None or self.model_is_loaded:
            self.model = PlaceModel(self.environment, unit_ids=unit_ids, **self.config.model.place_model_kwargs())
            self.model_is_loaded = False
        self.state = "learning"
        # Learning time counts from the first data if no data has come yet.
        self._learn_started_s = t_s if math.isfinite(t_s) else None
        self.bank.disarm(t_s, "learning")
        return [Notice("state", t_s, {"state": self.state})]

    def fit(self, t_s: float) -> list[Notice]:
        """Fit the model learnt so far and start decoding with it."""
        if self.model is None or self.model_is_loaded:
            return [Notice("refused", t_s, {"command": "fit", "why": "nothing has been learnt"})]
        try:
            self.model.fit()
        except ValueError as exc:
            log.error("fitting failed: %s", exc)
            return [Notice("refused", t_s, {"command": "fit", "why": str(exc)})]
        readiness = dict(self.model.readiness(with_cv_error=self.config.session.cross_validate))
        # A zone can only be decoded where the model has a map: bins the animal
        # never ran near during learning carry no posterior mass, ever.
        learned = self.model.visited_mask_
        readiness["zone_coverage"] = {
            name: float((mask & learned).sum() / mask.sum()) for name, mask in zip(self.zone_names, self._zone_masks)
        }
        self.readiness = readiness
        notices = [Notice("fitted", t_s, {"readiness": readiness})]
        for name, covered in readiness["zone_coverage"].items():
            if covered < ZONE_COVERAGE_WARNING:
                log.warning("zone %r: only %.0f%% of its bins are in the learned map; learn longer before arming",
                            name, 100 * covered)
                notices.append(Notice("zone_not_learned", t_s, {"zone": name, "coverage": covered}))
        notices.extend(self.install_model(self.model, t_s))
        return notices

    def install_model(self, model: PlaceModel, t_s: float, loaded: bool = False) -> list[Notice]:
        """Decode with ``model`` from the next step on (triggers stay disarmed)."""
        d = self.config.decoder
        self.model = model
        self.model_is_loaded = loaded
        self.decoder = BayesDecoder(
            model.rate_maps_hz_,
            self.environment,
            model.visited_mask_,
            window_s=d.window_s,
            prior=d.prior,
            random_walk_sd_cm=d.random_walk_sd_cm,
            zone_masks=self._zone_masks,
            rate_floor_hz=self.config.model.rate_floor_hz,
        )
        ids = np.asarray(model.unit_ids_, np.int64)
        self._unit_rows = {int(u): i for i, u in enumerate(ids)}
        self._unit_lut_offset = int(ids.min())
        span = int(ids.max()) - self._unit_lut_offset + 1
        if span <= 1_000_000:
            self._unit_lut = np.full(span, -1, np.int64)
            self._unit_lut[ids - self._unit_lut_offset] = np.arange(ids.size)
        else:
            self._unit_lut = None
        self.window = SpikeWindow(ids.size, d.window_s)
        self.state = "decoding"
        self.bank.disarm(t_s, "new_model")
        if math.isfinite(self.spike_watermark_s):
            self.schedule.start_at(self.spike_watermark_s)
        return [Notice("state", t_s, {"state": self.state, "units": int(ids.size)})]

    # -- streams ---------------------------------------------------------------

    def _on_spike_source(self, msg: InputMessage) -> list[StepOutput | Notice]:
        if isinstance(msg, SpikeBatch):
            newest = msg.t_s.item(-1) if msg.t_s.size else -math.inf
        elif isinstance(msg, Heartbeat):
            newest = msg.t_s
        else:
            self.counters["unknown_source"] += 1
            return []
        if math.isfinite(self.spike_watermark_s) and newest > self.spike_watermark_s + MAX_TIME_JUMP_S:
            self.counters["time_jumps"] += 1
            log.warning(
                "refused a message from %r: its time %.3f s jumps %.1f s past the stream (limit %.0f s)",
                msg.source, newest, newest - self.spike_watermark_s, MAX_TIME_JUMP_S,
            )
            return []
        previous = self.spike_watermark_s
        if newest > self.spike_watermark_s:
            self.spike_watermark_s = newest
        if not math.isfinite(previous) and math.isfinite(self.spike_watermark_s):
            self.schedule.start_at(self.spike_watermark_s)
        if self.state == "learning" and self._learn_started_s is None:
            self._learn_started_s = self.spike_watermark_s
        out = self._run_plan() if not self._plan_done else []
        if isinstance(msg, SpikeBatch) and msg.t_s.size:
            self._take_spikes(msg)
        if self.state == "decoding":
            steps = self._close_steps(previous)
            if not out:
                return steps
            out.extend(steps)
        elif self.state == "learning" and self.spike_watermark_s >= self._next_progress_s:
            out.append(self._learning_progress())
        return out

    def _learning_progress(self) -> LearningProgress:
        t = self.spike_watermark_s
        self._next_progress_s = t + LEARNING_REPORT_S
        if t >= self._next_tuning_s:
            self._next_tuning_s = t + TUNING_REPORT_S
            self._n_tuned = self.model.n_tuned_units_so_far()
        occupancy = self.model.occupancy_so_far_s()
        valid = self.environment.valid_mask
        coverage = float(np.count_nonzero(valid & (occupancy >= self.config.model.min_occupancy_s)) / valid.sum())
        return LearningProgress(t, occupancy, coverage, self._n_tuned, t - self._learn_started_s)

    def _take_spikes(self, msg: SpikeBatch) -> None:
        if self.state == "learning":
            self.model.update_spikes(msg.t_s, msg.unit_id)
            return
        if self.state != "decoding":
            return
        next_k = self.schedule.next_k
        closed_until_s = self.schedule.step_end_s(next_k - 1) if next_k is not None else -math.inf
        if self._unit_lut is not None:
            n_unknown, n_late = self.window.add_units(
                msg.t_s, msg.unit_id, self._unit_lut, self._unit_lut_offset, closed_until_s
            )
        else:
            rows = np.array([self._unit_rows.get(int(u), -1) for u in msg.unit_id.tolist()], np.int64)
            known = rows >= 0
            t = msg.t_s[known]
            n_unknown = rows.size - t.size
            n_late = int(np.count_nonzero(t <= closed_until_s))
            self.window.add(t, rows[known])
        if n_unknown:
            self.counters["unknown_units"] += n_unknown
        if n_late:
            self.counters["late_spikes"] += n_late

    def _on_frames(self, msg: TrackerFrames) -> None:
        fit = self._clock_fit(msg.source)
        if fit is None:
            if len(self._pending_frames) >= MAX_PENDING_FRAMES:
                self.counters["frames_dropped_unaligned"] += msg.t_s.size
                return
            self._pending_frames.append(msg)
            return
        self._apply_frames(msg, fit)

    def _apply_frames(self, msg: TrackerFrames, fit: ClockFit | bool) -> None:
        """Frames into the tracked (or true) history, on the spike clock (``fit`` True: already on it)."""
        history = self.truth if msg.source == self._truth_source else self.tracked
        learning = history is self.tracked and self.state == "learning"
        if msg.t_s.size == 1 and not learning:
            # One frame per message is the usual case: Python floats, the same IEEE
            # operations as ClockFit.to_reference, without numpy's per-call cost.
            t = msg.t_s.item(0)
            if fit is not True:
                t = fit.offset_s + (1.0 + fit.drift_ppm * 1e-6) * t
            history.add_one(t, msg.xy_cm.item(0), msg.xy_cm.item(1))
            return
        t_ref = msg.t_s if fit is True else fit.to_reference(msg.t_s)
        history.add(t_ref, msg.xy_cm)
        if learning:
            self.model.update_frames(t_ref, msg.xy_cm)

    def _same_clock(self, source: str) -> bool:
        spikes = self.announced.get(self._spike_source)
        other = self.announced.get(source)
        # Without announcements both clocks are taken to be one (documented in PROTOCOL.md).
        return spikes is None or other is None or spikes.clock == other.clock

    def _clock_fit(self, source: str) -> ClockFit | bool | None:
        """True when ``source`` runs on the spike clock, its clock fit when aligned, else None."""
        if self._same_clock(source):
            return True
        return self.clock.fit(source)

    def _on_sync(self, msg: SyncPulse) -> list[Notice]:
        try:
            self.clock.add_pulse(msg.source, msg.pulse_id, msg.t_s)
        except ClockMismatchError as exc:
            self.counters["clock_mismatch"] += 1
            t = self.spike_watermark_s
            self.bank.disarm(t, "clock_mismatch")
            log.error("%s", exc)
            return [Notice("clock_mismatch", t, {"why": str(exc)})]
        if self._pending_frames and all(self._clock_fit(m.source) is not None for m in self._pending_frames):
            pending, self._pending_frames = self._pending_frames, []
            for frames in pending:
                self._apply_frames(frames, self._clock_fit(frames.source))
        return []

    def _on_spike_source_restart(self) -> list[Notice]:
        """A restarted acquisition may restart its clock: start the steps afresh, disarmed."""
        t = self.spike_watermark_s
        self.spike_watermark_s = -math.inf
        self.schedule.next_k = None
        if self.decoder is not None:
            self.decoder.reset()
            self.window = SpikeWindow(self.window.n_units, self.window.window_s)
        self.bank.disarm(t, "source_restart")
        return [Notice("disarmed", t, {"reason": "source_restart"})]

    def _run_plan(self) -> list[Notice]:
        """The automatic session plan of ``[session]``, on data time."""
        plan = self.config.session
        if plan.learn_s <= 0 or self._plan_done:
            return []
        t = self.spike_watermark_s
        if self.state == "idle" and not self._plan_started:
            self._plan_started = True
            return self.start_learning(t)
        if self.state == "learning" and t >= self._learn_started_s + plan.learn_s:
            self._plan_done = True
            out = self.fit(t)
            if plan.arm_after_fit and self.state == "decoding":
                out.extend(self._arm(t))
            return out
        return []

    # -- decoding steps ----------------------------------------------------------

    def _close_steps(self, previous_watermark_s: float) -> list[StepOutput]:
        ks = self.schedule.due(self.spike_watermark_s)
        if len(ks) > MAX_STEPS_PER_MESSAGE:
            self.counters["steps_skipped"] += len(ks) - MAX_STEPS_PER_MESSAGE
            ks = ks[-MAX_STEPS_PER_MESSAGE:]
            self.decoder.reset()
        return [self._decode_step(k, previous_watermark_s) for k in ks]

    def _decode_step(self, k: int, previous_watermark_s: float) -> StepOutput:
        t = self.schedule.step_end_s(k)
        step = self.window.decode(self.decoder, t)
        x, y, speed = self.tracked.at_xy(t)
        tracked_xy = np.array((x, y))
        in_zone_flags = self._zone_flags(x, y)
        if self._truth_source:
            x, y = self.truth.position_at(t)
            true_xy = np.array((x, y))
            true_in_zone = self._zone_flags(x, y)
        else:
            true_xy, true_in_zone = tracked_xy, in_zone_flags
        error = self._error_cm(step.map_xy_cm, x, y)
        self.errors.add(error)
        in_zone = np.array(in_zone_flags, bool)
        map_zone = self._zone_masks[:, step.map_bin] if self._zone_masks.size else np.zeros(0, bool)
        spike_lag = t - previous_watermark_s if math.isfinite(previous_watermark_s) else 0.0
        tracker_lag = t - self.tracked.newest_t_s if math.isfinite(self.tracked.newest_t_s) else 0.0
        lag = max(spike_lag, tracker_lag, 0.0)
        step_input = StepInput.from_arrays(t, step.zone_mass, map_zone, tracked_xy, in_zone, speed, lag)
        events = tuple(self.bank.step(step_input))
        self.visits.step(t, true_in_zone)
        for ev in events:
            self.visits.event(ev.t_s, self.zone_names.index(ev.zone))
        counters = self.counters
        counters["decode_steps"] += 1
        false_events = ()
        if events:
            false_events = tuple(self._is_false(ev, true_xy) for ev in events)
            counters["events"] += len(events)
            counters["false_events"] += sum(false_events)
        self._update_digest(k, step, events)
        return StepOutput(k, t, step, tracked_xy, true_xy, speed, error, events, false_events, self.bank.armed)

    def _zone_flags(self, x_cm: float, y_cm: float) -> list[bool]:
        """Whether the position lies in each zone (False for a NaN position)."""
        env = self.environment
        return [z.contains_point(x_cm, y_cm, env) for z in self.config.zones]

    def _error_cm(self, map_xy: np.ndarray, tx: float, ty: float) -> float:
        """Distance from the MAP to the true position ``(tx, ty)``; NaN if unknown."""
        if not (math.isfinite(tx) and math.isfinite(ty)):
            return float("nan")
        if self._euclidean:
            # Arena.distance_cm's formula on scalars: one call instead of a dozen on (1, 2) arrays.
            mx, my = map_xy.tolist()
            return math.hypot(mx - tx, my - ty)
        return float(self.environment.distance_cm(map_xy[None, :], np.array([[tx, ty]]))[0])

    def _near_zone_masks(self, margin_cm: float) -> np.ndarray:
        """Bins within ``margin_cm`` of each zone (along the graph on a track)."""
        env = self.environment
        near = np.zeros_like(self._zone_masks)
        for i, mask in enumerate(self._zone_masks):
            zone_bins = np.flatnonzero(mask)
            if env.grid_shape is None:
                dist = env.bin_distance_matrix_cm()[zone_bins].min(axis=0)
            else:
                centers = env.bin_centers_cm
                dist = np.full(env.n_bins, np.inf)
                for start in range(0, zone_bins.size, 256):
                    chunk = centers[zone_bins[start:start + 256]]
                    d = np.sqrt(((centers[:, None, :] - chunk[None, :, :]) ** 2).sum(-1)).min(axis=1)
                    dist = np.minimum(dist, d)
            near[i] = dist <= margin_cm + env.bin_cm
        return near

    def _is_false(self, event: TriggerEvent, true_xy: np.ndarray) -> bool:
        """An event is false when the animal was known to be far from its zone."""
        rule = next((r for r in self.config.rules if r.name == event.rule), None)
        if rule is not None and rule.tracked == "outside":
            return False
        b = int(self.environment.bin_index(true_xy[None, :])[0])
        if b < 0:
            return False
        return not bool(self._near_zone[self.zone_names.index(event.zone), b])

    def _update_digest(self, k: int, step: DecodedStep, events: tuple[TriggerEvent, ...]) -> None:
        h = self._digest
        h.update(struct.pack("<qqdd", k, int(step.map_bin), float(step.peak_prob), float(step.hpd95_size)))
        # A contiguous float64 view of the decoder's buffer: hashed in place, no copy.
        h.update(step.zone_mass)
        for ev in events:
            h.update(f"{ev.event_id}|{ev.rule}|{ev.zone}|{ev.t_s!r}".encode())

    @property
    def digest(self) -> str:
        """Hex digest over every decoded step and event so far."""
        return self._digest.hexdigest()

    def status(self) -> dict:
        """A plain-data picture of the session for the control socket and the log."""
        return {
            "state": self.state,
            "armed": self.bank.armed,
            "data_time_s": self.spike_watermark_s if math.isfinite(self.spike_watermark_s) else None,
            "counters": dict(self.counters),
            "bad_reasons": dict(self.bad_reasons),
            "sources": self.health.summary(),
            "triggers": self.bank.status(),
            "readiness": self.readiness,
            "digest": self.digest,
        }
