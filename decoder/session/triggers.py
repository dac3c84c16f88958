"""Trigger rules and the safety caps beneath them.

A ``TriggerBank`` turns one decoding step at a time into reward or
stimulation events. It holds a list of ``TriggerRule`` (when should an event
happen?) and one ``SafetyCaps`` (how often may any event happen at all?). The
caps sit beneath every rule: no rule can loosen or switch them off, and a cap
of zero is an error, not "off".

Software is no hardware interlock. These caps limit what this program asks
for; the reward or stimulation hardware must carry its own limits, and every
setting must stay inside the approved animal-use protocol and local rules.
Replay a recorded session, or run against the simulated rig, before a live
animal.

How one step is judged (all times are data time, float seconds)
-----------------------------------------------------------------
1. Guards. If ``stream_lag_s`` exceeds ``caps.stall_limit_s``, or is NaN,
   an armed bank disarms itself with reason ``"stall"`` and stays disarmed
   until ``arm`` is called again. If data time went back (a restarted
   clock), it disarms with reason ``"time_reversal"`` and holds the caps as
   if recent events had just happened (see ``TriggerBank.step``).
2. Each rule's condition is evaluated, in the order the rules were given:

   * decoded part -- mode ``"mass"``: posterior mass in the rule's zone
     ``>= min_mass``; mode ``"map"``: the MAP bin lies in the zone;
   * tracked part -- ``"any"``: no condition; ``"inside"``: the tracked
     position is known and in the zone; ``"outside"``: the tracked position is
     known and not in the zone (for acting on a non-local representation,
     when the decoded position is in the zone while the animal is not);
   * speed part -- ``min_speed_cm_s`` / ``max_speed_cm_s`` bound the tracked
     speed (inclusive); a NaN speed never satisfies a bound.

3. Entry, not level (re-arm on exit, common practice). Each rule counts the
   consecutive steps on which its condition held. When the count reaches
   ``consecutive_steps`` the rule makes one *would-be event* and is then
   *spent*: it makes no further would-be event until a step on which its
   condition fails, which clears the count. A rule is spent by a would-be
   event whether or not the caps let it through, so a long dwell yields one
   event or one suppression, never a stream of them. ``arm`` marks every
   rule spent, so the first event after arming always needs an entry that
   begins after arming -- arming never fires on a position already held.
4. Caps. A would-be event becomes a ``TriggerEvent`` only if the bank is
   armed, at least ``refractory_s`` has passed since the last event of any
   rule (one animal, one reward line), fewer than ``max_per_minute`` events
   fall in the last 60 s (the window ``(t - 60, t]``), and fewer than
   ``max_per_session`` events have been made. Otherwise it is counted in
   ``counters`` under ``"disarmed"``, ``"refractory"``, ``"per_minute_cap"``
   or ``"session_cap"`` (the first that applies, in the order session cap,
   disarmed, refractory, per-minute cap). At most one event is made per
   step. When the session cap is reached the bank disarms itself with
   reason ``"session_cap"`` and cannot be armed again.

Ripple rules (``kind = "ripple"``) are not judged on decoding steps: each
ripple the detector reports is one entry, judged by ``TriggerBank.ripple``,
whose would-be event (one per ripple: the first ripple rule whose speed bounds hold)
meets the same caps in the same order, the same stall guard on the LFP
stream's lag, and the same counters. Arming marks nothing spent for them: a
ripple detected after arming is always a new entry.

Content rules (``kind = "replay_mass"``, ``"replay_towards"``, ``"replay_away"``)
are judged by ``TriggerBank.content`` on each content bin of a ripple
detected at rest, from the event's measures so far: the zone's posterior mass
averaged over the bins (``>= min_mass``); for a sequence rule, the posterior
log odds that the replay moves towards (away from) the zone
(``decoder.inference.sequence_filter``, ``> min_log_odds``); each once the measures cover ``min_bins`` bins (bins with spikes), the speed
bounds holding. Each event is one entry: a rule makes at most one would-be
event per event (spent by it whether or not the caps let it through), and
the next event's first bin clears every content rule. The would-be events
meet the same caps in the same order, the same stall guard and the same
counters.

Examples
--------
>>> rule = TriggerRule("feeder", zone="goal", min_mass=0.5, consecutive_steps=2)
>>> bank = TriggerBank([rule], zone_names=["goal"])
>>> bank.arm(0.0)
>>> def at(t, mass):
...     return StepInput(t, [mass], [mass > 0.5], (10.0, 10.0), [False], 5.0, 0.01)
>>> [len(bank.step(at(t, m))) for t, m in [(0.03, 0.1), (0.06, 0.9), (0.09, 0.9), (0.12, 0.9)]]
[0, 0, 1, 0]
"""

from __future__ import annotations

import logging
import math
from collections import deque
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from decoder.config import SafetyCaps, TriggerRule

logger = logging.getLogger(__name__)

__all__ = [
    "StepInput",
    "TriggerEvent",
    "TriggerBank",
    "SessionCapError",
    "SUPPRESSION_REASONS",
    "CONTENT_KINDS",
]

SUPPRESSION_REASONS = ("disarmed", "refractory", "per_minute_cap", "session_cap")
#: Rule kinds judged on the content bins of a ripple (``decoder.session.replay_content``).
CONTENT_KINDS = ("replay_mass", "replay_towards", "replay_away")

#: Length of the sliding window behind ``SafetyCaps.max_per_minute``.
_MINUTE_S = 60.0


class SessionCapError(RuntimeError):
    """The bank reached its per-session cap and refuses to be armed again."""


def _flag_vector(name: str, values: Any) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1 or (arr.size and arr.dtype.kind not in "bui"):
        raise ValueError(
            f"{name} must be a one-dimensional array of booleans, got shape {arr.shape}, dtype {arr.dtype}"
        )
    return arr.astype(bool)


@dataclass(frozen=True, slots=True)
class StepInput:
    """What the bank sees at the end of one decoding step.

    Parameters
    ----------
    t_s : float
        Data time of the end of the step.
    zone_mass : ndarray of float64, shape (n_zones,)
        Posterior mass in each zone (NaN never satisfies a rule).
    map_zone : ndarray of bool, shape (n_zones,)
        Whether the MAP bin lies in each zone.
    tracked_xy_cm : ndarray of float64, shape (2,)
        Tracked position at ``t_s``; NaN when unknown.
    tracked_in_zone : ndarray of bool, shape (n_zones,)
        Whether the tracked position lies in each zone.
    tracked_speed_cm_s : float
        Tracked speed; NaN when unknown.
    stream_lag_s : float
        How far the slowest input stream lags behind ``t_s``; NaN when unknown.
    """

    t_s: float
    zone_mass: np.ndarray
    map_zone: np.ndarray
    tracked_xy_cm: np.ndarray
    tracked_in_zone: np.ndarray
    tracked_speed_cm_s: float
    stream_lag_s: float

    def __post_init__(self) -> None:
        t = float(self.t_s)
        if not math.isfinite(t):
            raise ValueError(f"step t_s must be a finite data time, got {self.t_s!r}")
        object.__setattr__(self, "t_s", t)
        mass = np.asarray(self.zone_mass, dtype=np.float64)
        if mass.ndim != 1:
            raise ValueError(f"zone_mass must be one-dimensional (n_zones,), got shape {mass.shape}")
        object.__setattr__(self, "zone_mass", mass)
        map_zone = _flag_vector("map_zone", self.map_zone)
        in_zone = _flag_vector("tracked_in_zone", self.tracked_in_zone)
        if map_zone.size != mass.size or in_zone.size != mass.size:
            raise ValueError(
                f"zone_mass, map_zone and tracked_in_zone must all have one value per zone; "
                f"got {mass.size}, {map_zone.size} and {in_zone.size}"
            )
        object.__setattr__(self, "map_zone", map_zone)
        object.__setattr__(self, "tracked_in_zone", in_zone)
        xy = np.asarray(self.tracked_xy_cm, dtype=np.float64)
        if xy.shape != (2,):
            raise ValueError(f"tracked_xy_cm must be one (x_cm, y_cm) pair, got shape {xy.shape}")
        object.__setattr__(self, "tracked_xy_cm", xy)
        object.__setattr__(self, "tracked_speed_cm_s", float(self.tracked_speed_cm_s))
        object.__setattr__(self, "stream_lag_s", float(self.stream_lag_s))

    @classmethod
    def from_arrays(cls, t_s: float, zone_mass: np.ndarray, map_zone: np.ndarray, tracked_xy_cm: np.ndarray,
                    tracked_in_zone: np.ndarray, tracked_speed_cm_s: float, stream_lag_s: float) -> StepInput:
        """A step from values that already have the exact types the constructor would give, unchecked.

        For the pipeline, which builds one per decoding step from arrays of
        its own making: Python floats, float64 and bool vectors of one value
        per zone, a float64 (2,) position. Anyone else uses the constructor.
        """
        self = object.__new__(cls)
        setattr_ = object.__setattr__
        setattr_(self, "t_s", t_s)
        setattr_(self, "zone_mass", zone_mass)
        setattr_(self, "map_zone", map_zone)
        setattr_(self, "tracked_xy_cm", tracked_xy_cm)
        setattr_(self, "tracked_in_zone", tracked_in_zone)
        setattr_(self, "tracked_speed_cm_s", tracked_speed_cm_s)
        setattr_(self, "stream_lag_s", stream_lag_s)
        return self


@dataclass(frozen=True, slots=True)
class TriggerEvent:
    """One event the bank let through.

    Parameters
    ----------
    event_id : int
        1, 2, ... in the order events were made by this bank.
    rule, zone : str
        Names of the rule that fired and its zone.
    t_s : float
        Data time of the step that completed the rule.
    zone_mass : float
        Posterior mass in the zone at that step.
    tracked_xy_cm : (float, float)
        Tracked position at that step (NaN when unknown).
    map_in_zone : bool
        Whether the MAP bin lay in the zone at that step.
    """

    event_id: int
    rule: str
    zone: str
    t_s: float
    zone_mass: float
    tracked_xy_cm: tuple[float, float]
    map_in_zone: bool

    def to_dict(self) -> dict:
        """Plain types only, ready for MessagePack or JSON."""
        out = asdict(self)
        out["tracked_xy_cm"] = list(self.tracked_xy_cm)
        return out


class _RuleState:
    """Per-rule run length and the spent flag (see the module docstring)."""

    __slots__ = ("run", "spent")

    def __init__(self) -> None:
        self.run = 0
        self.spent = False


class TriggerBank:
    """Rules plus safety caps; turns decoding steps into events.

    The bank starts disarmed. See the module docstring for exactly how a
    step is judged.

    Parameters
    ----------
    rules : sequence of TriggerRule
        Names unique; evaluated in this order. With none, the bank never
        fires (a session that only learns or only decodes).
    zone_names : sequence of str
        Order of the zones in ``StepInput.zone_mass``, ``map_zone`` and
        ``tracked_in_zone``; every rule's zone must be among them.
    caps : SafetyCaps, default SafetyCaps()

    Attributes
    ----------
    armed : bool
    disarm_reason : str or None
        Why the bank is disarmed (``"startup"`` until first armed).
    counters : dict of str to int
        Suppressed would-be events by reason: ``"disarmed"``, ``"refractory"``,
        ``"per_minute_cap"``, ``"session_cap"``.
    n_events : int
    """

    def __init__(self, rules: Any, zone_names: Any, caps: SafetyCaps | None = None) -> None:
        caps = SafetyCaps() if caps is None else caps
        if not isinstance(caps, SafetyCaps):
            raise ValueError(f"caps must be a SafetyCaps, got {type(caps).__name__}")
        rules = tuple(rules)
        for rule in rules:
            if not isinstance(rule, TriggerRule):
                raise ValueError(f"rules must be TriggerRule objects, got {type(rule).__name__}")
        names = [r.name for r in rules]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"trigger rule names must be unique; repeated: {', '.join(repeated)}")
        zone_names = tuple(zone_names)
        if len(set(zone_names)) != len(zone_names):
            raise ValueError(f"zone_names must be unique, got {list(zone_names)}")
        for rule in rules:
            if rule.kind != "ripple" and rule.zone not in zone_names:
                raise ValueError(
                    f"trigger rule {rule.name!r} refers to zone {rule.zone!r}, "
                    f"which is not among the zones {list(zone_names)}"
                )
        self.zone_names = zone_names
        self.caps = caps
        self._ripple_rules = tuple(r for r in rules if r.kind == "ripple")
        self._content_rules = tuple(r for r in rules if r.kind in CONTENT_KINDS)
        self._content_zone = tuple(zone_names.index(r.zone) for r in self._content_rules)
        self._content_spent = [False] * len(self._content_rules)
        rules = tuple(r for r in rules if r.kind == "zone")
        self.rules = rules
        self._zone_index = tuple(zone_names.index(r.zone) for r in rules)
        self._states = tuple(_RuleState() for _ in rules)
        self._recent_t_s: deque[float] = deque()
        self._last_event_t_s: float | None = None
        self._last_t_s: float | None = None
        self.armed = False
        self.disarm_reason: str | None = "startup"
        self.n_events = 0
        self.n_stalls = 0
        self.n_time_reversals = 0
        self.counters = {reason: 0 for reason in SUPPRESSION_REASONS}

    def arm(self, t_s: float) -> None:
        """Allow events from the next step on.

        Every rule is marked spent, so an event needs an entry into the rule's
        condition that begins after ``t_s``. Refractory and per-minute history
        carry over from before.

        Raises
        ------
        SessionCapError
            If the session cap has been reached; a new session (a new bank) is
            needed to deliver more.
        ValueError
            If ``t_s`` is not finite.
        """
        t = float(t_s)
        if not math.isfinite(t):
            raise ValueError(f"arm needs a finite data time, got {t_s!r}; the bank stays disarmed")
        if self.n_events >= self.caps.max_per_session:
            raise SessionCapError(
                f"the session cap of {self.caps.max_per_session} events is reached; "
                "the bank stays disarmed, and only a new session can deliver more"
            )
        for state in self._states:
            state.run = 0
            state.spent = True
        if not self.armed:
            logger.info("trigger bank armed at t=%.3f s", t)
        self.armed = True
        self.disarm_reason = None

    def disarm(self, t_s: float, reason: str) -> None:
        """Stop events from this step on; ``reason`` is kept for ``status``.

        Disarming always succeeds, whatever ``t_s`` (it is only logged) and
        whatever ``reason`` (an empty one is recorded as ``"unspecified"``).
        """
        t = float(t_s)
        reason = str(reason) if reason else "unspecified"
        if self.armed:
            log = logger.warning if reason in ("stall", "session_cap") else logger.info
            log("trigger bank disarmed at t=%.3f s: %s", t, reason)
        self.armed = False
        self.disarm_reason = reason

    def step(self, step: StepInput) -> list[TriggerEvent]:
        """Judge one decoding step; return the events it makes (zero or one).

        A step earlier than the previous one means the reference clock
        jumped back (a restarted acquisition). The bank then disarms itself
        (reason ``"time_reversal"``) and, since it cannot tell how much real
        time passed, treats every event still inside the refractory interval
        or the per-minute window as having just happened at the new time.

        Raises
        ------
        ValueError
            If the step's vectors do not have one value per zone.
        """
        if not isinstance(step, StepInput):
            raise ValueError(f"step expects a StepInput, got {type(step).__name__}")
        if step.zone_mass.size != len(self.zone_names):
            raise ValueError(
                f"the step carries {step.zone_mass.size} zone values but the bank has "
                f"{len(self.zone_names)} zones {list(self.zone_names)}"
            )
        t = step.t_s
        if self._last_t_s is not None and t < self._last_t_s:
            self._rebase(t)
        self._last_t_s = t
        lag = step.stream_lag_s
        if self.armed and not (lag <= self.caps.stall_limit_s):
            self.n_stalls += 1
            self.disarm(t, "stall")
        while self._recent_t_s and self._recent_t_s[0] <= t - _MINUTE_S:
            self._recent_t_s.popleft()

        events: list[TriggerEvent] = []
        for rule, zi, state in zip(self.rules, self._zone_index, self._states):
            if not self._condition(rule, zi, step):
                state.run = 0
                state.spent = False
                continue
            if state.spent:
                continue
            state.run += 1
            if state.run < rule.consecutive_steps:
                continue
            state.run = 0
            state.spent = True
            reason = self._suppression(t)
            if reason is not None:
                self.counters[reason] += 1
                logger.debug("rule %r would fire at t=%.3f s; suppressed (%s)", rule.name, t, reason)
                continue
            events.append(self._emit(rule, zi, step))
        return events

    def status(self) -> dict:
        """A plain dictionary for the control reply and the monitor."""
        return {
            "armed": self.armed,
            "disarm_reason": self.disarm_reason,
            "n_events": self.n_events,
            "events_last_minute": len(self._recent_t_s),
            "session_events_left": self.caps.max_per_session - self.n_events,
            "last_event_t_s": self._last_event_t_s,
            "last_step_t_s": self._last_t_s,
            "n_stalls": self.n_stalls,
            "n_time_reversals": self.n_time_reversals,
            "counters": dict(self.counters),
            "caps": asdict(self.caps),
            "rules": [r.name for r in self.rules + self._ripple_rules + self._content_rules],
        }

    @property
    def has_ripple_rules(self) -> bool:
        return bool(self._ripple_rules)

    def ripple(self, t_s: float, tracked_xy_cm: np.ndarray, tracked_speed_cm_s: float,
               stream_lag_s: float) -> list[TriggerEvent]:
        """Judge one detected ripple; return the event it makes (zero or one).

        Parameters
        ----------
        t_s : float
            Data time of the detection (the end of the LFP chunk that completed it).
        tracked_xy_cm : ndarray of float64, shape (2,)
            Tracked position at ``t_s``; NaN when unknown.
        tracked_speed_cm_s : float
            NaN when unknown; never satisfies a speed bound.
        stream_lag_s : float
            How far the LFP lags behind the session's data time; beyond
            ``caps.stall_limit_s`` (or NaN) an armed bank disarms (``"stall"``).

        Notes
        -----
        Detections and decoding steps interleave on data time only roughly
        (each closes when its own stream gets there), so a detection never
        counts as the clock going back: it leaves the step history alone.
        """
        t = float(t_s)
        if not math.isfinite(t):
            raise ValueError(f"a ripple's t_s must be a finite data time, got {t_s!r}")
        if self.armed and not (stream_lag_s <= self.caps.stall_limit_s):
            self.n_stalls += 1
            self.disarm(t, "stall")
        while self._recent_t_s and self._recent_t_s[0] <= t - _MINUTE_S:
            self._recent_t_s.popleft()
        for rule in self._ripple_rules:
            speed = tracked_speed_cm_s
            if rule.min_speed_cm_s is not None and not speed >= rule.min_speed_cm_s:
                continue
            if rule.max_speed_cm_s is not None and not speed <= rule.max_speed_cm_s:
                continue
            reason = self._suppression(t)
            if reason is not None:
                self.counters[reason] += 1
                logger.debug("ripple rule %r would fire at t=%.3f s; suppressed (%s)", rule.name, t, reason)
                return []
            return [self._record(rule.name, "", t, math.nan, tracked_xy_cm, False)]
        return []

    @property
    def has_content_rules(self) -> bool:
        return bool(self._content_rules)

    def content(self, t_s: float, index: int, n_used: int, mean_mass: np.ndarray, log_odds: np.ndarray,
                tracked_xy_cm: np.ndarray, tracked_speed_cm_s: float, stream_lag_s: float) -> list[TriggerEvent]:
        """Judge one content bin of a candidate event; return the events it makes.

        Parameters
        ----------
        t_s : float
            Data time of the bin's end.
        index : int
            The bin's place in its event, 0 for the first (which clears every content rule).
        n_used : int
            The event's bins so far that its measures cover (``min_bins`` counts these).
        mean_mass : ndarray of float64, shape (n_zones,)
            The event's zone mass averaged over its bins so far; NaN satisfies no rule.
        log_odds : ndarray of float64, shape (2, n_zones)
            The posterior log odds that the replay moves towards (row 0) and away
            from (row 1) each zone (``ContentBin.log_odds``); NaN satisfies no rule.
        tracked_xy_cm : ndarray of float64, shape (2,)
        tracked_speed_cm_s : float
            NaN when unknown; never satisfies a speed bound.
        stream_lag_s : float
            As for :meth:`ripple`.
        """
        t = float(t_s)
        if not math.isfinite(t):
            raise ValueError(f"a content bin's t_s must be a finite data time, got {t_s!r}")
        if self.armed and not (stream_lag_s <= self.caps.stall_limit_s):
            self.n_stalls += 1
            self.disarm(t, "stall")
        while self._recent_t_s and self._recent_t_s[0] <= t - _MINUTE_S:
            self._recent_t_s.popleft()
        spent = self._content_spent
        if index == 0:
            spent[:] = [False] * len(spent)
        events: list[TriggerEvent] = []
        for i, (rule, zi) in enumerate(zip(self._content_rules, self._content_zone)):
            if spent[i] or n_used < rule.min_bins:
                continue
            if rule.kind == "replay_mass":
                holds = mean_mass[zi] >= rule.min_mass
            else:
                holds = log_odds[0 if rule.kind == "replay_towards" else 1, zi] > rule.min_log_odds
            speed = tracked_speed_cm_s
            if rule.min_speed_cm_s is not None and not speed >= rule.min_speed_cm_s:
                holds = False
            if rule.max_speed_cm_s is not None and not speed <= rule.max_speed_cm_s:
                holds = False
            if not holds:
                continue
            spent[i] = True
            reason = self._suppression(t)
            if reason is not None:
                self.counters[reason] += 1
                logger.debug("content rule %r would fire at t=%.3f s; suppressed (%s)", rule.name, t, reason)
                continue
            events.append(self._record(rule.name, rule.zone, t, float(mean_mass[zi]), tracked_xy_cm, False))
        return events

    def _rebase(self, t: float) -> None:
        logger.warning("data time went back from %.3f s to %.3f s", self._last_t_s, t)
        self.n_time_reversals += 1
        self.disarm(t, "time_reversal")
        if self._last_event_t_s is not None:
            still_refractory = self._last_t_s - self._last_event_t_s < self.caps.refractory_s
            self._last_event_t_s = t if still_refractory else None
        self._recent_t_s = deque([t] * len(self._recent_t_s))

    @staticmethod
    def _condition(rule: TriggerRule, zi: int, step: StepInput) -> bool:
        if rule.mode == "mass":
            if not step.zone_mass[zi] >= rule.min_mass:
                return False
        elif not step.map_zone[zi]:
            return False
        if rule.tracked != "any":
            if not np.all(np.isfinite(step.tracked_xy_cm)):
                return False
            if bool(step.tracked_in_zone[zi]) != (rule.tracked == "inside"):
                return False
        speed = step.tracked_speed_cm_s
        if rule.min_speed_cm_s is not None and not speed >= rule.min_speed_cm_s:
            return False
        if rule.max_speed_cm_s is not None and not speed <= rule.max_speed_cm_s:
            return False
        return True

    def _suppression(self, t: float) -> str | None:
        if self.n_events >= self.caps.max_per_session:
            return "session_cap"
        if not self.armed:
            return "disarmed"
        if self._last_event_t_s is not None and t - self._last_event_t_s < self.caps.refractory_s:
            return "refractory"
        if len(self._recent_t_s) >= self.caps.max_per_minute:
            return "per_minute_cap"
        return None

    def _emit(self, rule: TriggerRule, zi: int, step: StepInput) -> TriggerEvent:
        return self._record(rule.name, rule.zone, step.t_s, float(step.zone_mass[zi]), step.tracked_xy_cm,
                            bool(step.map_zone[zi]))

    def _record(self, rule: str, zone: str, t_s: float, zone_mass: float, tracked_xy_cm: np.ndarray,
                map_in_zone: bool) -> TriggerEvent:
        self.n_events += 1
        self._last_event_t_s = t_s
        self._recent_t_s.append(t_s)
        event = TriggerEvent(
            event_id=self.n_events,
            rule=rule,
            zone=zone,
            t_s=t_s,
            zone_mass=zone_mass,
            tracked_xy_cm=(float(tracked_xy_cm[0]), float(tracked_xy_cm[1])),
            map_in_zone=map_in_zone,
        )
        logger.info("event %d: rule %r, zone %r, t=%.3f s", event.event_id, rule, zone, t_s)
        if self.n_events >= self.caps.max_per_session:
            self.disarm(t_s, "session_cap")
        return event
