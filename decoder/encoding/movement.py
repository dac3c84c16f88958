"""The movement model of the state-space filter, learned from the session's own tracking.

Between two decoding steps of ``step_s`` the animal moves; the filter needs
how far. :class:`MovementModel` holds a Gaussian random walk of s.d.
``sd_cm`` per step (along each axis in an arena, along the track on a track
or graph), mixed with a small uniform component ``uniform_weight`` so that
the filter can leave a wrong estimate and follow a non-local representation.

:meth:`MovementModel.from_tracking` estimates ``sd_cm`` from the tracked
positions of the learning period. A random walk's displacement variance
grows linearly with the time between frames, ``var(lag) = D lag_s``, while
tracker jitter adds the same ``2 s_j^2`` to every lag; a straight line
through the robust variances at lags of 1 to ``N_LAGS`` frames separates the
two, and ``sd_cm = sqrt(D step_s)``. Each variance is robust (the median
absolute displacement over 0.6745, the normal quantile), so a few lost or
swapped tracker frames do not inflate it. Lost frames (NaN) are skipped:
displacements are taken between valid frames only, and a lag is the actual
time between them.

:meth:`MovementModel.walk_sd_cm` translates the continuous walk into the s.d.
of ``decoding.RandomWalk``, whose kernel is a Gaussian evaluated at bin
centres: at 20 ms steps a rat moves well under a bin, and a Gaussian of that
s.d. at bin centres would never leave its bin.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, stats

from decoder.inference.decoding import TRUNCATE_SD
from decoder.space.environments import Environment

#: Default probability per second of a jump to anywhere (uniform over the
#: valid bins). At a 20 ms step this is 1e-3 per step: spread over hundreds
#: of bins it is invisible wherever the prior and the spikes agree, yet a
#: few steps of spikes pointing elsewhere (likelihood ratios of 1e3 and more
#: are routine) move the posterior there, so the filter recovers from a wrong
#: lock and can follow a replayed or look-ahead sequence.
UNIFORM_RATE_PER_S = 0.05

#: Displacement variances are taken at lags of 1 to this many frames.
N_LAGS = 8

#: Fewest displacements at each lag for a variance to be used.
MIN_DISPLACEMENTS = 50

#: Median of |z| for a standard normal z (scipy.stats.norm.ppf(0.75)).
_MEDIAN_ABS_NORMAL = 0.6744897501960817


def _positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name} must be a positive number, got {value!r}")
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive, finite number, got {value!r}")
    return float(value)


def default_uniform_weight(step_s: float) -> float:
    """Uniform mixing weight per step for ``UNIFORM_RATE_PER_S`` jumps per second.

    Parameters
    ----------
    step_s : float

    Returns
    -------
    float
        ``1 - exp(-UNIFORM_RATE_PER_S * step_s)``; about 1e-3 at 20 ms.
    """
    return -math.expm1(-UNIFORM_RATE_PER_S * _positive("step_s", step_s))


@dataclass(frozen=True)
class MovementModel:
    """Gaussian random walk per decoding step, mixed with a uniform jump.

    The prior of step ``t`` is ``(1 - uniform_weight) * (p_{t-1} @ W) +
    uniform_weight / n_valid`` on the valid bins, ``W`` the random walk.

    Parameters
    ----------
    sd_cm : float
        S.d. of the continuous walk over one step, cm (per axis in an
        arena, along the track on a track or graph).
    uniform_weight : float
        Probability per step of a jump to a uniformly drawn valid bin, in [0, 1).
    step_s : float
        The step the walk is for, s.

    Examples
    --------
    >>> model = MovementModel(sd_cm=0.6, uniform_weight=1e-3, step_s=0.02)
    >>> round(model.walk_sd_cm(bin_cm=2.5), 2)
    1.21
    """

    sd_cm: float
    uniform_weight: float
    step_s: float

    def __post_init__(self) -> None:
        _positive("sd_cm", self.sd_cm)
        _positive("step_s", self.step_s)
        w = self.uniform_weight
        if isinstance(w, bool) or not isinstance(w, (int, float, np.integer, np.floating)) or not 0 <= w < 1:
            raise ValueError(f"uniform_weight must be a probability in [0, 1), got {w!r}")

    @classmethod
    def from_tracking(
        cls,
        times_s: np.ndarray,
        xy_cm: np.ndarray,
        step_s: float,
        *,
        environment: Environment | None = None,
        uniform_weight: float | None = None,
    ) -> MovementModel:
        """Estimate the walk's s.d. per step from tracked positions.

        Parameters
        ----------
        times_s : array_like of float64, shape (n,)
            Frame times, strictly increasing, data time.
        xy_cm : array_like of float64, shape (n, 2)
            Tracked positions; NaN rows are lost frames.
        step_s : float
            Decoding step the model is for.
        environment : Environment, optional
            A track or graph: displacements are measured along the track
            (``distance_cm``), and positions off the track count as lost.
            An arena or ``None``: per axis, in the plane.
        uniform_weight : float, optional
            Default ``default_uniform_weight(step_s)``.

        Returns
        -------
        MovementModel

        Raises
        ------
        ValueError
            For arrays of the wrong shape, times that do not increase, or
            too few valid frames (fewer than ``MIN_DISPLACEMENTS``
            displacements at one frame's lag) to estimate the walk.
        """
        step_s = _positive("step_s", step_s)
        t = np.asarray(times_s, dtype=np.float64)
        xy = np.asarray(xy_cm, dtype=np.float64)
        if t.ndim != 1 or xy.shape != (t.size, 2):
            raise ValueError(f"times_s must have shape (n,) and xy_cm (n, 2); got {t.shape} and {xy.shape}")
        if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
            raise ValueError("times_s must be finite and strictly increasing; sort the frames and drop repeats")
        along_track = environment is not None and environment.ndim_spatial == 1
        ok = np.all(np.isfinite(xy), axis=1)
        if along_track:
            ok &= np.isfinite(environment.linearize(np.where(ok[:, None], xy, 0.0)))
        t, xy = t[ok], xy[ok]
        lags_s, variances = [], []
        for lag in range(1, N_LAGS + 1):
            if t.size <= lag:
                break
            dt = t[lag:] - t[:-lag]
            if along_track:
                moved = environment.distance_cm(xy[lag:], xy[:-lag])[:, np.newaxis]
            else:
                moved = xy[lag:] - xy[:-lag]
            # Robust variance about 0, not about the median: the filter's
            # walk has no drift, so a steady run is movement it must allow.
            scale = np.median(np.abs(moved), axis=0) / _MEDIAN_ABS_NORMAL
            if dt.size >= MIN_DISPLACEMENTS:
                lags_s.append(float(np.median(dt)))
                variances.append(float(np.mean(scale**2)))
        if not lags_s:
            raise ValueError(
                f"only {t.size} valid tracked frames; at least {MIN_DISPLACEMENTS + 1} are needed to learn "
                "the movement model"
            )
        rate = _diffusion_rate(np.array(lags_s), np.array(variances))
        if uniform_weight is None:
            uniform_weight = default_uniform_weight(step_s)
        if not rate > 0:
            raise ValueError("the tracked positions never move; check the tracker before learning movement")
        return cls(sd_cm=math.sqrt(rate * step_s), uniform_weight=uniform_weight, step_s=step_s)

    def walk_sd_cm(self, bin_cm: float) -> float:
        """The s.d. to give ``decoding.RandomWalk`` for this walk on bins of ``bin_cm``.

        ``RandomWalk`` weighs bin offsets ``k`` by a Gaussian at the offset
        of the bin centres, ``exp(-(k bin_cm)^2 / 2 s^2)``, cut at
        ``TRUNCATE_SD`` s.d. The continuous walk, from a position uniform in
        its bin, stays in that bin (along one axis) with probability
        ``P_0 = 1 - 2 (sd_cm / bin_cm) (phi(0) - phi(b) + b Phi(-b))`` with
        ``b = bin_cm / sd_cm``. The returned ``s`` gives the same
        probability of staying put, so both walks leave a bin equally often.
        A walk too narrow to leave its bin within ``RandomWalk``'s cut-off
        returns ``sd_cm`` unchanged (it stays put either way).

        Parameters
        ----------
        bin_cm : float

        Returns
        -------
        float
            S.d. in cm, for ``RandomWalk(..., sd_cm=...)``.
        """
        bin_cm = _positive("bin_cm", bin_cm)
        b = bin_cm / self.sd_cm
        # Integral over a uniform start in the bin of the normal mass beyond either edge.
        leave = 2.0 / b * (stats.norm.pdf(0.0) - stats.norm.pdf(b) + b * stats.norm.cdf(-b))
        stay = 1.0 - leave

        def centre_weight(s: float) -> float:
            k = np.arange(1, math.floor(TRUNCATE_SD * s / bin_cm) + 1)
            return 1.0 / (1.0 + 2.0 * np.exp(-0.5 * (k * bin_cm / s) ** 2).sum())

        narrowest = bin_cm / TRUNCATE_SD * (1 + 1e-9)
        if stay >= centre_weight(narrowest):
            return self.sd_cm
        widest = max(self.sd_cm, bin_cm) * 4
        return float(optimize.brentq(lambda s: centre_weight(s) - stay, narrowest, widest, xtol=1e-9 * bin_cm))


def _diffusion_rate(lags_s: np.ndarray, variances: np.ndarray) -> float:
    """Slope ``D`` (cm²/s) of ``variance = D lag_s + c`` with ``c >= 0`` (jitter), least squares."""
    if lags_s.size >= 2:
        slope, intercept = np.polyfit(lags_s, variances, 1)
        if intercept >= 0:
            return float(slope)
    # A negative intercept (displacement growing faster than a random walk's)
    # has no jitter to remove: the line through the origin.
    return float(lags_s @ variances / (lags_s @ lags_s))
