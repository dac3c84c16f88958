"""The settings of the pure core: ``[ripples]``, ``[model]``, ``[decoder]``, ``[marks]``, ``[sources]``, ``[session]``."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Literal, get_args

from decoder.config.checks import (
    ConfigError,
    _positive,
    _positive_int,
)


@dataclass(frozen=True)
class RippleSettings:
    """Online sharp-wave ripple detection (``decoder.signals.ripple_detector``), the ``[ripples]`` table.

    Off while ``source`` is empty. Every field but ``source``,
    ``max_speed_cm_s`` and the ``content_`` ones (``decoder.session.replay_content``)
    is passed to ``RippleDetector`` under its own name.
    """

    #: Source name of the LFP stream; its clock must be the spike source's. Empty: no detection.
    source: str = ""
    #: Ripple band (Hz); 150-250 Hz is common practice.
    band_hz: tuple[float, float] = (150.0, 250.0)
    #: Butterworth order of the band-pass's prototype (sections); a low order keeps the group delay short.
    filter_order: int = 2
    #: Onset threshold on the channels' mean robust z-score of the envelope (s.d. above the median).
    threshold_sd: float = 3.5
    #: An event ends when the mean z-score falls below this.
    end_sd: float = 1.0
    #: The mean z-score must stay above the threshold this long before a detection (s): each ms
    #: adds a ms of latency and filters out more of the background's brief excursions above the
    #: threshold (2-3 ms on average in the ripple band), the false detections at rest.
    min_duration_s: float = 0.004
    #: Channels that must each be above ``channel_sd`` at the detection (multi-channel agreement).
    min_channels: int = 1
    #: The per-channel z-score for agreement.
    channel_sd: float = 2.0
    #: The baseline (median and MAD of the envelope outside events) covers the newest this-many s.
    baseline_window_s: float = 60.0
    #: Seconds of baseline before the first detection.
    warm_up_s: float = 10.0
    #: A ripple detected while the tracked speed is above this (cm/s) is counted, not acted on;
    #: immobility below about 4 cm/s is common practice. inf turns the condition off; an unknown
    #: speed (NaN) never satisfies it.
    max_speed_cm_s: float = 4.0
    #: Length of the content bins decoded while a ripple lasts (s): short, non-overlapping, each
    #: with the uniform prior (replay content jumps); 10-20 ms is common practice.
    content_bin_s: float = 0.015
    #: The first content bin starts this long before the ripple's onset (s): a replay's spikes
    #: begin before the envelope crosses the threshold (on the simulated rig the crossing comes
    #: 14-32 ms into a ripple), and a sequence seen from its start shows its direction sooner.
    content_lead_s: float = 0.02
    #: Content bins are decoded from the event's start (content_lead_s before the ripple's onset)
    #: up to this long after it (s), unless the ripple's LFP offset (the envelope back below
    #: end_sd) ends them sooner; ripples last 30-100 ms (common practice).
    content_max_s: float = 0.1
    #: A content bin with fewer spikes is left out of the event's measures (a nearly empty bin's
    #: posterior is close to the uniform prior and says little of the content); the event goes
    #: on, to its LFP offset.
    content_min_spikes: int = 4
    #: The sequence filter (``decoder.inference.sequence_filter``): the replay's speed range along
    #: the distance to a zone (cm/s), low and high. Replay runs 10-20 times faster than the
    #: animal (common practice), which runs 15-50 cm/s.
    content_speed_cm_s: tuple[float, float] = (150.0, 1000.0)
    #: The sequence filter's slack (cm): each bin's move is widened by this on either side (a
    #: path bending away from the shortest route, the decoding's jitter), and a replay that
    #: stays within it reads as no sequence.
    content_slack_cm: float = 3.0
    #: The sequence filter's stray share, in [0, 1): the probability that a content bin's spikes
    #: say nothing of the replayed place (the resting animal's own cells beyond the background, a
    #: stray burst), so that one such bin costs a hypothesis a bounded amount.
    content_stray_p: float = 0.1

    def __post_init__(self) -> None:
        if not isinstance(self.source, str):
            raise ConfigError(f"[ripples] source must be a source name, got {self.source!r}")
        try:
            low, high = (float(v) for v in self.band_hz)
        except (TypeError, ValueError):
            raise ConfigError(f"[ripples] band_hz must be a pair [low, high] in Hz, got {self.band_hz!r}") from None
        if not 0 < low < high:
            raise ConfigError(f"[ripples] band_hz must satisfy 0 < low < high, got {self.band_hz!r}")
        object.__setattr__(self, "band_hz", (low, high))
        for name in ("filter_order", "min_channels", "content_min_spikes"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ConfigError(f"[ripples] {name} must be a whole number of at least 1, got {value!r}")
        _positive("ripples", content_bin_s=self.content_bin_s, content_max_s=self.content_max_s,
                  threshold_sd=self.threshold_sd, baseline_window_s=self.baseline_window_s,
                  warm_up_s=self.warm_up_s)
        if not self.end_sd < self.threshold_sd:
            raise ConfigError(f"[ripples] end_sd ({self.end_sd}) must lie below threshold_sd ({self.threshold_sd})")
        if not 0 <= self.min_duration_s <= 0.1:
            raise ConfigError(f"[ripples] min_duration_s must lie within 0..0.1 s, got {self.min_duration_s!r}")
        if self.warm_up_s > self.baseline_window_s:
            raise ConfigError(f"[ripples] warm_up_s ({self.warm_up_s}) must not exceed baseline_window_s")
        if not self.max_speed_cm_s >= 0:
            raise ConfigError(f"[ripples] max_speed_cm_s must be a speed >= 0 cm/s (inf for none), "
                              f"got {self.max_speed_cm_s!r}")
        if not 0.002 <= self.content_bin_s <= 0.1:
            raise ConfigError(f"[ripples] content_bin_s must lie within 0.002..0.1 s, got {self.content_bin_s!r}")
        if not self.content_bin_s <= self.content_max_s <= 2.0:
            raise ConfigError(f"[ripples] content_max_s must lie within content_bin_s..2 s, "
                              f"got {self.content_max_s!r}")
        if not 0 <= self.content_lead_s <= min(0.1, self.content_max_s):
            raise ConfigError(f"[ripples] content_lead_s must lie within 0..0.1 s and not exceed content_max_s, "
                              f"got {self.content_lead_s!r}")
        try:
            low_v, high_v = (float(v) for v in self.content_speed_cm_s)
        except (TypeError, ValueError):
            raise ConfigError(f"[ripples] content_speed_cm_s must be a pair [low, high] in cm/s, "
                              f"got {self.content_speed_cm_s!r}") from None
        if not 0 <= low_v <= high_v <= 10_000.0:
            raise ConfigError(f"[ripples] content_speed_cm_s must satisfy 0 <= low <= high <= 10000 cm/s, "
                              f"got {self.content_speed_cm_s!r}")
        object.__setattr__(self, "content_speed_cm_s", (low_v, high_v))
        if not 0 <= self.content_slack_cm <= 100.0:
            raise ConfigError(f"[ripples] content_slack_cm must lie within 0..100 cm, got {self.content_slack_cm!r}")
        if not 0 <= self.content_stray_p < 1:
            raise ConfigError(f"[ripples] content_stray_p must lie in [0, 1), got {self.content_stray_p!r}")

    def sequence_kwargs(self) -> dict[str, Any]:
        """The sequence filter's keyword arguments (``ReplayContent``'s ``speed_cm_s``, ``slack_cm``, ``stray_p``)."""
        return {"speed_cm_s": self.content_speed_cm_s, "slack_cm": self.content_slack_cm,
                "stray_p": self.content_stray_p}

    def detector_kwargs(self) -> dict[str, Any]:
        """The ``RippleDetector`` keyword arguments this table sets."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if f.name != "source" and f.name != "max_speed_cm_s" and not f.name.startswith("content_")}


@dataclass(frozen=True)
class ModelSettings:
    """How the place model learns (see ``decoder.encoding.place_model.PlaceModel``)."""

    #: Frames slower than this do not count (cm/s); common practice 2-5 cm/s. On a heading ring
    #: this is the angular head speed (deg/s), and 0 keeps every frame: head-direction cells fire
    #: whether the head turns or not (common practice).
    min_speed_cm_s: float = 3.0
    #: Gaussian smoothing of occupancy and spike counts, s.d. in cm.
    smooth_cm: float = 4.0
    #: Bins occupied less than this (s) are left out of the decoder's map.
    min_occupancy_s: float = 0.1
    #: Floor under every rate (Hz) so that no likelihood is minus infinity.
    rate_floor_hz: float = 0.01
    #: Number of blocked cross-validation folds.
    cv_folds: int = 5
    #: Length of one cross-validation block of time (s).
    cv_block_s: float = 30.0

    def __post_init__(self) -> None:
        _positive("model", smooth_cm=self.smooth_cm, min_occupancy_s=self.min_occupancy_s,
                  rate_floor_hz=self.rate_floor_hz, cv_block_s=self.cv_block_s)
        if self.min_speed_cm_s < 0:
            raise ConfigError(f"[model] min_speed_cm_s must be >= 0, got {self.min_speed_cm_s}")
        if int(self.cv_folds) != self.cv_folds or self.cv_folds < 2:
            raise ConfigError(f"[model] cv_folds must be an integer >= 2, got {self.cv_folds}")

    def place_model_kwargs(self) -> dict[str, Any]:
        return {
            "min_speed_cm_s": self.min_speed_cm_s,
            "smooth_cm": self.smooth_cm,
            "min_occupancy_s": self.min_occupancy_s,
            "rate_floor_hz": self.rate_floor_hz,
            "cv_folds": int(self.cv_folds),
            "cv_block_s": self.cv_block_s,
        }


Method = Literal["sliding_window", "filter"]
Prior = Literal["uniform", "state_space"]


@dataclass(frozen=True)
class DecoderSettings:
    """The decoding step (see ``decoder.inference.decoding.BayesDecoder``)."""

    #: "filter" (the default) or "sliding_window".
    #: "filter": the causal state-space filter over non-overlapping bins of step_s, each
    #: spike counted once, so the posterior at a step's end is the position then (window_s
    #: and random_walk_sd_cm are not used). Its random walk is the movement model learned
    #: from the session's own tracking at fit time, mixed with a small uniform jump (0.05
    #: per s) so the filter can leave a wrong estimate; its likelihood is divided by
    #: likelihood_temperature, fitted at fit time so that the 95 % HPD region holds the
    #: position in 95 % of held-out learning steps. Needs prior = "state_space".
    #: "sliding_window": each step decodes the overlapping window of window_s that ends
    #: there, with the prior below. Every spike is counted window_s / step_s times (10 at
    #: the defaults), so with the state-space prior this is not a proper filter and the
    #: posterior mass (zone mass, HPD size) is not calibrated: it is overconfident, and
    #: the estimate trails the animal by about half a window.
    method: Method = "filter"
    #: Length of the spike-count window (s) of method = "sliding_window"; 0.2 for
    #: behaviour, 0.02 for fast events.
    window_s: float = 0.2
    #: Steps end at multiples of this (s); the filter's bins are this long, the sliding
    #: window moves by this much.
    step_s: float = 0.02
    #: "uniform" or "state_space" (causal random-walk filter).
    prior: Prior = "state_space"
    #: S.d. of the random walk per step (cm), for method = "sliding_window" with the
    #: state-space prior.
    random_walk_sd_cm: float = 3.0
    #: For method = "filter": the log-likelihood of each step is divided by this (> 1
    #: widens the posterior of overdispersed, correlated counts; 1 is the plain Poisson
    #: model). Unset (the default): fitted from the learning data at fit time
    #: (decoder.encoding.calibration) and saved with the model; set it only to override.
    likelihood_temperature: float | None = None
    #: For method = "filter": the walk drifts each step by this share (0..1) of the
    #: decoder's own velocity (the decoded position's displacement per step, averaged
    #: over a fitted time constant; never the tracker's), so the prior keeps up with a
    #: running animal. Unset (the default): fitted with the temperature at fit time from
    #: held-out learning steps and saved with the model (0 where no drift helps); 0 turns
    #: the drift off (the plain random walk); set it only to override.
    drift_gain: float | None = None
    #: A step closes when the spike stream's data time passes its end by this much (s).
    allowed_lateness_s: float = 0.005

    def __post_init__(self) -> None:
        _positive("decoder", window_s=self.window_s, step_s=self.step_s, random_walk_sd_cm=self.random_walk_sd_cm)
        if self.likelihood_temperature is not None:
            _positive("decoder", likelihood_temperature=self.likelihood_temperature)
        if self.drift_gain is not None and not (
            isinstance(self.drift_gain, (int, float)) and not isinstance(self.drift_gain, bool)
            and 0 <= self.drift_gain <= 1
        ):
            raise ConfigError(f"[decoder] drift_gain must be a number from 0 to 1, got {self.drift_gain!r}")
        if self.method not in get_args(Method):
            raise ConfigError(f"[decoder] method must be one of {get_args(Method)}, got {self.method!r}")
        if self.prior not in get_args(Prior):
            raise ConfigError(f"[decoder] prior must be one of {get_args(Prior)}, got {self.prior!r}")
        if self.method == "filter" and self.prior != "state_space":
            raise ConfigError("[decoder] method = 'filter' (the default) is the state-space filter; set prior = "
                              "'state_space', or method = 'sliding_window' to decode each window with a uniform prior")
        if self.step_s > self.window_s:
            raise ConfigError(f"[decoder] step_s ({self.step_s}) must not exceed window_s ({self.window_s})")
        if not 0 <= self.allowed_lateness_s <= 1.0:
            raise ConfigError(f"[decoder] allowed_lateness_s must be within 0..1 s, got {self.allowed_lateness_s}")


@dataclass(frozen=True)
class MarkSettings:
    """Clusterless decoding from waveform marks (see ``decoder.encoding.mark_model.MarkModel``)."""

    #: Learn and decode the spike source's marked spikes (PROTOCOL.md, "Marked spikes").
    enabled: bool = False
    #: S.d. of the Gaussian kernel in mark space on every channel (uV).
    bandwidth_uv: float = 20.0
    #: Encoding spikes kept per electrode group (reservoir sampling); bounds memory and work.
    max_spikes_per_group: int = 20_000
    #: Encoding spikes further than this many kernel s.d. on any channel weigh 0.
    cutoff_sd: float = 4.0
    #: Seed of the reservoir sampling, so that a replay keeps the same spikes.
    seed: int = 13
    #: Kernel density compression at fit: a position bin's marks within this many kernel
    #: s.d. of each other become one weighted kernel (0 keeps every mark); 0.5-1 cuts the
    #: work per spike several-fold (Sodkomkham et al. 2016, Knowl-Based Syst 94:1).
    merge_sd: float = 0.0
    #: Per-group rate ceiling (Hz) over the session's artefact window; a tetrode's
    #: multi-unit rate stays well below it (common practice), a noise burst does not.
    artefact_ceiling_hz: float = 5000.0
    #: Marked spikes decoded per step at most; beyond, the rest are counted and left out.
    max_spikes_per_step: int = 2000

    def __post_init__(self) -> None:
        _positive("marks", bandwidth_uv=self.bandwidth_uv, cutoff_sd=self.cutoff_sd,
                  artefact_ceiling_hz=self.artefact_ceiling_hz)
        _positive_int("marks", "max_spikes_per_group", self.max_spikes_per_group)
        _positive_int("marks", "max_spikes_per_step", self.max_spikes_per_step)
        if not (isinstance(self.merge_sd, (int, float)) and 0 <= self.merge_sd <= 2):
            raise ConfigError(f"[marks] merge_sd must be a number of kernel s.d. within 0..2, got {self.merge_sd!r}")
        if type(self.enabled) is not bool or type(self.seed) is not int:
            raise ConfigError("[marks] enabled must be true or false and seed an integer")


@dataclass(frozen=True)
class SourceSettings:
    """Which announced source is which stream."""

    #: Source name of the spike stream; its clock is the pipeline's reference clock.
    spikes: str = "ephys"
    #: Source name of the video tracker.
    tracker: str = "tracker"
    #: Optional source of the true position (simulated rigs only); used for scoring, never decoding.
    #: A third name: neither the spikes nor the tracker.
    truth: str = ""
    #: Largest allowed disagreement between sync pulses and the clock fit (s).
    clock_tolerance_s: float = 0.004
    #: What of a tracker frame is decoded and scored: "position" (x, y in cm) or "heading" (``hd``,
    #: as a point on the heading ring, ``decoder.space.headings``). Follows from [environment]: a
    #: heading ring decodes the heading, any other kind the position; leave it unset.
    tracked_value: str = "position"

    def __post_init__(self) -> None:
        if self.tracked_value not in ("position", "heading"):
            raise ConfigError(f"[sources] tracked_value must be 'position' or 'heading', got {self.tracked_value!r}")
        if not self.spikes or not self.tracker or self.spikes == self.tracker:
            raise ConfigError("[sources] spikes and tracker must be two different, non-empty source names")
        if self.truth in (self.spikes, self.tracker):
            raise ConfigError(
                f"[sources] truth must name a third source (or be empty), not {self.truth!r}, "
                "which is already the spikes or the tracker"
            )
        _positive("sources", clock_tolerance_s=self.clock_tolerance_s)


@dataclass(frozen=True)
class SessionSettings:
    """The automatic session plan, in data time; all off by default.

    With ``learn_s > 0`` the session starts learning at the first data, fits
    after ``learn_s`` seconds and, with ``arm_after_fit``, arms the triggers.
    The same plan replays identically because it runs on data time.
    """

    #: Seconds of data to learn from before fitting; 0 waits for control commands.
    learn_s: float = 0.0
    #: Arm the triggers as soon as the model is fitted (demos and dry runs).
    arm_after_fit: bool = False
    #: Compute the cross-validated error at fitting time (costs a few seconds).
    cross_validate: bool = True
    #: An event counts as false when the true (or tracked) position is farther than this from its zone (cm).
    false_margin_cm: float = 10.0
    #: Data time may jump at most this far past the spike stream's newest time (s). A spike-source
    #: message beyond it is refused (counter ``time_jumps``) instead of moving the session's clock,
    #: and a tracker frame beyond it is dropped (``frames_dropped_ahead``); refused spike-source
    #: messages in a row that agree with each other (``decoder.session.streams.RESYNC_AFTER_MESSAGES``)
    #: mean the clock truly moved: the session follows it and the triggers disarm. A rig sends a heartbeat at least once per decoding step
    #: (PROTOCOL.md), so seconds without data time moving mean an outage or a corrupt stamp.
    max_time_jump_s: float = 5.0
    #: Spike sanity (``decoder.session.artefacts``): per-unit instantaneous-rate ceiling (Hz), 1 / an
    #: absolute refractory period of 2 ms (common practice). A unit firing more than
    #: ``artefact_ceiling_hz * artefact_window_s`` spikes plus one within less than
    #: ``artefact_window_s`` is a noise transient: those spikes are left out of learning and
    #: decoding and counted (``artefact_spikes``). 0 turns this guard off.
    artefact_ceiling_hz: float = 500.0
    #: The window over which a unit is held to ``artefact_ceiling_hz`` (s); 10 ms passes a place
    #: cell's complex-spike burst (2-6 spikes at 3-6 ms ISI, common practice).
    artefact_window_s: float = 0.010
    #: Population-burst guard: this fraction of the units seen so far firing within
    #: ``artefact_population_window_s`` is a motion or electrical artefact; all those spikes are left
    #: out. A sharp-wave ripple spreads its spikes over ~100 ms (common practice), far below it. 0 = off.
    artefact_population_fraction: float = 0.5
    #: The instant of a population artefact (s).
    artefact_population_window_s: float = 0.0005
    #: A population artefact takes at least this many distinct units, so few units never coincide by chance.
    artefact_population_min_units: int = 4

    def __post_init__(self) -> None:
        if self.learn_s < 0:
            raise ConfigError(f"[session] learn_s must be >= 0, got {self.learn_s}")
        if self.false_margin_cm < 0:
            raise ConfigError(f"[session] false_margin_cm must be >= 0, got {self.false_margin_cm}")
        _positive("session", max_time_jump_s=self.max_time_jump_s, artefact_window_s=self.artefact_window_s,
                  artefact_population_window_s=self.artefact_population_window_s)
        if not 0 <= self.artefact_ceiling_hz < math.inf:
            raise ConfigError(f"[session] artefact_ceiling_hz must be a rate >= 0 Hz (0 turns the guard off), "
                              f"got {self.artefact_ceiling_hz}")
        if not 0 <= self.artefact_population_fraction <= 1:
            raise ConfigError(f"[session] artefact_population_fraction must lie in [0, 1] (0 turns the guard "
                              f"off), got {self.artefact_population_fraction}")
        if not (isinstance(self.artefact_population_min_units, int) and self.artefact_population_min_units >= 2):
            raise ConfigError(f"[session] artefact_population_min_units must be an integer >= 2, "
                              f"got {self.artefact_population_min_units!r}")
