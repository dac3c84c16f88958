"""Scoring a session as it runs: decoding error and behavioural latency.

Both scores are online and bounded in memory, so that a live session of hours
and its replay give the same figures without keeping every step.

Behavioural latency is what the experiment feels: for each time the animal
(its true position on a simulated rig, else its tracked position) entered a
zone, how long until an event for that zone came, or that none came (a
miss). An event that belongs to no such visit is false.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np


class ErrorHistogram:
    """Decoding errors in fixed bins, for medians and percentiles without keeping every step.

    Parameters
    ----------
    resolution_cm : float
        Bin width; percentiles are exact to within it.
    max_cm : float
        Errors beyond this land in the last bin.
    """

    def __init__(self, resolution_cm: float = 0.05, max_cm: float = 2000.0) -> None:
        self.resolution_cm = float(resolution_cm)
        # A list: one increment per decoded step, where numpy's item access costs more than the work.
        self._counts = [0] * (int(math.ceil(max_cm / resolution_cm)) + 1)
        self.n = 0
        self.total_cm = 0.0

    def add(self, error_cm: float) -> None:
        if not math.isfinite(error_cm):
            return
        i = min(int(error_cm / self.resolution_cm), len(self._counts) - 1)
        self._counts[i] += 1
        self.n += 1
        self.total_cm += error_cm

    def percentile(self, q: float) -> float | None:
        """The ``q``-th percentile (0-100) at the centre of its bin; None when empty."""
        if self.n == 0:
            return None
        rank = q / 100.0 * self.n
        i = int(np.searchsorted(np.cumsum(self._counts), max(rank, 1e-9), side="left"))
        return (i + 0.5) * self.resolution_cm


@dataclass
class _Visit:
    zone: int
    enter_s: float
    exit_s: float = math.inf
    event_s: float | None = None


@dataclass
class VisitScore:
    """Zone visits matched to events, online.

    Parameters
    ----------
    n_zones : int
    early_s : float
        An event up to this long before the animal enters still counts for
        the visit (the decoded position may lead the animal, e.g. during
        theta sequences).
    late_s : float
        An event up to this long after the animal left still counts.

    Notes
    -----
    Call :meth:`step` for every decoded step with the animal's in-zone flags
    and :meth:`event` for every event, in data-time order; :meth:`result`
    closes what is still open.
    """

    n_zones: int
    early_s: float = 0.5
    late_s: float = 0.5
    hits: int = 0
    misses: int = 0
    false_events: int = 0
    repeat_events: int = 0
    latencies_s: list[float] = field(default_factory=list)
    _inside: list[bool] | None = None
    _open: list[_Visit] = field(default_factory=list)
    _pending_events: list[tuple[float, int]] = field(default_factory=list)

    def step(self, t_s: float, in_zone: Any) -> None:
        """The animal's in-zone flags (a sequence of n_zones bools) at step time ``t_s``; unknown position: all False."""
        if self._inside is None:
            self._inside = [False] * self.n_zones
        for z, flag in enumerate(in_zone):
            now = bool(flag)
            if now and not self._inside[z]:
                visit = _Visit(z, t_s)
                # Events that came shortly before the entry belong to it.
                for ev in list(self._pending_events):
                    if ev[1] == z and t_s - ev[0] <= self.early_s:
                        visit.event_s = ev[0]
                        self._pending_events.remove(ev)
                        break
                self._open.append(visit)
            elif not now and self._inside[z]:
                for visit in self._open:
                    if visit.zone == z and visit.exit_s == math.inf:
                        visit.exit_s = t_s
            self._inside[z] = now
        if self._open or self._pending_events:
            self._settle(t_s)

    def event(self, t_s: float, zone: int) -> None:
        for visit in self._open:
            if visit.zone == zone and t_s <= visit.exit_s + self.late_s:
                if visit.event_s is None:
                    visit.event_s = t_s
                else:
                    # A second event in one visit: not false, the animal is there.
                    self.repeat_events += 1
                return
        self._pending_events.append((t_s, zone))

    def _settle(self, t_s: float) -> None:
        still = []
        for visit in self._open:
            if t_s > visit.exit_s + self.late_s:
                self._close(visit)
            else:
                still.append(visit)
        self._open = still
        keep = []
        for ev in self._pending_events:
            if t_s - ev[0] > self.early_s:
                self.false_events += 1
            else:
                keep.append(ev)
        self._pending_events = keep

    def _close(self, visit: _Visit) -> None:
        if visit.event_s is None:
            self.misses += 1
        else:
            self.hits += 1
            self.latencies_s.append(visit.event_s - visit.enter_s)

    def result(self) -> dict:
        """Hits, misses, false events and latency percentiles (ms); closes open visits."""
        for visit in self._open:
            self._close(visit)
        self._open = []
        self.false_events += len(self._pending_events)
        self._pending_events = []
        lat = np.asarray(self.latencies_s) * 1e3
        return {
            "entries": self.hits + self.misses,
            "hits": self.hits,
            "misses": self.misses,
            "false_events": self.false_events,
            "repeat_events": self.repeat_events,
            "latency_ms": {
                "p50": float(np.percentile(lat, 50)) if lat.size else None,
                "p90": float(np.percentile(lat, 90)) if lat.size else None,
                "max": float(lat.max()) if lat.size else None,
            },
        }
