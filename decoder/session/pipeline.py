"""The session pipeline: typed messages in, decoded steps and events out.

This is the one data path that live runs and replays share::

    message ─► stream health ─► dispatch by type ─► positions (clock alignment) ─► learning (place model)
                                                └─► spike intake ─► decoding steps ─► triggers ─► outputs
                                                                                  └─► scoring, digest

The pipeline keeps the session's states and its automatic plan and hands each
message to its one handler; the parts live in modules of their own
(``streams``, ``positions``, ``steps``, ``judge``, ``scoring``, ``digest``,
``outputs``). Everything here runs on data time (acquisition seconds on the
spike source's clock). The pipeline never reads the wall clock, a socket or a
file, so feeding it the recorded messages in their recorded order reproduces
a live run exactly, down to the digest of every decoded step and event.

Session states (our own names): ``idle`` (nothing learnt, not learning),
``learning`` (the place model accumulates), ``decoding`` (a fitted or loaded
model decodes every step; triggers may be armed).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Callable

import numpy as np

from decoder.config import ExperimentConfig
from decoder.encoding.mark_model import MarkModel
from decoder.encoding.place_model import PlaceModel
from decoder.messages import (
    ControlCommand,
    GroupAnnounce,
    Heartbeat,
    InputMessage,
    MarkedSpikes,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)
from decoder.session.artefacts import SpikeSanity
from decoder.session.clock import ClockMismatchError
from decoder.session.digest import StepDigest
from decoder.session.judge import StepJudge
from decoder.session.marks import MarkStream
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.positions import Positions
from decoder.session.ripples import ContentOutput, RippleOutput, RippleStream
from decoder.session.scoring import ErrorHistogram, VisitScore
from decoder.session.steps import DecodingSteps, StepSchedule, build_decoder, filter_figures
from decoder.session.streams import CONTROL_STREAM, SpikeWatermark, StreamHealth
from decoder.session.triggers import SessionCapError, StepInput, TriggerBank
from decoder.signals.lfp_chunk import LfpChunk
from decoder.space.zones import zone_masks

log = logging.getLogger(__name__)

#: Data time between two learning progress reports (s).
LEARNING_REPORT_S = 1.0

#: Data time between two counts of spatially tuned units while learning (s);
#: each count fits rate maps, so it is kept rare.
TUNING_REPORT_S = 15.0

#: Below this fraction of its bins in the learned map, a zone gets a warning at fitting time.
ZONE_COVERAGE_WARNING = 0.8

Output = StepOutput | LearningProgress | Notice | RippleOutput | ContentOutput


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
        self.counters: dict[str, int] = {
            "bad_messages": 0,
            "stale_messages": 0,
            "unknown_source": 0,
            "time_jumps": 0,
            "unknown_units": 0,
            "late_spikes": 0,
            "frames_dropped_unaligned": 0,
            "frames_dropped_ahead": 0,
            "clock_mismatch": 0,
            "steps_skipped": 0,
            "decode_steps": 0,
            "events": 0,
            "false_events": 0,
            "artefact_spikes": 0,
        }
        self.bad_reasons: dict[str, int] = {}
        self.announced: dict[str, SourceAnnounce] = {}
        # The session's own streams are tracked whatever else comes.
        self.health = StreamHealth(reserved=frozenset((config.sources.spikes, config.sources.tracker,
                                                       config.sources.truth, CONTROL_STREAM)))
        s = config.session
        self.spike_sanity = SpikeSanity(s.artefact_ceiling_hz, s.artefact_window_s, s.artefact_population_fraction,
                                        s.artefact_population_window_s, s.artefact_population_min_units)
        self.watermark = SpikeWatermark(config.session.max_time_jump_s)
        m = config.model
        # Marked spikes are learned and decoded only where the config asks (clusterless decoding).
        self.marks = (MarkStream(config.marks, s, self.environment, m.smooth_cm, m.min_speed_cm_s, m.rate_floor_hz,
                                 self.counters) if config.marks.enabled else None)
        self._spike_source = config.sources.spikes
        self._has_truth = bool(config.sources.truth)
        self._position_sources = (config.sources.tracker, config.sources.truth)
        self.positions = Positions(config.sources, self.counters, self.watermark)
        self.tracked = self.positions.tracked   # the shell reads the tracked position from here
        self.schedule = StepSchedule(config.decoder.step_s, config.decoder.allowed_lateness_s)
        self.steps: DecodingSteps | None = None
        self.zone_names = config.zone_names()
        self._zone_masks = zone_masks(config.zones, self.environment)
        self.bank = TriggerBank(config.rules, self.zone_names, config.safety)
        self.ripples = RippleStream(config.ripples, self.bank, self.positions.tracked)
        self.judge = StepJudge(self.environment, config.zones, self._zone_masks, config.rules,
                               config.session.false_margin_cm)
        self.errors = ErrorHistogram()
        self.visits = VisitScore(len(config.zones))
        self.digester = StepDigest()
        self.model: PlaceModel | None = None
        self.model_is_loaded = False
        self.readiness: dict | None = None
        self._learn_started_s: float | None = None
        self._plan_started = False
        self._plan_done = False
        self._next_progress_s = -math.inf
        self._next_tuning_s = -math.inf
        self._n_tuned: int | None = None
        # The one dispatch table: each message type has one handler.
        self._handlers: dict[type, Callable[[InputMessage], list[Output]]] = {
            SpikeBatch: self._on_spikes,
            MarkedSpikes: self._on_marks,
            GroupAnnounce: self._on_groups,
            Heartbeat: self._on_heartbeat,
            TrackerFrames: self._on_frames,
            SyncPulse: self._on_sync,
            SourceAnnounce: self._on_announce,
            ControlCommand: self.on_control,
            LfpChunk: self._on_lfp,
        }
        if model is not None:
            self.install_model(model, t_s=-math.inf)

    @property
    def spike_watermark_s(self) -> float:
        """Data time: the spike stream's newest timestamp or heartbeat (s); -inf before any."""
        return self.watermark.t_s

    # -- the one entry point -------------------------------------------------

    def on_message(self, msg: InputMessage) -> list[Output]:
        """Feed one validated message; return the steps it closed and any notices."""
        verdict = self.health.accept(msg.source, msg.seq)
        if verdict == "overflow":
            # Counted in stream health as one of the other sources; no table grows for it.
            self.counters["unknown_source"] += 1
            return []
        if verdict == "stale":
            self.counters["stale_messages"] += 1
            log.warning("dropped message %d from %r: sequence number not above the last one", msg.seq, msg.source)
            return []
        if verdict == "restart":
            out = self._on_restart(msg.source)
            out.extend(self._handlers[type(msg)](msg))
            return out
        return self._handlers[type(msg)](msg)

    def count_bad_message(self, reason: str, source: str | None = None, seq: int | None = None) -> list[Output]:
        """Count a message the shell could not decode or would not take (the shell logs why).

        Parameters
        ----------
        reason : str
            The counter's category (one of ``decoder.messages.REASONS``).
        source, seq : str and int, optional
            The frame's source and sequence number, when its envelope was
            readable: the frame took that number, so it is counted as rejected
            for its source and not as a gap; a rejected frame numbered 0 still
            says its source restarted.
        """
        self.counters["bad_messages"] += 1
        self.bad_reasons[reason] = self.bad_reasons.get(reason, 0) + 1
        if source is None or seq is None:
            return []
        if self.health.note_rejected(source, seq) == "restart":
            return self._on_restart(source)
        return []

    # -- one handler per message type --------------------------------------------

    def _on_spikes(self, msg: SpikeBatch) -> list[Output]:
        if msg.source != self._spike_source:
            return self._off_spike_source(msg)
        t = msg.t_s
        if t.size:
            # Before learning and decoding alike; the recorder already holds the raw batch.
            keep = self.spike_sanity.keep(t, msg.unit_id)
            # np.count_nonzero costs a third of keep.all() on the small mask of every spike batch.
            n_flagged = keep.size - np.count_nonzero(keep)
            if n_flagged:
                self.counters["artefact_spikes"] += n_flagged
                msg = dataclasses.replace(msg, t_s=t[keep], unit_id=msg.unit_id[keep])
        return self._on_spike_time(t.item(-1) if t.size else -math.inf, msg)

    def _on_marks(self, msg: MarkedSpikes) -> list[Output]:
        if msg.source != self._spike_source:
            return self._off_spike_source(msg)
        newest = msg.t_s.item(-1) if msg.t_s.size else -math.inf
        if self.marks is None:
            # Marks the config does not decode still move the spike source's clock.
            return self._on_spike_time(newest, None)
        return self._on_spike_time(newest, None, self.marks.accept(msg))

    def _on_heartbeat(self, msg: Heartbeat) -> list[Output]:
        if msg.source != self._spike_source:
            return self._off_spike_source(msg)
        return self._on_spike_time(msg.t_s, None)

    def _off_spike_source(self, msg: SpikeBatch | MarkedSpikes | Heartbeat) -> list[Output]:
        # A position source's heartbeat says only that it is alive; anything else is unknown here.
        if msg.source not in self._position_sources:
            self.counters["unknown_source"] += 1
        return []

    def _on_frames(self, msg: TrackerFrames) -> list[Output]:
        if msg.source in self._position_sources:
            self.positions.add_frames(msg, self._frame_learner())
        else:
            self.counters["unknown_source"] += 1
        return []

    def _on_sync(self, msg: SyncPulse) -> list[Output]:
        try:
            self.positions.add_sync(msg, self._frame_learner())
        except ClockMismatchError as exc:
            self.counters["clock_mismatch"] += 1
            t = self.watermark.t_s
            self.bank.disarm(t, "clock_mismatch")
            log.error("%s", exc)
            return [Notice("clock_mismatch", t, {"why": str(exc)})]
        return []

    def _on_lfp(self, msg: LfpChunk) -> list[Output]:
        if msg.source != self.config.ripples.source:
            self.counters["unknown_source"] += 1
            return []
        out = self.ripples.take(msg, self.watermark.t_s)
        for ripple in out:
            self.counters["events"] += len(ripple.events)
        return out

    def _on_announce(self, msg: SourceAnnounce) -> list[Output]:
        self.announced[msg.source] = msg
        self.positions.announce(msg.source, msg.clock)
        return []

    def _on_groups(self, msg: GroupAnnounce) -> list[Output]:
        if msg.source != self._spike_source:
            self.counters["unknown_source"] += 1
        elif self.marks is not None:
            self.marks.announce(msg)
        return []

    def _on_spike_time(self, newest_s: float, batch: SpikeBatch | None,
                       marks: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> list[Output]:
        """The spike stream moved on to ``newest_s``: the plan, the spikes (or marked spikes), then the steps that closed."""
        previous = self.watermark.t_s
        moved = self.watermark.advance(newest_s)
        if moved == "refused":
            self.counters["time_jumps"] += 1
            log.warning(
                "refused a message from %r: its time %.3f s jumps %+.1f s from the stream's (limit %g s, "
                "[session] max_time_jump_s)",
                self._spike_source, newest_s, newest_s - previous, self.watermark.max_jump_s,
            )
            return []
        now = self.watermark.t_s
        resync: list[Output] = []
        if moved == "resync":
            resync = self._on_time_resync(previous, now)
            previous = now
        elif previous == -math.inf and now != -math.inf:
            self.schedule.start_at(now)
        if self.state == "learning" and self._learn_started_s is None:
            self._learn_started_s = now
        out = self._run_plan() if not self._plan_done else []
        if resync:
            out = resync + out
        if batch is not None and batch.t_s.size:
            if self.state == "learning":
                self.model.update_spikes(batch.t_s, batch.unit_id)
            elif self.state == "decoding":
                self.steps.take_spikes(batch.t_s, batch.unit_id)
                self.ripples.take_spikes(batch.t_s, batch.unit_id)
        if marks is not None:
            if self.state == "learning":
                self.marks.learn(marks, self.positions.tracked)
            elif self.state == "decoding":
                known = self.steps.take_marks(marks)
                if known is not None:
                    self.ripples.take_marks(known)
        if self.state == "decoding":
            steps: list[Output] = [self._decode_step(k, previous) for k in self.steps.due(now)]
            content = self.ripples.content_due(now)
            if content:
                self.counters["events"] += sum(len(c.events) for c in content)
                steps.extend(content)
            if not out:
                return steps
            out.extend(steps)
        elif self.state == "learning" and now >= self._next_progress_s:
            out.append(self._learning_progress())
        return out

    def _on_restart(self, source: str) -> list[Output]:
        """A source restarted its sequence numbers, and may have restarted its clock."""
        out: list[Output] = [Notice("source_restart", self.watermark.t_s, {"source": source})]
        log.warning("source %r restarted its sequence numbers", source)
        self.positions.forget_clock(source)
        if source == self.config.ripples.source:
            self.ripples.restart()
        if source == self._spike_source:
            # Steps start afresh on the new clock, disarmed.
            t = self.watermark.t_s
            if self.ripples.content is not None:
                self.ripples.content.end()
            self.watermark.reset()
            self.schedule.stop()
            if self.steps is not None:
                self.steps.restart()
            self.bank.disarm(t, "source_restart")
            out.append(Notice("disarmed", t, {"reason": "source_restart"}))
        return out

    def _on_time_resync(self, previous_s: float, now_s: float) -> list[Output]:
        """The spike stream's clock truly jumped: decoding starts afresh at ``now_s``, disarmed."""
        log.warning("the spike stream's time stayed %.1f s past the session's clock (%.3f s): following it, "
                    "triggers disarmed", now_s - previous_s, previous_s)
        self.schedule.start_at(now_s)
        if self.steps is not None:
            self.steps.restart()
        self.bank.disarm(now_s, "time_jump")
        return [Notice("time_jump", now_s, {"from_s": previous_s, "to_s": now_s}),
                Notice("disarmed", now_s, {"reason": "time_jump"})]

    def _frame_learner(self) -> PlaceModel | None:
        return self.model if self.state == "learning" else None

    # -- control ---------------------------------------------------------------

    def on_control(self, cmd: ControlCommand) -> list[Notice]:
        """Apply a control command at the current data time."""
        t = self.watermark.t_s
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
            if self.marks is not None:
                self.marks.start_learning(self.model.fold_of)
        self.state = "learning"
        # Learning time counts from the first data if no data has come yet.
        self._learn_started_s = t_s if math.isfinite(t_s) else None
        self.bank.disarm(t_s, "learning")
        return [Notice("state", t_s, {"state": self.state})]

    def fit(self, t_s: float) -> list[Notice]:
        """Fit the model learnt so far and start decoding with it."""
        if self.model is None or self.model_is_loaded:
            return [Notice("refused", t_s, {"command": "fit", "why": "nothing has been learnt"})]
        mark_model = None
        try:
            self.model.fit()
            if self.marks is not None:
                mark_model = self.marks.fit(self.model.occupancy_s_, self.model.visited_mask_, self.positions.tracked)
            # Saved in the session's model file with the place model, and decoded again when it is loaded.
            self.model.mark_model_ = mark_model
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
        if mark_model is not None:
            readiness["marks"] = mark_model.readiness()
        self.readiness = readiness
        installed = self.install_model(self.model, t_s, mark_model=mark_model)
        if self.config.decoder.method == "filter":
            readiness["filter"] = figures = filter_figures(self.model, self.steps.decoder)
            if mark_model is not None and figures.get("held_out_with_marks"):
                # The marks' cross-validated error: held-out steps decoded with them (and the units, if any).
                readiness["marks"]["held_out_median_cm"] = min(figures["held_out_map_median_cm"],
                                                               figures["held_out_mean_median_cm"])
        notices = [Notice("fitted", t_s, {"readiness": readiness})]
        for name, covered in readiness["zone_coverage"].items():
            if covered < ZONE_COVERAGE_WARNING:
                log.warning("zone %r: only %.0f%% of its bins are in the learned map; learn longer before arming",
                            name, 100 * covered)
                notices.append(Notice("zone_not_learned", t_s, {"zone": name, "coverage": covered}))
        notices.extend(installed)
        return notices

    def install_model(self, model: PlaceModel, t_s: float, loaded: bool = False,
                      mark_model: MarkModel | None = None) -> list[Notice]:
        """Decode with ``model`` (and ``mark_model``'s marked spikes) from the next step on (triggers stay disarmed).

        Without ``mark_model``, the model's own (``PlaceModel.mark_model_``, a loaded file's) decodes the marks
        where ``[marks]`` is enabled.
        """
        d = self.config.decoder
        if mark_model is None and self.marks is not None:
            mark_model = model.mark_model_
        # Everything that can fail comes before the first assignment: a failure leaves the session as it was.
        decoder = build_decoder(model, self.environment, d, self._zone_masks, self.config.model.rate_floor_hz,
                                marks=mark_model, max_marks_per_step=self.config.marks.max_spikes_per_step)
        marks = self.marks if mark_model is not None else None
        steps = DecodingSteps(decoder, model.unit_ids_, self.schedule, self.counters, marks)
        if self.marks is not None:
            self.marks.install(mark_model, decoder.window_s)
        if self.config.ripples.source:
            self.ripples.install_model(model, self.environment, self._zone_masks, self.config.model.rate_floor_hz,
                                       mark_model if marks is not None else None,
                                       self.config.marks.max_spikes_per_step)
        self.model = model
        self.model_is_loaded = loaded
        self.steps = steps
        self.state = "decoding"
        self.bank.disarm(t_s, "new_model")
        if self.watermark.t_s != -math.inf:
            self.schedule.start_at(self.watermark.t_s)
        return [Notice("state", t_s, {"state": self.state, "units": self.steps.n_units})]

    # -- the automatic plan and learning progress --------------------------------

    def _run_plan(self) -> list[Notice]:
        """The automatic session plan of ``[session]``, on data time."""
        plan = self.config.session
        if plan.learn_s <= 0 or self._plan_done:
            return []
        t = self.watermark.t_s
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

    def _learning_progress(self) -> LearningProgress:
        t = self.watermark.t_s
        self._next_progress_s = t + LEARNING_REPORT_S
        if t >= self._next_tuning_s:
            self._next_tuning_s = t + TUNING_REPORT_S
            self._n_tuned = self.model.n_tuned_units_so_far()
        occupancy = self.model.occupancy_so_far_s()
        valid = self.environment.valid_mask
        coverage = float(np.count_nonzero(valid & (occupancy >= self.config.model.min_occupancy_s)) / valid.sum())
        return LearningProgress(t, occupancy, coverage, self._n_tuned, t - self._learn_started_s)

    # -- decoding steps ----------------------------------------------------------

    def _decode_step(self, k: int, previous_watermark_s: float) -> StepOutput:
        """Decode step ``k``, trigger on it, and score it against where the animal was."""
        t, step = self.steps.decode(k)
        judge = self.judge
        tracked = self.positions.tracked
        x, y, speed = tracked.at_xy(t)
        tracked_xy = np.array((x, y))
        in_zone_flags = judge.zone_flags(x, y)
        if self._has_truth:
            x, y = self.positions.truth.position_at(t)
            true_xy = np.array((x, y))
            true_in_zone = judge.zone_flags(x, y)
        else:
            true_xy, true_in_zone = tracked_xy, in_zone_flags
        error = judge.error_cm(step.decoded_xy_cm, x, y)
        self.errors.add(error)
        map_zone = self._zone_masks[:, step.map_bin] if self._zone_masks.size else np.zeros(0, bool)
        spike_lag = t - previous_watermark_s if previous_watermark_s != -math.inf else 0.0
        tracker_lag = t - tracked.newest_t_s if tracked.newest_t_s != -math.inf else 0.0
        lag = max(spike_lag, tracker_lag, 0.0)
        step_input = StepInput.from_arrays(
            t, step.zone_mass, map_zone, tracked_xy, np.array(in_zone_flags, bool), speed, lag
        )
        events = tuple(self.bank.step(step_input))
        self.visits.step(t, true_in_zone)
        counters = self.counters
        counters["decode_steps"] += 1
        false_events = ()
        if events:
            for ev in events:
                self.visits.event(ev.t_s, self.zone_names.index(ev.zone))
            false_events = tuple(judge.is_false(ev, true_xy) for ev in events)
            counters["events"] += len(events)
            counters["false_events"] += sum(false_events)
        self.digester.add(k, step, events)
        return StepOutput(k, t, step, tracked_xy, true_xy, speed, error, events, false_events, self.bank.armed)

    @property
    def digest(self) -> str:
        """Hex digest over every decoded step and event so far."""
        return self.digester.hex

    def status(self) -> dict:
        """A plain-data picture of the session for the control socket and the log."""
        t = self.watermark.t_s
        return {
            "state": self.state,
            "armed": self.bank.armed,
            "data_time_s": t if math.isfinite(t) else None,
            "counters": dict(self.counters),
            "bad_reasons": dict(self.bad_reasons),
            "artefact_reasons": dict(self.spike_sanity.counts),
            "mark_artefact_reasons": dict(self.marks.sanity.counts) if self.marks is not None else {},
            "sources": self.health.summary(),
            "triggers": self.bank.status(),
            "readiness": self.readiness,
            "digest": self.digest,
            "ripples": self.ripples.status(),
        }
