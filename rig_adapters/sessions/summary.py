"""What a session produced, in figures: latency series and the summary shared by live runs and replays."""

from __future__ import annotations

import copy
import math
from bisect import bisect_left
from dataclasses import dataclass, field

import numpy as np

from decoder.session.pipeline import Pipeline
from decoder.space.headings import HeadingRing


class LatencySeries:
    """Latency samples (ms) in bounded memory: percentiles from a fixed histogram.

    Bins are log-spaced from 1 µs to 100 s, each 0.5 % wide, so a percentile
    is exact to 0.5 % however long the session; the newest ``RECENT``
    samples are kept as they are for monitors.

    Parameters
    ----------
    keep_all : bool
        Also keep every sample (offline use: the report's histograms).
    """

    RECENT = 2000
    _EDGES_MS = np.geomspace(1e-3, 1e5, 3700)
    _EDGE_LIST_MS = _EDGES_MS.tolist()

    def __init__(self, keep_all: bool = False) -> None:
        self._counts = [0] * (self._EDGES_MS.size + 1)
        self._recent = [0.0] * self.RECENT
        self._n = 0
        self.max_ms = float("-inf")
        self.values: list[float] | None = [] if keep_all else None

    def append(self, ms: float) -> None:
        ms = float(ms)
        # bisect_left on a list is searchsorted's default side, without numpy's per-call cost (every step pays it).
        self._counts[bisect_left(self._EDGE_LIST_MS, ms)] += 1
        self._recent[self._n % self.RECENT] = ms
        self._n += 1
        if ms > self.max_ms:
            self.max_ms = ms
        if self.values is not None:
            self.values.append(ms)

    def extend(self, values_ms: list[float]) -> None:
        """Append many samples at once, in order: the same result as :meth:`append` on each.

        Samples are durations, never NaN (which the two would file in different bins).
        """
        if not values_ms:
            return
        values = np.asarray(values_ms, np.float64)
        counts = self._counts
        for i in np.searchsorted(self._EDGES_MS, values, side="left").tolist():
            counts[i] += 1
        recent, size = self._recent, self.RECENT
        for k, ms in enumerate(values.tolist()[-size:], self._n + max(0, values.size - size)):
            recent[k % size] = ms
        self._n += values.size
        self.max_ms = max(self.max_ms, float(values.max()))
        if self.values is not None:
            self.values.extend(values.tolist())

    def __len__(self) -> int:
        return self._n

    def __iter__(self):
        return iter(self.values if self.values is not None else self.recent())

    @property
    def last(self) -> float | None:
        return float(self._recent[(self._n - 1) % self.RECENT]) if self._n else None

    def recent(self) -> np.ndarray:
        """The newest samples (up to ``RECENT``), oldest first."""
        if self._n <= self.RECENT:
            return np.array(self._recent[: self._n])
        i = self._n % self.RECENT
        return np.array(self._recent[i:] + self._recent[:i])

    def percentile(self, q: float) -> float | None:
        if not self._n:
            return None
        i = int(np.searchsorted(np.cumsum(self._counts), q / 100.0 * self._n, side="left"))
        edges = self._EDGES_MS
        lo = edges[i - 1] if i > 0 else 0.0
        hi = edges[i] if i < edges.size else self.max_ms
        # The geometric middle of the bin, never beyond the largest sample.
        return float(min(math.sqrt(lo * hi) if lo > 0 else hi, self.max_ms))


@dataclass
class LatencyLog:
    """Wall-clock latency samples (ms), per stage."""

    added_ms: LatencySeries = field(default_factory=LatencySeries)
    decode_ms: LatencySeries = field(default_factory=LatencySeries)
    event_ms: LatencySeries = field(default_factory=LatencySeries)

    @staticmethod
    def percentiles(values) -> dict:
        """p50, p99, max and count of a :class:`LatencySeries` or a plain sequence."""
        if not len(values):
            return {"p50": None, "p99": None, "max": None, "n": 0}
        if isinstance(values, LatencySeries):
            return {"p50": values.percentile(50), "p99": values.percentile(99), "max": values.max_ms,
                    "n": len(values)}
        a = np.asarray(list(values), float)
        return {
            "p50": float(np.percentile(a, 50)),
            "p99": float(np.percentile(a, 99)),
            "max": float(a.max()),
            "n": int(a.size),
        }


def session_summary(pipeline: Pipeline, latency: LatencyLog) -> dict:
    """Summary figures shared by live runs and replays.

    On a heading ring the decoding error is the shortest turn between the
    decoded and the true heading, so the errors in cm are degrees; the
    summary says so once more under ``heading_median_error_deg`` and
    ``heading_p90_error_deg``, and counts frames without a heading.
    """
    errors = pipeline.errors
    c = pipeline.counters
    summary = {
        "decode": {
            "steps": c["decode_steps"],
            "median_error_cm": errors.percentile(50),
            "p90_error_cm": errors.percentile(90),
            "digest": pipeline.digest,
        },
        "triggers": {
            "count": c["events"],
            "false_count": c["false_events"],
            **{k: v for k, v in pipeline.bank.status().items() if k != "armed"},
        },
        "behaviour": copy.deepcopy(pipeline.visits).result(),
        "latency_ms": LatencyLog.percentiles(latency.added_ms),
        "latency_stages_ms": {
            "decode_per_step": LatencyLog.percentiles(latency.decode_ms),
            "event": LatencyLog.percentiles(latency.event_ms),
        },
        "input": {
            "bad_messages": c["bad_messages"],
            "bad_reasons": dict(pipeline.bad_reasons),
            "gaps": pipeline.health.total_gaps,
            "stale_messages": c["stale_messages"],
            "unknown_units": c["unknown_units"],
            "artefact_spikes": {"total": c["artefact_spikes"], **pipeline.spike_sanity.counts},
            "late_spikes": c["late_spikes"],
            "time_jumps": c["time_jumps"],
            "clock_mismatch": c["clock_mismatch"],
            "sources": pipeline.health.summary(),
        },
        "session": {"state": pipeline.state, "readiness": jsonable(pipeline.readiness)},
        "ripples": pipeline.ripples.status(),
    }
    if isinstance(pipeline.environment, HeadingRing):
        summary["decode"]["heading_median_error_deg"] = errors.percentile(50)
        summary["decode"]["heading_p90_error_deg"] = errors.percentile(90)
        summary["input"]["frames_heading_unknown"] = c.get("frames_heading_unknown", 0)
    return summary


def json_float(x: float):
    return x if isinstance(x, float) and math.isfinite(x) else None


def jsonable(obj):
    """Plain JSON types (NaN and infinity become None)."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return json_float(float(obj))
    if hasattr(obj, "__dataclass_fields__"):
        return jsonable({k: getattr(obj, k) for k in obj.__dataclass_fields__})
    return obj
