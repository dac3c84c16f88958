"""Trigger rules and the caps beneath them: the ``[[rules]]`` and ``[safety]`` tables."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar, Literal, get_args

from decoder.config.checks import (
    _optional_speed,
    _positive_int,
    _positive_seconds,
)

# -- trigger rules and the caps beneath them ([[rules]], [safety]) -------------------------

Mode = Literal["mass", "map"]
Tracked = Literal["any", "inside", "outside"]
MODES = get_args(Mode)
TRACKED = get_args(Tracked)
RuleKind = Literal["zone", "ripple", "replay_mass", "replay_towards", "replay_away"]
#: What a rule acts on: a zone judged at each decoding step, each detected ripple, or the
#: decoded content of each ripple's bins (the "replay_" kinds).
RULE_KINDS = get_args(RuleKind)


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
    #: apply, the other conditions do not. "replay_mass": the event's content lies in the zone
    #: (mass >= min_mass after min_bins bins). "replay_towards" / "replay_away": the event's
    #: content is a sequence moving towards / away from the zone. The "replay_" kinds are judged
    #: on each content bin of a ripple detected at rest; the speed bounds apply, mode and
    #: tracked do not.
    kind: RuleKind = "zone"
    #: The "replay_" kinds: content bins of the event ([ripples] content_bin_s) decoded before
    #: the rule may fire; each rule fires at most once per event.
    min_bins: int = 3
    #: "replay_towards" / "replay_away": the rule fires once the posterior log odds (natural log)
    #: that the replay moves towards (away from) the zone, rather than otherwise, exceed this, with
    #: even prior odds: the sequence filter over the event's bins so far, every bin weighed by its
    #: whole likelihood ([ripples] content_speed_cm_s, content_slack_cm, content_stray_p). In
    #: [0, 50]: 0 fires as soon as the sequence is more likely than not after min_bins bins; 3 asks
    #: for odds of 20 to 1. "replay_mass" uses min_mass instead, on the zone's posterior mass
    #: averaged over the event's bins so far.
    min_log_odds: float = 0.0

    #: Keys a ``[[rules]]`` entry took once and takes no more, each with the sentence that says
    #: what to write instead (``checks.retired_key`` refuses them by name).
    RETIRED: ClassVar[dict[str, str]] = {
        "min_correlation": "sequence rules judge the posterior log odds that the replay moves towards (away "
                           "from) the zone, not Kendall's tau-b; remove min_correlation and set min_log_odds "
                           "(natural log, default 0: more likely than not)"}

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise ValueError(f"a trigger rule needs a non-empty name, got {self.name!r}")
        owner = f"trigger rule {self.name!r}"
        if self.kind not in RULE_KINDS:
            raise ValueError(f"{owner}: kind must be one of {RULE_KINDS}, got {self.kind!r}")
        if self.kind == "ripple" and self.zone:
            raise ValueError(f"{owner}: a ripple rule acts on every detected ripple and has no zone; "
                             f"leave zone out, got {self.zone!r}")
        if self.kind != "ripple" and (not isinstance(self.zone, str) or not self.zone.strip()):
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
        object.__setattr__(self, "min_bins", _positive_int(owner, "min_bins", self.min_bins))
        try:
            odds = float(self.min_log_odds)
        except (TypeError, ValueError):
            odds = math.nan
        if not 0.0 <= odds <= 50.0:
            raise ValueError(f"{owner}: min_log_odds must be a number in [0, 50] (natural log), "
                             f"got {self.min_log_odds!r}")
        object.__setattr__(self, "min_log_odds", odds)
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
    #: Refuse a live ``arm`` while no subscriber listens on the events socket (a dry run is never
    #: refused). Off by default: a rig driven only by TTL lines has no listener, and such an arm is
    #: answered with a warning instead.
    arm_requires_listener: bool = False

    def __post_init__(self) -> None:
        owner = "safety caps"
        if not isinstance(self.arm_requires_listener, bool):
            raise ValueError(f"{owner}: arm_requires_listener must be true or false, got "
                             f"{self.arm_requires_listener!r}")
        object.__setattr__(self, "refractory_s", _positive_seconds(owner, "refractory_s", self.refractory_s))
        object.__setattr__(self, "stall_limit_s", _positive_seconds(owner, "stall_limit_s", self.stall_limit_s))
        object.__setattr__(self, "max_per_minute", _positive_int(owner, "max_per_minute", self.max_per_minute))
        object.__setattr__(self, "max_per_session", _positive_int(owner, "max_per_session", self.max_per_session))
