"""Experiment configuration: TOML read into frozen dataclasses.

Every option is documented once, in the ``#:`` comment above its field, with
its unit (docs/CONFIG.md is generated from them). Defaults and validation
live here and nowhere else; a bad value raises :class:`ConfigError` naming
the table, the key and what was expected.

A config file has these tables (all optional but ``[environment]``)::

    [environment]   geometry and bin size          -> build_environment()
    [model]         place-model learning settings  -> ModelSettings
    [decoder]       window, step, prior            -> DecoderSettings
    [sources]       which stream is which          -> SourceSettings
    [session]       the automatic session plan     -> SessionSettings
    [safety]        caps beneath every rule        -> SafetyCaps
    [[zones]]       target zones                   -> decoder.space.zones
    [[rules]]       trigger rules                  -> TriggerRule
    [ripples]       online ripple detection        -> RippleSettings
    [endpoints]     ZeroMQ endpoints (shell only)  -> EndpointSettings
    [ttl]           serial TTL output (shell only) -> TtlSettings; [[ttl.outputs]] per rule -> TtlOutput
    [simulation]    the simulated rig (shell only), read by rig_adapters.sim.simulation
"""

from __future__ import annotations

import dataclasses
import ipaddress
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, get_args

import numpy as np
import tomli_w

from decoder.space.environments import Arena, Environment, HeadingRing, LinearTrack, TrackGraph
from decoder.space.zones import zone_from_dict


class ConfigError(ValueError):
    """A configuration value that cannot be used; the message names it."""


# -- trigger rules and the caps beneath them ([[rules]], [safety]) -------------------------

Mode = Literal["mass", "map"]
Tracked = Literal["any", "inside", "outside"]
MODES = get_args(Mode)
TRACKED = get_args(Tracked)
RuleKind = Literal["zone", "ripple"]
#: What a rule acts on: a zone judged at each decoding step, or each detected ripple.
RULE_KINDS = get_args(RuleKind)


def _positive_int(owner: str, field_name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{owner}: {field_name} must be a whole number of at least 1, got {value!r}")
    return int(value)


def _positive_seconds(owner: str, field_name: str, value: Any) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {field_name} must be a number of seconds, got {value!r}") from None
    if not (math.isfinite(out) and out > 0):
        raise ValueError(f"{owner}: {field_name} must be a positive, finite number of seconds, got {value!r}")
    return out


def _optional_speed(owner: str, field_name: str, value: Any) -> float | None:
    if value is None:
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {field_name} must be a speed in cm/s or None, got {value!r}") from None
    if not (math.isfinite(out) and out >= 0):
        raise ValueError(f"{owner}: {field_name} must be a finite, non-negative speed in cm/s, got {value!r}")
    return out


@dataclass(frozen=True)
class TriggerRule:
    """When one zone should produce an event, or what to do at each detected ripple (one ``[[rules]]`` entry)."""

    #: Unique among the rules; written into every event.
    name: str
    #: Name of the zone; must be one of the ``[[zones]]`` names (empty for kind = "ripple").
    zone: str = ""
    #: "mass": the posterior mass in the zone is at least min_mass. "map": the maximum a
    #: posteriori bin lies in the zone.
    mode: Mode = "mass"
    #: Least posterior mass in the zone, in (0, 1]; used by mode = "mass".
    min_mass: float = 0.8
    #: Decoding steps in a row the condition must hold before the rule fires.
    consecutive_steps: int = 3
    #: Least tracked running speed (cm/s), inclusive; unset leaves this side open. On a heading
    #: ring, the tracked angular head speed in deg/s.
    min_speed_cm_s: float | None = None
    #: Greatest tracked running speed (cm/s), inclusive; unset leaves this side open.
    max_speed_cm_s: float | None = None
    #: Where the tracked animal must be relative to the same zone. "outside" serves experiments
    #: that act on a non-local representation (decoded in the zone while the animal is elsewhere;
    #: on a heading ring, the decoded heading in the arc while the head faces away from it).
    tracked: Tracked = "any"
    #: "zone": judged at each decoding step on its zone. "ripple": one event for each ripple
    #: the [ripples] detector reports (disrupting every ripple); no zone, the speed bounds
    #: apply, the other conditions do not.
    kind: RuleKind = "zone"

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise ValueError(f"a trigger rule needs a non-empty name, got {self.name!r}")
        owner = f"trigger rule {self.name!r}"
        if self.kind not in RULE_KINDS:
            raise ValueError(f"{owner}: kind must be one of {RULE_KINDS}, got {self.kind!r}")
        if self.kind == "ripple" and self.zone:
            raise ValueError(f"{owner}: a ripple rule acts on every detected ripple and has no zone; "
                             f"leave zone out, got {self.zone!r}")
        if self.kind == "zone" and (not isinstance(self.zone, str) or not self.zone.strip()):
            raise ValueError(f"{owner}: zone must be the non-empty name of a zone, got {self.zone!r}")
        if self.mode not in MODES:
            raise ValueError(f"{owner}: mode must be one of {MODES}, got {self.mode!r}")
        if self.tracked not in TRACKED:
            raise ValueError(f"{owner}: tracked must be one of {TRACKED}, got {self.tracked!r}")
        try:
            min_mass = float(self.min_mass)
        except (TypeError, ValueError):
            raise ValueError(f"{owner}: min_mass must be a number in (0, 1], got {self.min_mass!r}") from None
        if not (0.0 < min_mass <= 1.0):
            raise ValueError(f"{owner}: min_mass must be in (0, 1], got {self.min_mass!r}")
        object.__setattr__(self, "min_mass", min_mass)
        steps = _positive_int(owner, "consecutive_steps", self.consecutive_steps)
        object.__setattr__(self, "consecutive_steps", steps)
        lo = _optional_speed(owner, "min_speed_cm_s", self.min_speed_cm_s)
        hi = _optional_speed(owner, "max_speed_cm_s", self.max_speed_cm_s)
        if lo is not None and hi is not None and lo > hi:
            raise ValueError(f"{owner}: min_speed_cm_s ({lo}) must not exceed max_speed_cm_s ({hi})")
        object.__setattr__(self, "min_speed_cm_s", lo)
        object.__setattr__(self, "max_speed_cm_s", hi)


@dataclass(frozen=True)
class SafetyCaps:
    """Limits beneath every rule; none can be switched off."""

    #: Least data time between two events of any rule (s).
    refractory_s: float = 2.0
    #: Most events in any 60 s of data time (sliding window).
    max_per_minute: int = 10
    #: Most events in the life of the trigger bank; reaching it disarms the triggers for good.
    max_per_session: int = 200
    #: Largest tolerated lag of the slowest input stream behind data time (s); beyond it the
    #: triggers disarm themselves (reason "stall"). The live loop also disarms when the rig has
    #: been silent this long on the wall clock.
    stall_limit_s: float = 1.0

    def __post_init__(self) -> None:
        owner = "safety caps"
        object.__setattr__(self, "refractory_s", _positive_seconds(owner, "refractory_s", self.refractory_s))
        object.__setattr__(self, "stall_limit_s", _positive_seconds(owner, "stall_limit_s", self.stall_limit_s))
        object.__setattr__(self, "max_per_minute", _positive_int(owner, "max_per_minute", self.max_per_minute))
        object.__setattr__(self, "max_per_session", _positive_int(owner, "max_per_session", self.max_per_session))



@dataclass(frozen=True)
class RippleSettings:
    """Online sharp-wave ripple detection (``decoder.signals.ripple_detector``), the ``[ripples]`` table.

    Off while ``source`` is empty. Every field but ``source`` and
    ``max_speed_cm_s`` is passed to ``RippleDetector`` under its own name.
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
    #: The mean z-score must stay above the threshold this long before a detection (s).
    min_duration_s: float = 0.002
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
        for name in ("filter_order", "min_channels"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ConfigError(f"[ripples] {name} must be a whole number of at least 1, got {value!r}")
        _positive("ripples", threshold_sd=self.threshold_sd, baseline_window_s=self.baseline_window_s,
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

    def detector_kwargs(self) -> dict[str, Any]:
        """The ``RippleDetector`` keyword arguments this table sets."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if f.name not in ("source", "max_speed_cm_s")}

def _from_table(cls, table: dict | None, where: str):
    """Build dataclass ``cls`` from a TOML table, rejecting unknown keys."""
    table = dict(table or {})
    names = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(table) - names)
    if unknown:
        raise ConfigError(f"[{where}] has unknown key(s) {unknown}; known keys are {sorted(names)}")
    try:
        return cls(**table)
    except ConfigError:
        raise
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"[{where}]: {exc}") from None


def _positive(where: str, **values: float) -> None:
    for key, value in values.items():
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not value > 0:
            raise ConfigError(f"[{where}] {key} must be a positive number, got {value!r}")


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
    #: A step closes when the spike stream's data time passes its end by this much (s).
    allowed_lateness_s: float = 0.005

    def __post_init__(self) -> None:
        _positive("decoder", window_s=self.window_s, step_s=self.step_s, random_walk_sd_cm=self.random_walk_sd_cm)
        if self.likelihood_temperature is not None:
            _positive("decoder", likelihood_temperature=self.likelihood_temperature)
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


@dataclass(frozen=True)
class EndpointSettings:
    """ZeroMQ endpoints. Loopback unless an interface is named explicitly."""

    #: Rig publishers placeloop connects its SUB socket to.
    rig: tuple[str, ...] = ("tcp://127.0.0.1:5770",)
    #: Where placeloop binds its PUB socket for trigger events.
    events: str = "tcp://127.0.0.1:5771"
    #: Where placeloop binds its PUB socket for the decoder's state (monitor).
    state: str = "tcp://127.0.0.1:5772"
    #: Where placeloop binds its REP socket for control commands.
    control: str = "tcp://127.0.0.1:5773"
    #: Set to true to allow binding to an interface other than loopback.
    allow_remote: bool = False

    def __post_init__(self) -> None:
        rig = (self.rig,) if isinstance(self.rig, str) else tuple(self.rig)
        object.__setattr__(self, "rig", rig)
        for name in ("events", "state", "control"):
            endpoint = getattr(self, name)
            if not self.allow_remote and not is_loopback_endpoint(endpoint):
                raise ConfigError(
                    f"[endpoints] {name} = {endpoint!r} is not on loopback; set allow_remote = true "
                    "to bind another interface (it exposes the socket to that network)"
                )


def is_loopback_host(host: str) -> bool:
    """True for ``localhost`` and loopback addresses (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def is_loopback_endpoint(endpoint: str) -> bool:
    """True for ``tcp://`` on a loopback host, and for ``ipc://`` and ``inproc://``."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    if not endpoint.startswith("tcp://"):
        return False
    return is_loopback_host(endpoint[len("tcp://"):].rsplit(":", 1)[0])


TtlDrive = Literal["byte", "line"]
TtlModemLine = Literal["rts", "dtr"]

#: Longest TTL pulse placeloop times itself (s); a longer output belongs to the device's own timer.
MAX_TTL_PULSE_S = 1.0


@dataclass(frozen=True)
class TtlOutput:
    """What one rule drives on the TTL device (one ``[[ttl.outputs]]`` entry)."""

    #: Name of the rule whose events this output follows; one of the ``[[rules]]`` names.
    rule: str
    #: drive = "byte": the byte written for this rule's events, 0..255; unset uses [ttl] pulse_byte.
    byte: int | None = None
    #: drive = "line": the modem-control line this rule pulses; unset uses [ttl] line.
    line: TtlModemLine | None = None
    #: drive = "line": how long this rule's pulse holds the line (s); unset uses [ttl] pulse_s.
    pulse_s: float | None = None


@dataclass(frozen=True)
class TtlSettings:
    """Optional TTL pulses through a serial device, one per event.

    Two set-ups: ``drive = "byte"`` writes one byte per event to a device (a
    microcontroller on USB serial, say) that turns it into a pulse of its own
    width; ``drive = "line"`` raises a modem-control line (RTS or DTR) of a
    plain USB-serial adapter for ``pulse_s``. With no ``[[ttl.outputs]]``
    every rule drives the table's byte or line; with outputs, only the rules
    listed drive anything, each its own byte or line (two reward ports, say).
    """

    #: pyserial URL or device path, e.g. "/dev/ttyACM0" or "loop://"; empty for none.
    device: str = ""
    #: Baud rate of the device.
    baud: int = 115200
    #: "byte": one byte per event, the device shapes the pulse. "line": placeloop holds an
    #: adapter's modem-control line asserted for pulse_s.
    drive: TtlDrive = "byte"
    #: Byte written to the device for each event (the device turns it into a pulse), 0..255.
    pulse_byte: int = 0x31
    #: drive = "line": the modem-control line pulsed for each event. Many USB-serial adapters
    #: invert it at the pin (asserted = low); check the polarity on a scope before an animal is connected.
    line: TtlModemLine = "rts"
    #: drive = "line": how long each pulse holds the line asserted (s), at most 1 s; the live loop
    #: lowers the line on the wall clock, late by at most the handling of one message.
    pulse_s: float = 0.01
    #: Per-rule outputs ([[ttl.outputs]]); empty: every rule drives the settings above.
    outputs: tuple[TtlOutput, ...] = ()

    def __post_init__(self) -> None:
        if self.drive not in get_args(TtlDrive):
            raise ConfigError(f"[ttl] drive must be one of {get_args(TtlDrive)}, got {self.drive!r}")
        for key in ("pulse_byte", "line", "pulse_s"):
            _check_ttl_value("[ttl]", key, getattr(self, key))
        outputs = []
        for i, table in enumerate(self.outputs):
            where = f"[[ttl.outputs]] #{i + 1}"
            out = table if isinstance(table, TtlOutput) else _from_table(TtlOutput, table,
                                                                         f"[ttl.outputs] #{i + 1}")
            if not isinstance(out.rule, str) or not out.rule:
                raise ConfigError(f"{where}: rule must name one of the [[rules]], got {out.rule!r}")
            unused = ("line", "pulse_s") if self.drive == "byte" else ("byte",)
            for key in ("byte", "line", "pulse_s"):
                value = getattr(out, key)
                if value is not None and key in unused:
                    raise ConfigError(f"{where} ({out.rule!r}) sets {key}, which drive = {self.drive!r} does not "
                                      "use: with 'byte' a rule chooses its byte (the device sets the pulse width), "
                                      "with 'line' its line and pulse_s")
                if value is not None:
                    _check_ttl_value(where, key, value)
            outputs.append(out)
        if len({o.rule for o in outputs}) != len(outputs):
            raise ConfigError(f"[[ttl.outputs]] names each rule at most once, got {[o.rule for o in outputs]}")
        object.__setattr__(self, "outputs", tuple(outputs))

    def route(self, rule: str) -> TtlOutput | None:
        """What ``rule`` drives, every unset key filled from the table; None if it drives nothing."""
        found = [o for o in self.outputs if o.rule == rule] if self.outputs else [TtlOutput(rule=rule)]
        if not found:
            return None
        if self.drive == "byte":
            return TtlOutput(rule, byte=self.pulse_byte if found[0].byte is None else found[0].byte)
        return TtlOutput(rule, line=found[0].line or self.line,
                         pulse_s=self.pulse_s if found[0].pulse_s is None else found[0].pulse_s)


def _check_ttl_value(where: str, key: str, value: Any) -> None:
    """The one rule for each TTL key, in [ttl] and in [[ttl.outputs]]."""
    if key == "line":
        if value not in get_args(TtlModemLine):
            raise ConfigError(f"{where} line must be one of {get_args(TtlModemLine)}, got {value!r}")
    elif key == "pulse_s":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= MAX_TTL_PULSE_S:
            raise ConfigError(f"{where} pulse_s must be a pulse length in (0, {MAX_TTL_PULSE_S}] s, got {value!r}; "
                              "a longer output belongs to the device's own timer")
    elif isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 255:
        raise ConfigError(f"{where} {key} must be a byte value 0..255 (0x31 is the character '1'), got {value!r}")


@dataclass(frozen=True)
class ExperimentConfig:
    """One experiment: the whole TOML file, validated."""

    environment: Environment
    model: ModelSettings = field(default_factory=ModelSettings)
    decoder: DecoderSettings = field(default_factory=DecoderSettings)
    sources: SourceSettings = field(default_factory=SourceSettings)
    session: SessionSettings = field(default_factory=SessionSettings)
    safety: SafetyCaps = field(default_factory=SafetyCaps)
    zones: tuple = ()
    rules: tuple[TriggerRule, ...] = ()
    endpoints: EndpointSettings = field(default_factory=EndpointSettings)
    ttl: TtlSettings = field(default_factory=TtlSettings)
    ripples: RippleSettings = field(default_factory=RippleSettings)
    marks: MarkSettings = field(default_factory=MarkSettings)
    #: The raw ``[simulation]`` table, read by the simulated rig.
    simulation: dict = field(default_factory=dict)
    #: The raw TOML text, stored beside a session log.
    source_text: str = ""

    def zone_names(self) -> tuple[str, ...]:
        return tuple(z.name for z in self.zones)


#: Each ``[environment] kind`` and what builds it; the other keys of the table are its arguments.
ENVIRONMENT_KINDS = {
    "rectangle": Arena.rectangle,
    "circle": Arena.circle,
    "polygon": Arena.polygon,
    "linear_track": LinearTrack,
    "graph": TrackGraph,
    "heading_ring": HeadingRing,
}


def build_environment(table: dict) -> Environment:
    """Build the environment described by an ``[environment]`` table.

    ``kind`` is one of ``rectangle`` (width_cm, height_cm, origin_cm),
    ``circle`` (center_cm, radius_cm), ``polygon`` (vertices_cm),
    ``linear_track`` (start_cm, end_cm, max_distance_cm) or ``graph``
    (nodes_cm, edges, max_distance_cm), which take ``bin_cm``; or
    ``heading_ring`` (``bin_deg``, default 6), head direction decoded over
    a ring where every length in cm of the other tables (``smooth_cm``,
    ``random_walk_sd_cm``, ``false_margin_cm``, speeds in cm/s) reads as
    degrees of heading (deg/s for speeds).
    """
    table = dict(table or {})
    kind = table.pop("kind", None)
    if kind not in ENVIRONMENT_KINDS:
        raise ConfigError(f"[environment] kind must be one of {sorted(ENVIRONMENT_KINDS)}, got {kind!r}")
    if kind == "graph":
        table["edges"] = [tuple(e) for e in table.get("edges", [])]
    try:
        return ENVIRONMENT_KINDS[kind](**table)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"[environment] ({kind}): {exc}") from None


def parse_config(text: str, where: str = "<config>") -> ExperimentConfig:
    """Parse and validate the TOML text of an experiment config."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where} is not valid TOML: {exc}") from None
    known = {"environment", "model", "decoder", "sources", "session", "safety", "zones",
             "rules", "endpoints", "ttl", "simulation", "ripples", "marks"}
    unknown = sorted(set(doc) - known)
    if unknown:
        raise ConfigError(f"{where} has unknown table(s) {unknown}; known tables are {sorted(known)}")
    if "environment" not in doc:
        raise ConfigError(f"{where} has no [environment] table")
    environment = build_environment(doc["environment"])
    zones = []
    for i, zone_table in enumerate(doc.get("zones", [])):
        try:
            zone = zone_from_dict(dict(zone_table))
            zone.bin_mask(environment)
        except (TypeError, ValueError, KeyError) as exc:
            raise ConfigError(f"[[zones]] #{i + 1}: {exc}") from None
        zones.append(zone)
    names = [z.name for z in zones]
    if len(set(names)) != len(names):
        raise ConfigError(f"[[zones]] names must be unique, got {names}")
    rules = []
    for i, rule_table in enumerate(doc.get("rules", [])):
        rule = _from_table(TriggerRule, rule_table, f"[rules] #{i + 1}")
        if rule.kind == "zone" and rule.zone not in names:
            raise ConfigError(f"[[rules]] {rule.name!r} names zone {rule.zone!r}, which is not among {names}")
        rules.append(rule)
    sources = _from_table(SourceSettings, doc.get("sources"), "sources")
    tracked_value = "heading" if isinstance(environment, HeadingRing) else "position"
    if "tracked_value" in doc.get("sources", {}) and sources.tracked_value != tracked_value:
        raise ConfigError(f"[sources] tracked_value = {sources.tracked_value!r} contradicts [environment]: "
                          f"this environment decodes the {tracked_value}; remove the key")
    ttl = _from_table(TtlSettings, doc.get("ttl"), "ttl")
    rule_names = [r.name for r in rules]
    for output in ttl.outputs:
        if output.rule not in rule_names:
            raise ConfigError(f"[[ttl.outputs]] names rule {output.rule!r}, which is not among {rule_names}")
    return ExperimentConfig(
        environment=environment,
        model=_from_table(ModelSettings, doc.get("model"), "model"),
        decoder=_from_table(DecoderSettings, doc.get("decoder"), "decoder"),
        sources=dataclasses.replace(sources, tracked_value=tracked_value),
        session=_from_table(SessionSettings, doc.get("session"), "session"),
        safety=_from_table(SafetyCaps, doc.get("safety"), "safety"),
        zones=tuple(zones),
        rules=tuple(rules),
        endpoints=_from_table(EndpointSettings, doc.get("endpoints"), "endpoints"),
        ttl=ttl,
        ripples=_from_table(RippleSettings, doc.get("ripples"), "ripples"),
        marks=_from_table(MarkSettings, doc.get("marks"), "marks"),
        simulation=dict(doc.get("simulation", {})),
        source_text=text,
    )


def load_config(path: str | Path) -> ExperimentConfig:
    """Read and validate an experiment config file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read config {path}: {exc.strerror}") from None
    return parse_config(text, str(path))


def parse_setting_value(text: str):
    """Read a value written on the command line as TOML (``0.02``, ``true``, ``"uniform"``, ``uniform``)."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_settings(items: list[str] | None, option: str = "--set") -> dict[str, Any]:
    """Read ``NAME=VALUE`` command-line items into ``{NAME: value}`` (values as TOML).

    Raises
    ------
    ConfigError
        For an item without ``=``, an empty name or value, or a name given twice.
    """
    settings: dict[str, Any] = {}
    for item in items or []:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise ConfigError(f"{option} takes NAME=VALUE, e.g. decoder.step_s=0.01; got {item!r}")
        if name in settings:
            raise ConfigError(f"{option} {name} is given twice")
        settings[name] = parse_setting_value(text.strip())
    return settings


def with_overrides(config: ExperimentConfig, overrides: dict[str, Any]) -> ExperimentConfig:
    """A copy of ``config`` with settings replaced, validated as a whole.

    Parameters
    ----------
    config : ExperimentConfig
    overrides : dict
        ``"table.key"`` → value, e.g. ``{"decoder.step_s": 0.01,
        "environment.bin_cm": 2.5}``. ``"rules.key"`` sets the key on every
        rule, ``"rules.NAME.key"`` on the rule named NAME; ``"zones.NAME.key"``
        likewise for a zone.

    Raises
    ------
    ConfigError
        For an unknown table, key, rule or zone, naming it, or an impossible value.
    """
    doc = tomllib.loads(config.source_text)
    for name, value in overrides.items():
        parts = name.split(".")
        if len(parts) == 2 and parts[0] in ("rules", "zones"):
            items = doc.get(parts[0], [])
            if not items:
                raise ConfigError(f"setting {name!r}: the config has no [[{parts[0]}]]")
            for item in items:
                _set_known(item, parts[1], value, name, f"[[{parts[0]}]]")
        elif len(parts) == 3 and parts[0] in ("rules", "zones"):
            matches = [item for item in doc.get(parts[0], []) if item.get("name") == parts[1]]
            if not matches:
                raise ConfigError(f"setting {name!r}: no {parts[0][:-1]} is named {parts[1]!r}")
            _set_known(matches[0], parts[2], value, name, f"[[{parts[0]}]] {parts[1]!r}")
        elif len(parts) == 2:
            table, key = parts
            if table not in _SETTING_TABLES:
                raise ConfigError(f"setting {name!r}: unknown table {table!r}; settable tables are "
                                  f"{sorted(_SETTING_TABLES)} and rules, zones")
            known = _SETTING_TABLES[table]
            if known is not None and key not in known:
                raise ConfigError(f"setting {name!r}: [{table}] has no key {key!r}; known keys are {sorted(known)}")
            doc.setdefault(table, {})[key] = value
        else:
            raise ConfigError(f"setting {name!r} must read TABLE.KEY, rules.KEY or rules.NAME.KEY")
    return parse_config(tomli_w.dumps(doc), "<config with overrides>")


def _set_known(item: dict, key: str, value: Any, name: str, where: str) -> None:
    if key == "name":
        raise ConfigError(f"setting {name!r}: names cannot be swept")
    allowed = {f.name for f in dataclasses.fields(TriggerRule)} if where.startswith("[[rules") else None
    if allowed is not None and key not in allowed:
        raise ConfigError(f"setting {name!r}: {where} has no key {key!r}; known keys are {sorted(allowed)}")
    if allowed is None and key not in item:
        raise ConfigError(f"setting {name!r}: {where} has no key {key!r}; it has {sorted(item)}")
    item[key] = value


_SETTING_TABLES: dict[str, set | None] = {
    "model": {f.name for f in dataclasses.fields(ModelSettings)},
    "decoder": {f.name for f in dataclasses.fields(DecoderSettings)},
    "sources": {f.name for f in dataclasses.fields(SourceSettings)},
    "session": {f.name for f in dataclasses.fields(SessionSettings)},
    "safety": {f.name for f in dataclasses.fields(SafetyCaps)},
    "ripples": {f.name for f in dataclasses.fields(RippleSettings)},
    "marks": {f.name for f in dataclasses.fields(MarkSettings)},
    # Geometry keys depend on the kind; build_environment names a wrong one.
    "environment": None,
}
