"""The head's turning learned from the tracked heading, and whether the filter should carry it.

On a heading ring the filter may keep the angular velocity in its state
(``decoder.inference.heading_velocity``): the velocity an Ornstein-Uhlenbeck
process of stationary s.d. ``sigma`` and correlation time ``tau``, the
heading its integral. :func:`fit_heading_velocity` learns both from the
tracked heading of the learning period. A velocity from consecutive frames
would drown in the tracker's noise (3 degrees of noise at 50 Hz is over
200 deg/s of velocity noise), so the fit uses the growth of the heading's
displacement variance with the lag instead, which for an integrated
Ornstein-Uhlenbeck velocity is

    var(L) = c + 2 sigma^2 tau^2 (L / tau - 1 + exp(-L / tau)),

``c`` twice the tracker's noise variance (Uhlenbeck and Ornstein 1930; from
memory): ballistic (``sigma^2 L^2``) at lags well under ``tau``,
diffusive (``2 sigma^2 tau L``) well over it. The same fit gives the
tracker's noise, ``sqrt(c / 2)``, from which :func:`tracked_heading_noise_deg`
simulates the noise of the smoothed tracked heading the held-out steps are scored against,
and every temperature fit on a heading ring scores the held-out coverage
against that noisy heading's predictive distribution
(``calibration.fit_temperature(tracked_noise_sd=...)``), not as if the
tracker were exact.

:func:`choose_heading_velocity` decodes the held-out learning steps with
the joint state at the walk's temperature and keeps it only if its
held-out median error beats the walk's (plain or drifting) by ``MIN_GAIN``
(the drift's rule, ``calibration.fit_drift``, with a smaller margin); the
temperature is then fitted again with the joint state
(``calibration.fit_temperature``, starting near the walk's), so that the held-out coverage is the one
the session decodes with, as it is for the drift.

References
----------
Uhlenbeck GE, Ornstein LS (1930). On the theory of the Brownian motion.
Phys Rev 36:823-841.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence

import numpy as np
from scipy import optimize, stats

from decoder.encoding.calibration import (
    TemperatureFit,
    _fired,
    _held_out_pass,
    _point_medians_cm,
    _unscored,
    fit_temperature,
)
from decoder.encoding.tracked_steps import smoothed_noise_sd
from decoder.inference.heading_velocity import HeadingVelocity
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Environment
from decoder.space.headings import HeadingRing, angle_difference_deg

logger = logging.getLogger(__name__)

#: Displacements are taken at lags of one frame up to this (s): a few
#: correlation times of a rodent's head turning (0.1-0.5 s, common practice),
#: short enough that a displacement stays well under half a turn.
MAX_LAG_S = 1.0

#: Fewest displacements at a lag for its variance to be used.
MIN_DISPLACEMENTS = 200

#: Share of the largest displacements left out of each variance (swapped LEDs, outliers).
TRIM_FRACTION = 0.01

#: A normal variable's mean square with the largest ``TRIM_FRACTION`` of its
#: sizes left out, over its variance: ``1 - 2 z phi(z) / (1 - TRIM_FRACTION)``
#: at ``z`` its ``1 - TRIM_FRACTION / 2`` quantile (the truncated normal's
#: second moment; Johnson, Kotz and Balakrishnan 1994, Continuous Univariate
#: Distributions 1, ch. 13; from memory). The trimmed variances are divided by
#: it, so that the displacements' normal variance is estimated without bias.
_TRIMMED_SHARE = 1.0 - 2.0 * stats.norm.ppf(1.0 - TRIM_FRACTION / 2) * stats.norm.pdf(
    stats.norm.ppf(1.0 - TRIM_FRACTION / 2)) / (1.0 - TRIM_FRACTION)

#: The joint state is kept only if it lowers the held-out median error by
#: more than this share. Smaller than the drift's margin
#: (``calibration._DRIFT_MIN_GAIN``, 5 %): the process is learned from the
#: tracker, not tuned on the held-out steps, so they decide one yes or no;
#: and they are scored against the tracker's own noisy heading, whose
#: error adds to both medians and shrinks their relative difference (on the
#: heading scenario 3.5 % held out for 8 % against the true heading).
MIN_GAIN = 0.02

#: Simulated headings whose smoothed error :func:`tracked_heading_noise_deg`
#: averages: with a few thousand steps each, known to about 1 %.
_NOISE_DRAWS = 4


def fit_heading_velocity(times_s: np.ndarray, heading_deg: np.ndarray) -> tuple[HeadingVelocity, float]:
    """The Ornstein-Uhlenbeck angular velocity whose integral moves like the tracked heading, and the tracker's noise.

    Parameters
    ----------
    times_s : array_like of float64, shape (n,)
        Frame times, strictly increasing, data time.
    heading_deg : array_like of float64, shape (n,)
        Tracked heading in degrees (any turn; NaN for a frame without one).

    Returns
    -------
    process : HeadingVelocity
    noise_sd_deg : float
        S.d. of the tracker's heading noise on one frame, degrees (from the
        variance's intercept; white normal noise assumed).

    Raises
    ------
    ValueError
        For arrays of different shapes, times that do not increase, too few
        frames with a heading, or a heading that never turns.
    """
    t = np.asarray(times_s, dtype=np.float64)
    h = np.asarray(heading_deg, dtype=np.float64)
    if t.ndim != 1 or h.shape != t.shape:
        raise ValueError(f"times_s and heading_deg must have the same shape (n,); got {t.shape} and {h.shape}")
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ValueError("times_s must be finite and strictly increasing; sort the frames and drop repeats")
    ok = np.isfinite(h)
    t, h = t[ok], h[ok]
    if t.size <= MIN_DISPLACEMENTS:
        raise ValueError(f"only {t.size} frames with a heading; at least {MIN_DISPLACEMENTS + 1} are needed "
                         "to learn how the head turns")
    frame_s = float(np.median(np.diff(t)))
    lags_s, variances = [], []
    for lag in range(1, max(2, round(MAX_LAG_S / frame_s)) + 1):
        if t.size - lag < MIN_DISPLACEMENTS:
            break
        turned = angle_difference_deg(h[lag:], h[:-lag])
        size = np.abs(turned)
        kept = turned[size <= np.quantile(size, 1.0 - TRIM_FRACTION)]
        lags_s.append(float(np.median(t[lag:] - t[:-lag])))
        variances.append(float(np.mean(kept**2)) / _TRIMMED_SHARE)
    lags, var = np.array(lags_s), np.array(variances)
    if lags.size < 3 or not var[-1] > 0:
        raise ValueError("the tracked heading never turns, or too few frames; check the tracker's heading")

    def model(params: np.ndarray) -> np.ndarray:
        log_sd, log_tau, noise = params
        sd2, tau = math.exp(2 * log_sd), math.exp(log_tau)
        return noise**2 + 2.0 * sd2 * tau**2 * (lags / tau + np.expm1(-lags / tau))

    # Relative residuals: the short lags, which hold the velocity, weigh as much as the long ones.
    start = np.array([math.log(math.sqrt(var[-1] / lags[-1])), math.log(0.3), math.sqrt(var[0] / 2)])
    fit = optimize.least_squares(lambda p: model(p) / var - 1.0, start, method="lm")
    log_sd, log_tau, noise = fit.x
    return HeadingVelocity(sd_deg_s=math.exp(log_sd), time_constant_s=math.exp(log_tau)), abs(noise) / math.sqrt(2.0)


def tracked_heading_noise_deg(environment: Environment, frame_t_s: np.ndarray, frame_xy_cm: np.ndarray,
                              t_s: np.ndarray, max_frame_gap_s: float) -> float:
    """S.d. of the noise of the tracked heading the held-out steps are scored against, degrees.

    The tracker's frames are smoothed before the held-out steps are scored
    against them (``tracked_steps.tracked_at``), so the frames' noise
    (:func:`fit_heading_velocity`) is not the scored heading's. The scored
    heading's error is simulated instead: ``_NOISE_DRAWS`` headings turned
    by the fitted process at the session's own valid frame times, seen
    through the fitted noise, smoothed the same way and read at ``t_s``
    (``tracked_steps.smoothed_noise_sd``), with a fixed seed: the same
    answer every time. About 0.6 of the frames' noise on the heading
    scenario, where a median of still frames would keep 0.54 of it.

    Parameters
    ----------
    environment : Environment
    frame_t_s : ndarray of float64, shape (n,)
    frame_xy_cm : ndarray of float64, shape (n, 2)
        The learning period's tracked frames (ring points on a heading ring; NaN rows lost).
    t_s : ndarray of float64, shape (m,)
        The held-out steps' ends.
    max_frame_gap_s : float
        As the place model's: steps in a longer gap are not scored.

    Returns
    -------
    float
        0 off a heading ring, and where no turning can be learned (the
        temperature fit then scores as if the tracker were exact).
    """
    if not isinstance(environment, HeadingRing):
        return 0.0
    heading = environment.linearize(frame_xy_cm)
    try:
        process, noise_sd_deg = fit_heading_velocity(frame_t_s, heading)
    except ValueError:
        return 0.0
    t = np.asarray(frame_t_s, dtype=np.float64)[np.isfinite(heading)]
    rng = np.random.default_rng(0)
    # The exact Ornstein-Uhlenbeck step over each frame interval, the heading its (Euler) integral.
    dt = np.diff(t, prepend=t[0])[:, np.newaxis]
    decay = np.exp(-dt / process.time_constant_s)
    kicks = rng.normal(0.0, 1.0, (t.size, _NOISE_DRAWS)) * process.sd_deg_s * np.sqrt(1.0 - decay**2)
    velocity = np.empty_like(kicks)
    velocity[0] = rng.normal(0.0, process.sd_deg_s, _NOISE_DRAWS)
    for i in range(1, t.size):
        velocity[i] = decay[i] * velocity[i - 1] + kicks[i]
    truth = np.cumsum(velocity * dt, axis=0)
    truth_at = np.column_stack([np.interp(t_s, t, truth[:, k]) for k in range(_NOISE_DRAWS)])
    scored = smoothed_noise_sd(t, truth, truth_at, noise_sd_deg, np.asarray(t_s, dtype=np.float64),
                               max_frame_gap_s, rng)
    return scored if math.isfinite(scored) else 0.0


def heading_velocity_of(fit: TemperatureFit | None) -> HeadingVelocity | None:
    """The joint state a fit chose (:func:`choose_heading_velocity`), or None for the plain walk."""
    if fit is None or not fit.angular_velocity_sd_deg_s > 0:
        return None
    return HeadingVelocity(fit.angular_velocity_sd_deg_s, fit.angular_velocity_time_constant_s)


def choose_heading_velocity(
    fit: TemperatureFit,
    fold_rate_maps_hz: Sequence[np.ndarray],
    fold_counts: Sequence[np.ndarray],
    fold_true_xy_cm: Sequence[np.ndarray],
    step_s: float,
    walk: RandomWalk,
    frame_t_s: np.ndarray,
    frame_xy_cm: np.ndarray,
    *,
    uniform_weight: float,
    rate_floor_hz: float = 0.01,
    fold_mark_terms: Sequence[tuple[np.ndarray, np.ndarray]] | None = None,
    tracked_noise_sd: float = 0.0,
) -> TemperatureFit:
    """``fit`` with the joint state of heading and angular velocity, if that decodes the held-out steps better.

    On a heading ring, the velocity process is learned from
    the tracked frames (:func:`fit_heading_velocity`) and the held-out
    blocks are decoded with it at ``fit.temperature``, one pass; if the
    better point estimate's median error is below the walk's by more
    than ``MIN_GAIN``, the temperature is fitted again with the joint state
    (``calibration.fit_temperature`` with ``heading_velocity``, bracketed
    near ``fit.temperature``, with no drift: the joint state carries the
    velocity the drift would follow, and replaces it), and that fit is
    returned: it carries the
    process (``angular_velocity_sd_deg_s``,
    ``angular_velocity_time_constant_s``), its temperature, the held-out
    95 % HPD coverage it was fitted to, the medians and the point estimate
    at that temperature. Otherwise ``fit`` itself.

    Parameters
    ----------
    fit : TemperatureFit
        The walk's fit (plain or with the drift ``calibration.fit_drift``
        chose), with its held-out medians.
    fold_rate_maps_hz, fold_counts, fold_true_xy_cm, step_s, walk, uniform_weight, rate_floor_hz, fold_mark_terms
        As in ``calibration.fit_drift``.
    frame_t_s : ndarray of float64, shape (n,)
    frame_xy_cm : ndarray of float64, shape (n, 2)
        The learning period's tracked headings as ring points (NaN rows lost).
    tracked_noise_sd : float, default 0
        The held-out steps' tracked heading noise, degrees
        (:func:`tracked_heading_noise_deg`), for the refit's scoring
        (``calibration.fit_temperature``); ``fit`` should have been scored with the same.

    Returns
    -------
    TemperatureFit
    """
    env = walk.environment
    walk_cm = min(fit.map_median_cm, fit.mean_median_cm)
    if not isinstance(env, HeadingRing) or not math.isfinite(walk_cm):
        return fit
    try:
        process, _ = fit_heading_velocity(frame_t_s, env.linearize(frame_xy_cm))
    except ValueError as exc:
        logger.info("no angular velocity learned (%s); the filter keeps the walk", exc)
        return fit
    truth = np.concatenate([_unscored(step_s, xy) for xy in fold_true_xy_cm])
    points = _held_out_pass(fold_rate_maps_hz, _fired(fold_counts), step_s, walk, uniform_weight, fit.temperature,
                            rate_floor_hz, 0.0, 1.0, fold_mark_terms, heading_velocity=process).points_cm
    joint_cm = min(_point_medians_cm(env, points, truth))
    logger.info("angular velocity s.d. %.0f deg/s over %.2f s: held-out median %.2f deg with it, %.2f with the walk",
                process.sd_deg_s, process.time_constant_s, joint_cm, walk_cm)
    if not joint_cm < walk_cm * (1.0 - MIN_GAIN):
        return fit
    # The true bins as fit_temperature scores them (-1 where the tracker lost the head).
    fold_true_bins = [env.bin_index(np.asarray(xy, dtype=np.float64).reshape(-1, 2)) for xy in fold_true_xy_cm]
    return fit_temperature(fold_rate_maps_hz, fold_counts, fold_true_bins, step_s, walk,
                           uniform_weight=uniform_weight, rate_floor_hz=rate_floor_hz,
                           fold_true_xy_cm=fold_true_xy_cm, near=fit, fold_mark_terms=fold_mark_terms,
                           heading_velocity=process, tracked_noise_sd=tracked_noise_sd)
