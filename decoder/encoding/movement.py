"""The movement model of the state-space filter, learned from the session's own tracking.

Between two decoding steps of ``step_s`` the animal moves; the filter needs
how far. :class:`MovementModel` holds a Gaussian random walk of s.d.
``sd_cm`` per step (along each axis in an arena, along the track on a track
or graph), mixed with a small uniform component ``uniform_weight`` so that
the filter can leave a wrong estimate and follow a non-local representation.

:meth:`MovementModel.from_tracking` estimates ``sd_cm`` from the tracked
positions of the learning period. The displacement variance over a lag of
``L`` seconds is fitted as ``var(L) = c + D L + A L^2`` with non-negative
coefficients: ``c`` is tracker jitter (twice its variance, the same at
every lag), ``D L`` the diffusive part of the movement and ``A L^2`` the
ballistic part (running at a steady velocity). A random walk that is to
reach, over a horizon of ``horizon_s``, as far as the animal does gets
``sd_cm^2 = (D + A horizon_s) step_s`` per step: a pure random walk
(``A = 0``) gives its own s.d. whatever the horizon, while for a running
animal the walk is widened so that the prior keeps up with it over the
time the filter's posterior integrates spikes (a few hundred ms, the
textbook decoder's best window). Each variance is a mean square about 0
with the largest 1 % of displacements left out (divided by the share of a
normal variance that trimming keeps, so it is exact for Gaussian steps and
at most 8 % high otherwise), so that a few swapped or misplaced frames do not
inflate it, while a steady run, whose displacements are all alike, counts
in full (a median-based scale would take it for a Gaussian and overstate it
by half). Lost frames (NaN) are skipped:
displacements are taken between valid frames only, and a lag is the actual
time between them.

:meth:`MovementModel.walk_sd_cm` translates the continuous walk into the s.d.
of ``random_walk.RandomWalk``, whose kernel is a Gaussian evaluated at bin
centres: at 20 ms steps a rat moves well under a bin, and a Gaussian of that
s.d. at bin centres would never leave its bin.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from decoder.inference.checks import positive_finite
from decoder.inference.random_walk import TRUNCATE_SD
from decoder.space.environments import Environment

#: Default probability per second of a jump to anywhere (uniform over the
#: valid bins). At a 20 ms step this is 1e-3 per step: spread over hundreds
#: of bins it is invisible wherever the prior and the spikes agree, yet a
#: few steps of spikes pointing elsewhere (likelihood ratios of 1e3 and more
#: are routine) move the posterior there, so the filter recovers from a wrong
#: lock and can follow a replayed or look-ahead sequence.
UNIFORM_RATE_PER_S = 0.05

#: Default horizon over which the walk should reach as far as the animal (s).
#: The filter's posterior integrates spikes over a few hundred ms, as long as
#: the textbook decoder's best window; over half a second a rat running at
#: 20 cm/s covers 10 cm.
HORIZON_S = 0.5

#: Displacement variances are taken at lags of 1 frame up to the horizon,
#: and at least this many lags.
MIN_LAGS = 8

#: Fewest displacements at each lag for a variance to be used.
MIN_DISPLACEMENTS = 50

#: Share of the largest displacements (in absolute value) left out of each variance.
TRIM_FRACTION = 0.01

#: E[z^2 ; |z| below its (1 - TRIM_FRACTION) quantile] / (1 - TRIM_FRACTION) for a standard normal z.
_TRIMMED_NORMAL_VARIANCE = 1.0 - 2.0 * stats.norm.isf(TRIM_FRACTION / 2) * stats.norm.pdf(
    stats.norm.isf(TRIM_FRACTION / 2)
) / (1.0 - TRIM_FRACTION)


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
    return -math.expm1(-UNIFORM_RATE_PER_S * positive_finite("step_s", step_s))


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
        positive_finite("sd_cm", self.sd_cm)
        positive_finite("step_s", self.step_s)
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
        horizon_s: float = HORIZON_S,
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
        horizon_s : float, default ``HORIZON_S``
            Time over which the walk should spread as far as the animal
            moves; only matters for directed (ballistic) movement.

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
        step_s = positive_finite("step_s", step_s)
        horizon_s = positive_finite("horizon_s", horizon_s)
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
        frame_s = float(np.median(np.diff(t))) if t.size > 1 else horizon_s
        for lag in range(1, max(MIN_LAGS, round(horizon_s / frame_s)) + 1):
            if t.size <= lag:
                break
            dt = t[lag:] - t[:-lag]
            if along_track:
                moved = environment.distance_cm(xy[lag:], xy[:-lag])[:, np.newaxis]
            else:
                moved = xy[lag:] - xy[:-lag]
            if dt.size >= MIN_DISPLACEMENTS:
                lags_s.append(float(np.median(dt)))
                variances.append(_trimmed_variance(moved))
        if not lags_s:
            raise ValueError(
                f"only {t.size} valid tracked frames; at least {MIN_DISPLACEMENTS + 1} are needed to learn "
                "the movement model"
            )
        _, diffusive, ballistic = _variance_growth(np.array(lags_s), np.array(variances))
        if uniform_weight is None:
            uniform_weight = default_uniform_weight(step_s)
        variance = (diffusive + ballistic * horizon_s) * step_s
        if not variance > 0:
            raise ValueError("the tracked positions never move; check the tracker before learning movement")
        return cls(sd_cm=math.sqrt(variance), uniform_weight=uniform_weight, step_s=step_s)

    def walk_sd_cm(self, bin_cm: float) -> float:
        """The s.d. to give ``random_walk.RandomWalk`` for this walk on bins of ``bin_cm``.

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
        bin_cm = positive_finite("bin_cm", bin_cm)
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


def _trimmed_variance(moved: np.ndarray) -> float:
    """Mean square about 0 of each column, largest ``TRIM_FRACTION`` left out, Gaussian-corrected; averaged."""
    # About 0, not about the mean: the filter's walk has no drift, so a
    # steady run is movement it must allow.
    size = np.abs(moved)
    keep = size <= np.quantile(size, 1.0 - TRIM_FRACTION, axis=0)
    return float(np.mean(np.sum(np.where(keep, moved**2, 0.0), axis=0) / keep.sum(axis=0)) / _TRIMMED_NORMAL_VARIANCE)


def _variance_growth(lags_s: np.ndarray, variances: np.ndarray) -> tuple[float, float, float]:
    """Non-negative least-squares ``(c, D, A)`` of ``variance = c + D lag_s + A lag_s^2``."""
    design = np.column_stack([np.ones_like(lags_s), lags_s, lags_s**2])
    # Columns scaled to unit norm so that the solver's tolerance treats them alike.
    norms = np.linalg.norm(design, axis=0)
    coef, _ = optimize.nnls(design / norms, variances)
    c, d, a = coef / norms
    return float(c), float(d), float(a)
