"""Clock alignment from shared sync pulses.

Every source stamps its messages on its own clock. A sync line seen by
several sources gives pulses with a common ``pulse_id``; pairing a source's
pulse times with the reference source's times for the same ids gives a
straight-line map

    t_ref = offset_s + (1 + drift_ppm * 1e-6) * t_other

fitted by ordinary least squares. ``fit_clock`` does one fit;
``ClockAligner`` keeps one fit per source up to date as pulses arrive, over
a sliding set of recent pulses so that slow drift (temperature) is tracked.

Examples
--------
>>> import numpy as np
>>> other = np.arange(10.0)
>>> fit = fit_clock(5.0 + other * (1 + 20e-6), other)
>>> round(fit.offset_s, 9), round(fit.drift_ppm, 6)
(5.0, 20.0)
>>> aligner = ClockAligner("ephys")
>>> for pulse_id, t in enumerate([1.0, 2.0, 3.0]):
...     aligner.add_pulse("ephys", pulse_id, t + 100.0)
...     aligner.add_pulse("tracker", pulse_id, t)
>>> float(aligner.to_reference("tracker", 2.5))
102.5
"""

from __future__ import annotations

import logging
import math
from collections import OrderedDict, deque
from dataclasses import dataclass
from typing import Any

import numpy as np

logger = logging.getLogger(__name__)

__all__ = ["REFIT_AFTER_PULSES", "ClockAligner", "ClockFit", "ClockMismatchError", "fit_clock"]

#: Mismatched pulses in a row, agreeing with one another on a line of their own,
#: after which a source's clock is taken to have jumped (set back or forward) and
#: is fitted afresh on them: the way the spike stream's watermark follows a
#: clock that stays where it jumped (decoder.session.streams.SpikeWatermark).
REFIT_AFTER_PULSES = 5


class ClockMismatchError(ValueError):
    """A sync pulse disagrees with the clock fit beyond the tolerance."""


@dataclass(frozen=True)
class ClockFit:
    """A straight-line map from one source's clock to the reference clock.

    Parameters
    ----------
    offset_s : float
        Reference time at other-clock time 0.
    drift_ppm : float
        How much faster the reference clock runs, in parts per million:
        the slope is ``1 + drift_ppm * 1e-6``.
    max_residual_s : float
        Largest absolute residual of the fitted pulses.
    n_pulses : int
        Pulse pairs in the fit.
    """

    offset_s: float
    drift_ppm: float
    max_residual_s: float
    n_pulses: int

    @property
    def slope(self) -> float:
        """Reference seconds per other-clock second."""
        return 1.0 + self.drift_ppm * 1e-6

    def to_reference(self, t_other: Any) -> Any:
        """Map times on the other clock to the reference clock.

        Parameters
        ----------
        t_other : float or ndarray of float64, shape (n,)

        Returns
        -------
        float or ndarray of float64, shape (n,)
            The same IEEE arithmetic either way, element by element.
        """
        if type(t_other) is float:
            # One tracker frame at a time is the usual case: no numpy round trip.
            return self.offset_s + (1.0 + self.drift_ppm * 1e-6) * t_other
        if type(t_other) is not np.ndarray or t_other.dtype != np.float64:
            t_other = np.asarray(t_other, dtype=np.float64)
        return self.offset_s + (1.0 + self.drift_ppm * 1e-6) * t_other


def fit_clock(pulses_ref_s: Any, pulses_other_s: Any) -> ClockFit:
    """Least-squares fit of ``t_ref = offset + slope * t_other``.

    Parameters
    ----------
    pulses_ref_s : array_like of float64, shape (n,)
        Pulse times on the reference clock.
    pulses_other_s : array_like of float64, shape (n,)
        The same pulses on the other clock, in the same order.

    Returns
    -------
    ClockFit
        With one pulse the slope is taken as exactly 1 (offset only).

    Raises
    ------
    ValueError
        For unequal lengths, no pulses, non-finite times, or two or more
        pulses that all share one other-clock time (no slope can be fitted).

    References
    ----------
    Legendre AM (1805) Nouvelles méthodes pour la détermination des orbites
    des comètes. Paris: Firmin Didot (the method of least squares).
    """
    ref = np.asarray(pulses_ref_s, dtype=np.float64)
    other = np.asarray(pulses_other_s, dtype=np.float64)
    if ref.ndim != 1 or other.ndim != 1 or ref.size != other.size:
        raise ValueError(
            "pulses_ref_s and pulses_other_s must be one-dimensional and equally long, "
            f"got shapes {ref.shape} and {other.shape}"
        )
    if ref.size == 0:
        raise ValueError("fit_clock needs at least one pulse seen by both sources")
    if not (np.isfinite(ref).all() and np.isfinite(other).all()):
        raise ValueError("pulse times must be finite")
    if ref.size == 1:
        return ClockFit(float(ref[0] - other[0]), 0.0, 0.0, 1)
    # Centring keeps the products small when clocks read thousands of seconds. The
    # sum over the count is what ndarray.mean computes, without its Python wrapper.
    ref_mean, other_mean = np.add.reduce(ref) / ref.size, np.add.reduce(other) / ref.size
    dx, dy = other - other_mean, ref - ref_mean
    sxx = float(np.dot(dx, dx))
    if sxx == 0.0:
        raise ValueError(f"all {ref.size} pulses share one time on the other clock; no drift can be fitted")
    slope = float(np.dot(dx, dy)) / sxx
    offset = float(ref_mean - slope * other_mean)
    residual = ref - (offset + slope * other)
    return ClockFit(offset, (slope - 1.0) * 1e6, float(np.abs(residual).max()), int(ref.size))


class ClockAligner:
    """Keep every source's clock mapped onto the reference clock.

    Feed it each ``SyncPulse`` with ``add_pulse``. A pulse is *matched* when
    the reference source and another source have both reported its id; each
    match refits that source's clock over its latest ``max_pulses`` matches.

    Before a source has ``min_pulses`` matches, ``to_reference`` returns None
    for it: the caller holds that source's data until it is aligned.

    Parameters
    ----------
    reference_source : str
        The source whose clock is data time for the pipeline (usually the
        acquisition system).
    tolerance_s : float, default 0.002
        Largest accepted distance between a new matched pulse and the
        current fit's prediction for it.
    min_pulses : int, default 2
        Matches needed before a source counts as aligned (1 fits an offset only).
    max_pulses : int, default 60
        Matches kept per source; older ones drop out so the fit follows drift.
    max_pending : int, default 32
        Unmatched pulses kept per source while waiting for the partner; the
        oldest beyond this are dropped and counted as ``"unmatched"``.
    max_drift_ppm : float, default 1000.0
        Largest plausible drift; quartz clocks are off by tens of ppm, so a
        fit beyond this means mismatched ids or wrong time units.

    A source whose clock jumps (set back or forward) mismatches every pulse
    after the jump; once :data:`REFIT_AFTER_PULSES` mismatched pulses in a row
    lie on one plausible line of their own, the source is fitted afresh on
    them (counted as ``"refit"``), so its data are aligned again. Each of
    those pulses still raised ``ClockMismatchError``: the caller has disarmed.

    Attributes
    ----------
    counters : dict of str to int
        ``"matched"``, ``"unmatched"`` (dropped without a partner),
        ``"duplicate"`` (a source repeated a pulse id; ignored),
        ``"mismatch"`` (rejected with ``ClockMismatchError``) and ``"refit"``
        (a clock fitted afresh after a jump).
    """

    def __init__(
        self,
        reference_source: str,
        tolerance_s: float = 0.002,
        min_pulses: int = 2,
        max_pulses: int = 60,
        max_pending: int = 32,
        max_drift_ppm: float = 1000.0,
    ) -> None:
        if not isinstance(reference_source, str) or not reference_source:
            raise ValueError(f"reference_source must be a non-empty source name, got {reference_source!r}")
        for name, value in (("tolerance_s", tolerance_s), ("max_drift_ppm", max_drift_ppm)):
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be a positive, finite number, got {value!r}")
        counts = (("min_pulses", min_pulses, 1), ("max_pulses", max_pulses, 2), ("max_pending", max_pending, 1))
        for name, value, least in counts:
            if isinstance(value, bool) or not isinstance(value, int) or value < least:
                raise ValueError(f"{name} must be a whole number of at least {least}, got {value!r}")
        if max_pulses < min_pulses:
            raise ValueError(f"max_pulses ({max_pulses}) must be at least min_pulses ({min_pulses})")
        self.reference_source = reference_source
        self.tolerance_s = float(tolerance_s)
        self.min_pulses = min_pulses
        self.max_pulses = max_pulses
        self.max_pending = max_pending
        self.max_drift_ppm = float(max_drift_ppm)
        self._pending: dict[str, OrderedDict[int, float]] = {}
        self._seen: dict[str, OrderedDict[int, None]] = {}
        self._matched: dict[str, deque[tuple[int, float, float]]] = {}
        self._fits: dict[str, ClockFit] = {}
        self._mismatched: dict[str, list[tuple[int, float, float]]] = {}
        self.counters = {"matched": 0, "unmatched": 0, "duplicate": 0, "mismatch": 0, "refit": 0}

    def add_pulse(self, source: str, pulse_id: int, t_s: float) -> None:
        """Record one sync pulse as seen by ``source`` on its own clock.

        Raises
        ------
        ClockMismatchError
            If the pulse, once matched, lies farther than ``tolerance_s``
            from the current fit, or would make the drift implausible. That
            pairing is discarded and the previous fit kept; a reference pulse
            is still matched against every other source before the error is
            raised.
        ValueError
            For a non-finite time, an empty source name or a negative id.
        """
        if not isinstance(source, str) or not source:
            raise ValueError(f"source must be a non-empty name, got {source!r}")
        if isinstance(pulse_id, bool) or not isinstance(pulse_id, (int, np.integer)) or pulse_id < 0:
            raise ValueError(f"pulse_id must be a non-negative integer, got {pulse_id!r}")
        pulse_id = int(pulse_id)
        t = float(t_s)
        if not math.isfinite(t):
            raise ValueError(f"sync pulse {pulse_id} from {source!r} has a non-finite time {t_s!r}")
        seen = self._seen.setdefault(source, OrderedDict())
        self._pending.setdefault(source, OrderedDict())
        if pulse_id in seen:
            self.counters["duplicate"] += 1
            logger.warning("sync pulse %d from %r was already seen; ignored", pulse_id, source)
            return
        seen[pulse_id] = None
        # Remembering ids a little longer than they can be pending or matched
        # is enough to catch a repeated pulse.
        while len(seen) > self.max_pulses + self.max_pending:
            seen.popitem(last=False)
        if source != self.reference_source:
            ref_pending = self._pending.get(self.reference_source, {})
            if pulse_id in ref_pending:
                self._match(source, pulse_id, ref_pending[pulse_id], t)
            else:
                self._keep(source, pulse_id, t)
            return
        self._keep(source, pulse_id, t)
        errors = []
        for other, other_pending in self._pending.items():
            if other != source and pulse_id in other_pending:
                try:
                    self._match(other, pulse_id, t, other_pending.pop(pulse_id))
                except ClockMismatchError as exc:
                    errors.append(exc)
        if errors:
            raise errors[0]

    def forget(self, source: str) -> None:
        """Drop everything known about ``source``'s clock (after it restarts).

        A source whose clock was reset would otherwise fail every new pulse
        against its old fit. Forgetting the reference source forgets all.
        """
        dropped = [source] if source != self.reference_source else list(self._pending)
        for name in dropped:
            for store in (self._pending, self._seen, self._matched, self._fits, self._mismatched):
                store.pop(name, None)
        logger.info("clock alignment of %s forgotten", ", ".join(map(repr, dropped)) or repr(source))

    def fit(self, source: str) -> ClockFit | None:
        """The current fit for ``source``, or None before it is aligned."""
        return self._fits.get(source)

    def is_aligned(self, source: str) -> bool:
        """True for the reference source and for sources with ``min_pulses`` matches."""
        return source == self.reference_source or source in self._fits

    def to_reference(self, source: str, t_s: Any) -> Any:
        """Map times on ``source``'s clock to the reference clock.

        Parameters
        ----------
        source : str
        t_s : float or ndarray of float64, shape (n,)

        Returns
        -------
        float, ndarray of float64 of the same shape, or None
            Unchanged for the reference source; None while ``source`` is not
            yet aligned (fewer than ``min_pulses`` matches, or never seen).
        """
        if source == self.reference_source:
            return np.asarray(t_s, dtype=np.float64) if np.ndim(t_s) else float(t_s)
        fit = self._fits.get(source)
        if fit is None:
            return None
        mapped = fit.to_reference(t_s)
        return mapped if np.ndim(mapped) else float(mapped)

    def status(self) -> dict:
        """Per-source fits and the counters, as plain types."""
        sources = {}
        for source in sorted(set(self._pending) - {self.reference_source}):
            fit = self._fits.get(source)
            sources[source] = {
                "aligned": fit is not None,
                "n_matched": len(self._matched.get(source, ())),
                "offset_s": None if fit is None else fit.offset_s,
                "drift_ppm": None if fit is None else fit.drift_ppm,
                "max_residual_s": None if fit is None else fit.max_residual_s,
            }
        return {"reference_source": self.reference_source, "sources": sources, "counters": dict(self.counters)}

    def _keep(self, source: str, pulse_id: int, t: float) -> None:
        pending = self._pending[source]
        pending[pulse_id] = t
        while len(pending) > self.max_pending:
            dropped_id, _ = pending.popitem(last=False)
            # A reference pulse stays pending after matching, for the other
            # sources; it is unmatched only if none of them paired with it.
            if source != self.reference_source or not self._any_matched(dropped_id):
                self.counters["unmatched"] += 1
                logger.debug("sync pulse %d from %r dropped without a partner", dropped_id, source)

    def _any_matched(self, pulse_id: int) -> bool:
        return any(pid == pulse_id for history in self._matched.values() for pid, _, _ in history)

    def _match(self, source: str, pulse_id: int, t_ref: float, t_other: float) -> None:
        history = self._matched.setdefault(source, deque(maxlen=self.max_pulses))
        current = self._fits.get(source)
        if current is not None:
            miss = abs(t_ref - float(current.to_reference(t_other)))
            if miss > self.tolerance_s:
                self.counters["mismatch"] += 1
                self._follow_jump(source, (pulse_id, t_ref, t_other))
                raise ClockMismatchError(
                    f"sync pulse {pulse_id} from {source!r} lands {miss * 1e3:.3f} ms away from where the fit "
                    f"against the reference {self.reference_source!r} puts it, beyond the tolerance of "
                    f"{self.tolerance_s * 1e3:.3f} ms; check that both sources see the same sync line and "
                    "number its pulses alike"
                )
        candidate = [*history, (pulse_id, t_ref, t_other)][-self.max_pulses :]
        if len(candidate) >= self.min_pulses:
            _, refs, others = zip(*candidate)
            fit = fit_clock(refs, others)
            if abs(fit.drift_ppm) > self.max_drift_ppm:
                self.counters["mismatch"] += 1
                raise ClockMismatchError(
                    f"with sync pulse {pulse_id}, the clock of {source!r} would run {fit.drift_ppm:.0f} ppm off the "
                    f"reference {self.reference_source!r}, beyond the plausible {self.max_drift_ppm:.0f} ppm; "
                    "check that both sources give times in seconds and number the sync pulses alike"
                )
            if current is None:
                logger.info(
                    "clock of %r aligned to %r: offset %.6f s, drift %.2f ppm",
                    source,
                    self.reference_source,
                    fit.offset_s,
                    fit.drift_ppm,
                )
            self._fits[source] = fit
        history.append((pulse_id, t_ref, t_other))
        self._mismatched.pop(source, None)
        self.counters["matched"] += 1

    def _follow_jump(self, source: str, pair: tuple[int, float, float]) -> None:
        """Keep a mismatched pair; fit ``source`` afresh once enough of them in a row agree."""
        run = self._mismatched.setdefault(source, [])
        run.append(pair)
        if len(run) < REFIT_AFTER_PULSES:
            return
        del run[:-REFIT_AFTER_PULSES]
        _, refs, others = zip(*run)
        fit = fit_clock(refs, others)
        if fit.max_residual_s > self.tolerance_s or abs(fit.drift_ppm) > self.max_drift_ppm:
            return
        logger.warning("the clock of %r jumped: fitted afresh on its last %d sync pulses (offset %.6f s)",
                       source, len(run), fit.offset_s)
        self._matched[source] = deque(run, maxlen=self.max_pulses)
        self._fits[source] = fit
        self._mismatched.pop(source)
        self.counters["refit"] += 1
