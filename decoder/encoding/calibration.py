"""Likelihood temperature fitted by blocked cross-validation on the learning data.

Real place cells are not independent Poisson sources: theta modulation,
bursts and slow changes of excitability make their counts overdispersed and
correlated from one step to the next, and a filter that multiplies their
likelihoods step after step becomes sure of itself too soon. A temperature
``T >= 1`` divides the log-likelihood (raises the likelihood to ``1 / T``)
and so widens every posterior; ``T = 1`` is the plain Poisson model.

:func:`fit_temperature` chooses ``T`` so that the 95 % highest-posterior-
density region of held-out steps contains the tracked position in 95 % of
them. The caller cuts the learning data into contiguous blocks
(:func:`blocked_folds`), fits rate maps on all blocks but one, and hands
over, for each block, those maps, the held-out block's counts in
non-overlapping steps and its true bins; the held-out counts are decoded
with the decoder the session decodes with (``BayesDecoder`` as
``[decoder] method = "filter"`` builds it; its posterior is the reference
filter's of ``decoder.inference.filtering``, which the tests check). Contiguous
blocks rather than shuffled steps, because neighbouring steps share the
animal's position and state: a step's neighbours in the training set would
flatter the maps.

The coverage aimed at is the mean mass of the regions themselves, a little
over 0.95 because a region is made of whole bins: that is the coverage of a
calibrated posterior, exactly, on data drawn from the model.

Why coverage rather than the held-out log predictive density: coverage is
what the issue asks of the posterior and what the trigger rules threshold
(posterior mass in a zone); the log density is dominated by the few steps
where the true bin has almost no mass, so its optimum follows the tails.
Coverage rises with ``T`` (a wider posterior covers more) while the
regions' mass hardly moves, so the fit is a bisection on ``log T``, ending
where the line between the final bracket's ends meets the target.

The tracked position is not the truth: where its noise is comparable to a
bin, a calibrated posterior covers the tracked bin less often than its
mass says, and the fit would widen it to cover the tracker's noise too.
Given that noise (``tracked_noise_sd``; on a heading ring
``heading_motion.tracked_heading_noise_deg`` learns it from the frames),
each held-out step is scored by the tracked position's predictive
distribution, the posterior blurred by the noise
(``Environment.tracked_bin_kernel``): the question a calibrated posterior
answers right.

The same held-out steps choose the decoded position, the point estimate
the session scores and shows: the MAP bin's centre or the posterior mean,
whichever lies closer to the tracked position in the median (the mean by a
margin, ``_MEAN_MARGIN``, except on a heading ring), at the fitted
temperature. Where the posterior is broad and round (an open arena) the
mean averages out the bins' quantisation and the MAP's jumps between
neighbouring peaks; where it is split between arms or along a track's two
directions the mean falls between the modes, and the MAP wins. Which one
wins depends on the session, so the learning data decide.

Waveform marks (clusterless decoding) enter every pass the way they enter
a live step: each held-out step's marks log-likelihood and expected count
(``fold_mark_terms``, from the mark model fitted without the held-out
block, ``MarkModel.without_fold``) go to ``BayesDecoder.decode`` beside the
units' counts, so a session of marks alone, or of units and marks, is
calibrated on exactly what it decodes.

The same held-out steps choose the drift of the walk towards the decoded
velocity (:func:`fit_drift`): its gain and the time constant of the
velocity's average, by the held-out median error at the plain walk's
temperature; the
temperature is then fitted again with the drift, whose coverage it is. On
a heading ring the joint state of heading and angular velocity is chosen
and the temperature refitted for it the same way
(``decoder.encoding.heading_motion``).

References
----------
Arlot S, Celisse A (2010). A survey of cross-validation procedures for
model selection. Statistics Surveys 4:40-79 (blocked folds for dependent
data).
"""

from __future__ import annotations

import itertools
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from decoder.inference.checks import kernel_set
from decoder.inference.decoding import HPD_MASS, BayesDecoder, HeldOutPass
from decoder.inference.floored_rates import FlooredRates, floored_rates
from decoder.inference.filtering import hpd_mass
from decoder.inference.heading_velocity import HeadingVelocity
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Environment
from decoder.space.headings import HeadingRing

logger = logging.getLogger(__name__)

#: Largest temperature tried; a model that needs more is not a place code
#: worth decoding, and the fit says so through ``coverage``.
MAX_TEMPERATURE = 20.0

#: Bisection steps on log T: the bracket shrinks to 20^(1/2^6), 4.8 %,
#: finer than the sampling error of a coverage from a few thousand steps.
_BISECTION_STEPS = 6

#: A refit near a known temperature brackets it by this factor either side
#: and bisects it twice: to 1.25^(1/4), 6 %, about as fine as a full fit (5 %).
_NEAR_FACTOR = 1.25
_NEAR_BISECTION_STEPS = 2

#: The first second of every held-out run is decoded but neither its
#: coverage nor its error counts: it starts from a flat prior and no
#: velocity, a start the session's one long run makes once, and the
#: velocity's average takes about its time constant to settle.
BURN_IN_S = 1.0

#: The mean mass of the HPD regions is taken over every 8th held-out step.
_MASS_EVERY = 8

#: The posterior mean becomes the decoded position only if its held-out
#: median error is this share below the MAP's: the mean of a posterior split
#: between two arms lies between them, off the track, a risk that a median
#: over a minute of held-out steps may not show; a near tie goes to the MAP.
#: Not on a heading ring (:func:`point_estimate_of`).
_MEAN_MARGIN = 0.05

#: Drift gains and time constants of the decoded velocity (s) that
#: :func:`fit_drift` tries: a rat's runs last a second or two (common
#: practice), so the velocity must follow within a fraction of that, and a
#: gain of 1 moves the prior exactly as far as the decoded point moved.
DRIFT_GAINS = (0.5, 1.0)
VELOCITY_TIME_CONSTANTS_S = (0.5, 1.0, 2.0)

#: A drift is kept only if it lowers the held-out median error by more than
#: this share: it is two more numbers fitted on one minute of strongly
#: correlated steps, and it changes how the posterior is calibrated (the
#: temperature is refitted for it, on maps fitted without the held-out
#: block), so the plain walk wins ties, noise and small gains.
_DRIFT_MIN_GAIN = 0.05



@dataclass(frozen=True)
class TemperatureFit:
    """The fitted temperature and the held-out coverage behind it (readiness figures).

    Attributes
    ----------
    temperature : float
        The fitted ``T`` (>= 1).
    coverage : float
        Fraction of held-out steps whose true bin lies in the HPD region, at ``temperature``.
    coverage_at_1 : float
        The same at ``T = 1``: how overconfident the plain Poisson model is.
    region_mass : float
        Mean posterior mass of those regions at ``temperature``: the
        coverage a calibrated posterior has in expectation. A little over
        the nominal 0.95, since a region is made of whole bins.
    n_steps : int
        Held-out steps with a known true bin.
    map_median_cm, mean_median_cm : float
        Median distance from the tracked position of the MAP bin's centre
        and of the posterior mean, at ``temperature``, over the held-out
        steps with a known position; NaN when no positions were given (and
        in model files written before the choice was made).
    point_estimate : {"map", "mean"}
        The one with the smaller median, the mean only if smaller by
        ``_MEAN_MARGIN`` off a heading ring (the MAP on a near tie or without positions).
    drift_gain, velocity_time_constant_s : float
        The drift the filter decodes with and the temperature was fitted
        for (:class:`DriftFit`); a gain of 0 (and in model files written
        before the drift was fitted) is the plain walk.
    with_marks : bool
        Whether the held-out steps were decoded with their waveform marks
        (``fold_mark_terms``); False in model files written before.
    angular_velocity_sd_deg_s, angular_velocity_time_constant_s : float
        On a heading ring, the joint state of heading and angular velocity
        the filter decodes with (``decoder.encoding.heading_motion``); an
        s.d. of 0 is the plain walk.
    tracked_noise_sd : float
        S.d. of the tracked position's noise that ``coverage`` and
        ``region_mass`` were scored with (the environment's units; 0, and in
        model files written before, scores against the tracked bin itself).
    """

    temperature: float
    coverage: float
    coverage_at_1: float
    region_mass: float
    n_steps: int
    map_median_cm: float = field(default=math.nan)
    mean_median_cm: float = field(default=math.nan)
    point_estimate: str = "map"
    drift_gain: float = 0.0
    velocity_time_constant_s: float = 1.0
    with_marks: bool = False
    angular_velocity_sd_deg_s: float = 0.0
    angular_velocity_time_constant_s: float = 0.0
    tracked_noise_sd: float = 0.0


@dataclass(frozen=True)
class DriftFit:
    """The drift of the filter's walk towards the decoded velocity, chosen on held-out steps.

    Attributes
    ----------
    gain : float
        In [0, 1]: the drift per step is ``gain`` times the decoded velocity
        (``BayesDecoder(drift_gain=...)``); 0 is the plain walk.
    velocity_time_constant_s : float
        Time constant of the decoded velocity's exponential average (s).
    median_cm : float
        Held-out median error of the better point estimate at this drift
        (NaN for the default, not fitted).
    median_without_cm : float
        The same without drift.
    """

    gain: float = 0.0
    velocity_time_constant_s: float = 1.0
    median_cm: float = math.nan
    median_without_cm: float = math.nan


def blocked_folds(n_steps: int, n_folds: int) -> list[tuple[int, int]]:
    """Contiguous ``[start, stop)`` blocks of steps, as equal as whole steps allow.

    Parameters
    ----------
    n_steps, n_folds : int
        ``n_steps >= n_folds >= 2``.

    Returns
    -------
    list of (int, int), length ``n_folds``

    Examples
    --------
    >>> blocked_folds(10, 3)
    [(0, 3), (3, 6), (6, 10)]
    """
    if not (isinstance(n_folds, (int, np.integer)) and n_folds >= 2):
        raise ValueError(f"n_folds must be a whole number >= 2, got {n_folds!r}")
    if not (isinstance(n_steps, (int, np.integer)) and n_steps >= n_folds):
        raise ValueError(f"n_steps must be a whole number >= n_folds ({n_folds}), got {n_steps!r}")
    edges = (np.arange(n_folds + 1) * n_steps) // n_folds
    return [(int(a), int(b)) for a, b in itertools.pairwise(edges)]


def fit_temperature(
    fold_rate_maps_hz: Sequence[np.ndarray],
    fold_counts: Sequence[np.ndarray],
    fold_true_bins: Sequence[np.ndarray],
    step_s: float,
    walk: RandomWalk,
    *,
    uniform_weight: float,
    rate_floor_hz: float = 0.01,
    fold_true_xy_cm: Sequence[np.ndarray] | None = None,
    drift: DriftFit | None = None,
    near: TemperatureFit | None = None,
    fold_mark_terms: Sequence[tuple[np.ndarray, np.ndarray]] | None = None,
    heading_velocity: HeadingVelocity | None = None,
    tracked_noise_sd: float = 0.0,
) -> TemperatureFit:
    """Fit the likelihood temperature on held-out blocks.

    Parameters
    ----------
    fold_rate_maps_hz : sequence of ndarray, each shape (n_units, n_bins)
        For each held-out block, rate maps fitted without it.
    fold_counts : sequence of ndarray, each shape (n_steps_k, n_units)
        The held-out block's spike counts in non-overlapping steps of ``step_s``.
    fold_true_bins : sequence of ndarray of int, each shape (n_steps_k,)
        Tracked bin at the end of each step; ``-1`` where it is unknown
        (such steps are decoded but not counted).
    step_s : float
    walk : RandomWalk
        The movement model's walk over the bins decoded; its backend is
        the decoder's (``"numba"`` at fit time).
    uniform_weight : float
        The movement model's uniform jump per step.
    rate_floor_hz : float, default 0.01
    fold_true_xy_cm : sequence of ndarray, each shape (n_steps_k, 2), optional
        Tracked position at the end of each step (NaN where unknown): with
        them the MAP and the posterior mean are scored at the fitted
        temperature, by ``walk.environment.distance_cm``, and the closer
        one (the mean by ``_MEAN_MARGIN`` off a heading ring) becomes ``point_estimate``.
    drift : DriftFit, optional
        The drift the filter decodes with (:func:`fit_drift`); none by
        default. It is kept in the returned fit.
    near : TemperatureFit, optional
        A fit the answer is expected near (the plain walk's, when refitting
        for a drift): the bisection starts from a bracket of
        ``_NEAR_FACTOR`` either side of its temperature when that bracket
        holds the answer (about half the passes), and its
        ``coverage_at_1`` is kept rather than measured again.
    fold_mark_terms : sequence of (ndarray, ndarray), optional
        For each held-out block, the waveform marks' terms of its steps:
        their log-likelihood, shape (n_steps_k, n_bins), ``sum_k log
        lambda(x, m_k)`` of each step's marked spikes, and the expected
        count, shape (n_bins,), the ground-process rate times ``step_s``;
        both from the mark model fitted without the block. Decoded with the
        units' counts as ``BayesDecoder.decode`` takes them; none by default.
    heading_velocity : HeadingVelocity, optional
        On a heading ring, the joint state of heading and angular velocity
        the filter decodes with (``decoder.encoding.heading_motion``); the
        plain walk by default. It is kept in the returned fit.
    tracked_noise_sd : float, default 0
        S.d. of the noise of the tracked positions the held-out steps are
        scored against, in the environment's units (degrees on a heading
        ring). Above 0, each step's coverage and region are those of the
        tracked position's predictive distribution, the posterior blurred
        by that noise (``posterior @ environment.tracked_bin_kernel(sd)``):
        a calibrated posterior observed through a noisy tracker then
        covers the tracked bin as often as the regions' mass says, where
        the posterior's own region would cover it less often and push the
        temperature up. 0 scores the posterior's region against the tracked
        bin, as if the tracker were exact. Only a heading ring models the
        noise so far (``NotImplementedError`` elsewhere).

    Returns
    -------
    TemperatureFit
        The coverage aimed at is the regions' own mean mass (``HPD_MASS``
        rounded up to whole bins), which is what a calibrated posterior
        covers. ``temperature`` is 1 when the plain model already covers
        it, ``MAX_TEMPERATURE`` when even that does not, and otherwise
        where the coverage meets the mass, interpolated in ``log T``
        between the ends of the final bisection bracket.

    Raises
    ------
    ValueError
        For sequences of different lengths, fewer than two folds, no
        step with a known true bin, or mark terms of the wrong shape.

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (40, 0), bin_cm=10)
    >>> walk = RandomWalk(track, track.valid_mask, 5.0, backend="numpy")
    >>> rates = np.array([[20.0, 1, 1, 1], [1, 1, 1, 20.0]])
    >>> counts = np.array([[2, 0], [0, 2]])
    >>> fit = fit_temperature([rates, rates], [counts, counts], [np.array([0, 3])] * 2, 0.1, walk,
    ...                       uniform_weight=1e-3)
    >>> fit.temperature, fit.coverage
    (1.0, 1.0)
    """
    n_folds = len(fold_rate_maps_hz)
    if n_folds < 2 or len(fold_counts) != n_folds or len(fold_true_bins) != n_folds:
        raise ValueError(
            f"give one rate-map set, count array and true-bin array per fold, at least two folds; got "
            f"{n_folds}, {len(fold_counts)} and {len(fold_true_bins)}"
        )
    truths = [np.asarray(b, dtype=np.int64) for b in fold_true_bins]
    for k, (counts, bins) in enumerate(zip(fold_counts, truths)):
        if bins.shape != (np.shape(counts)[0],):
            raise ValueError(f"fold {k}: {np.shape(counts)[0]} steps of counts but true bins of shape {bins.shape}")
    if fold_true_xy_cm is not None and [np.shape(xy) for xy in fold_true_xy_cm] != [(b.size, 2) for b in truths]:
        raise ValueError("fold_true_xy_cm must hold one (n_steps_k, 2) array of positions per fold, like the true bins")
    truths = [np.where(_burning_in(step_s, b.size), -1, b) for b in truths]
    if fold_true_xy_cm is not None:
        fold_true_xy_cm = [_unscored(step_s, xy) for xy in fold_true_xy_cm]
    n_known = int(sum((b >= 0).sum() for b in truths))
    if n_known == 0:
        raise ValueError("no held-out step has a known true bin; the tracker was lost throughout")
    drift = drift or DriftFit()
    _check_mark_terms(fold_mark_terms, [b.size for b in truths], walk.environment.n_bins)

    fired = _fired(fold_counts)
    fold_rate_maps_hz = _floored(fold_rate_maps_hz, walk, rate_floor_hz)
    all_true_bins = np.concatenate(truths)
    n_bins = walk.environment.n_bins
    if not (math.isfinite(tracked_noise_sd) and tracked_noise_sd >= 0.0):
        raise ValueError(f"tracked_noise_sd must be a finite s.d. >= 0, got {tracked_noise_sd!r}")
    blur = walk.environment.tracked_bin_kernel(tracked_noise_sd) if tracked_noise_sd > 0 else None
    # The known steps, and every _MASS_EVERY-th of them, whose HPD region's mass is measured.
    known_at = np.flatnonzero(all_true_bins >= 0)
    mass_of_known = np.arange(0, known_at.size, _MASS_EVERY)
    mass_at = known_at[mass_of_known]
    # The posteriors a pass returns whole: the mass steps', or every known step's to blur.
    keep = np.zeros(all_true_bins.size, bool)
    keep[known_at if blur is not None else mass_at] = True
    kept = np.split(keep, np.cumsum([b.size for b in truths])[:-1])
    mass_above = kernel_set(walk.backend).mass_above

    # The decoded points (MAP, mean) of each step by temperature, for fit()'s medians: a temperature
    # already decoded is not decoded again (a pass costs as much as the fit's other work); only the
    # bisection's interpolated temperature takes a pass of its own.
    points_at: dict[float, np.ndarray] = {}

    def held_out(temperature: float) -> tuple[float, float]:
        """Coverage of held-out steps and the mean mass of their HPD regions; the points go to ``points_at``.

        Step by step, from the decoder's own HPD size: whole posteriors of
        thousands of steps would take more memory and time than the decoding.
        The regions' mass varies little from step to step (it is 0.95 plus
        part of one bin), so every ``_MASS_EVERY``-th known step estimates it.
        With a tracked noise, the region and its mass are the predictive
        distribution's, the posterior blurred by ``blur``: those steps'
        posteriors come back whole and are scored here.
        """
        passed = _held_out_pass(fold_rate_maps_hz, fired, step_s, walk, uniform_weight, temperature, rate_floor_hz,
                                drift.gain, drift.velocity_time_constant_s, fold_mark_terms, heading_velocity,
                                scored=(truths, kept))
        if fold_true_xy_cm is not None:
            points_at[temperature] = passed.points_cm
        if blur is None:
            above = passed.above_true[known_at]
        else:
            blurred = [p @ blur for p in passed.kept]
            scratch = np.empty(n_bins)
            above = [mass_above(p, p[true_bin], scratch) for p, true_bin in zip(blurred, all_true_bins[known_at])]
        # Inside when the bins more probable than the true one hold less than the mass
        # (filtering.hpd_contains); the region is the decoder's n_hpd most probable bins.
        inside = int(np.count_nonzero(np.asarray(above) < HPD_MASS))
        mass = 0.0
        for i, at in enumerate(mass_at):
            if blur is None:
                p, n_hpd = passed.kept[i], int(passed.n_hpd[at])
                mass += float(np.partition(p, n_bins - n_hpd)[n_bins - n_hpd :].sum())
            else:
                mass += float(hpd_mass(blurred[mass_of_known[i]][np.newaxis])[0])
        return inside / n_known, mass / len(mass_at)

    coverage_at_1 = math.nan if near is None else near.coverage_at_1
    turning = {"tracked_noise_sd": float(tracked_noise_sd)}
    if heading_velocity is not None:
        turning.update(angular_velocity_sd_deg_s=heading_velocity.sd_deg_s,
                       angular_velocity_time_constant_s=heading_velocity.time_constant_s)

    def fit(temperature: float, *figures: float) -> TemperatureFit:
        """The fit at ``temperature``, with its coverage and mass if known (decoded once more if not)."""
        cov, mass = figures or held_out(temperature)
        if fold_true_xy_cm is None:
            return TemperatureFit(temperature, cov, coverage_at_1, mass, n_known, drift_gain=drift.gain,
                                  velocity_time_constant_s=drift.velocity_time_constant_s,
                                  with_marks=fold_mark_terms is not None, **turning)
        map_cm, mean_cm = _point_medians_cm(walk.environment, points_at[temperature], np.concatenate(fold_true_xy_cm))
        return TemperatureFit(temperature, cov, coverage_at_1, mass, n_known, map_cm, mean_cm,
                              point_estimate_of(map_cm, mean_cm, walk.environment), drift.gain,
                              drift.velocity_time_constant_s, fold_mark_terms is not None, **turning)

    def bisect(lo: tuple[float, ...], hi: tuple[float, ...], steps: int) -> TemperatureFit:
        for _ in range(steps):
            mid = math.sqrt(lo[0] * hi[0])  # bisection on log T
            at_mid = (mid, *held_out(mid))
            if at_mid[1] >= at_mid[2]:
                hi = at_mid
            else:
                lo = at_mid
        # Either end misses the target by up to the bracket's change of coverage (about 0.01 at the full
        # fit's last bracket): the temperature where the line between them meets it, in log T, lands on it.
        short, over = lo[2] - lo[1], hi[1] - hi[2]
        return fit(lo[0] * (hi[0] / lo[0]) ** (short / (short + over)))

    if near is not None:
        # A bracket of _NEAR_FACTOR either side of the expected temperature, when it holds the answer.
        at_near = (near.temperature, *held_out(near.temperature))
        covers = at_near[1] >= at_near[2]
        if covers:
            other = max(1.0, near.temperature / _NEAR_FACTOR)
        else:
            other = min(MAX_TEMPERATURE, near.temperature * _NEAR_FACTOR)
        at_other = (other, *held_out(other))
        if (at_other[1] >= at_other[2]) != covers:
            return bisect(*((at_other, at_near) if covers else (at_near, at_other)), _NEAR_BISECTION_STEPS)
        if other in (1.0, MAX_TEMPERATURE):
            return fit(*at_other)
    at_1 = held_out(1.0)
    coverage_at_1 = at_1[0]
    if at_1[0] >= at_1[1]:
        return fit(1.0, *at_1)
    at_max = held_out(MAX_TEMPERATURE)
    if at_max[0] < at_max[1]:
        return fit(MAX_TEMPERATURE, *at_max)
    return bisect((1.0, *at_1), (MAX_TEMPERATURE, *at_max), _BISECTION_STEPS)


def _burning_in(step_s: float, n_steps: int) -> np.ndarray:
    """Which of a held-out run's ``n_steps`` fall in its first ``BURN_IN_S`` (at most half of them)."""
    return np.arange(n_steps) < min(round(BURN_IN_S / step_s), n_steps // 2)


def _unscored(step_s: float, xy_cm: np.ndarray) -> np.ndarray:
    """Tracked positions (n, 2) of a held-out run, NaN (not scored) in its burn-in."""
    xy = np.array(xy_cm, dtype=np.float64).reshape(-1, 2)
    xy[_burning_in(step_s, len(xy))] = np.nan
    return xy


def _check_mark_terms(fold_mark_terms: Sequence[tuple[np.ndarray, np.ndarray]] | None, n_steps: list[int],
                      n_bins: int) -> None:
    """ValueError unless ``fold_mark_terms`` is None or one (n_steps_k, n_bins), (n_bins,) pair per fold."""
    if fold_mark_terms is None:
        return
    shapes = [(np.shape(ll), np.shape(expected)) for ll, expected in fold_mark_terms]
    if shapes != [((n, n_bins), (n_bins,)) for n in n_steps]:
        raise ValueError(f"fold_mark_terms must hold one (n_steps_k, {n_bins}) log-likelihood and one ({n_bins},) "
                         f"expected count per fold, for fold steps {n_steps}; got shapes {shapes}")


def _held_out_pass(
    fold_rate_maps_hz: Sequence[np.ndarray | FlooredRates], fired: list[tuple[np.ndarray, np.ndarray, np.ndarray]],
    step_s: float,
    walk: RandomWalk, uniform_weight: float, temperature: float, rate_floor_hz: float, drift_gain: float,
    velocity_time_constant_s: float, fold_mark_terms: Sequence[tuple[np.ndarray, np.ndarray]] | None = None,
    heading_velocity: HeadingVelocity | None = None,
    scored: tuple[Sequence[np.ndarray], Sequence[np.ndarray]] | None = None,
) -> HeldOutPass:
    """Every held-out step decoded by the filter, fold after fold, each fold from a fresh decoder, in one call a fold.

    ``scored`` holds each fold's true bins (-1: not scored) and the steps
    whose posteriors come back whole (``BayesDecoder.decode_held_out``);
    without it only the points are of use.
    """
    parts = []
    for k, (rates, (rows, counts, start)) in enumerate(zip(_floored(fold_rate_maps_hz, walk, rate_floor_hz), fired)):
        decoder = BayesDecoder(
            rates, walk.environment, walk.valid_mask, step_s, prior="state_space", random_walk_sd_cm=walk.sd_cm,
            uniform_weight=uniform_weight, likelihood_temperature=temperature, rate_floor_hz=rate_floor_hz,
            drift_gain=drift_gain, velocity_time_constant_s=velocity_time_constant_s,
            heading_velocity=heading_velocity, backend=walk.backend,
        )
        n_steps = start.size - 1
        true_bins, keep = ((np.full(n_steps, -1, np.int64), np.zeros(n_steps, bool)) if scored is None
                           else (scored[0][k], scored[1][k]))
        marks = (None, None) if fold_mark_terms is None else fold_mark_terms[k]
        parts.append(decoder.decode_held_out(rows, counts, start, true_bins, keep, *marks))
    return HeldOutPass(*(np.concatenate(column) for column in zip(*parts)))


def point_estimate_of(map_median_cm: float, mean_median_cm: float, environment: Environment | None = None) -> str:
    """The decoded position a fit chooses from the held-out medians: "mean" if smaller by ``_MEAN_MARGIN``, else "map".

    A near tie goes to the MAP, which never lies between two arms. On a
    heading ring the mean needs no margin: its direction (the circular
    mean) is a heading like any other, never a point off the environment,
    and the held-out headings are the tracker's, whose noise adds to both
    medians and shrinks their relative difference.
    """
    margin = 0.0 if isinstance(environment, HeadingRing) else _MEAN_MARGIN
    return "mean" if mean_median_cm < map_median_cm * (1.0 - margin) else "map"


def _point_medians_cm(env: Environment, decoded: np.ndarray, truth_xy_cm: np.ndarray) -> tuple[float, float]:
    """Median distance of the MAP (columns 0-1) and of the posterior mean (2-3) from the known positions."""
    known = np.all(np.isfinite(truth_xy_cm), axis=1)
    if not known.any():
        return math.nan, math.nan
    return tuple(float(np.nanmedian(env.distance_cm(decoded[known, i : i + 2], truth_xy_cm[known]))) for i in (0, 2))


def _floored(fold_rate_maps_hz: Sequence[np.ndarray | FlooredRates], walk: RandomWalk,
             rate_floor_hz: float) -> list[FlooredRates]:
    """Each fold's maps checked and floored once, for the dozen decoders a fit makes of them."""
    return [maps if isinstance(maps, FlooredRates) else floored_rates(maps, walk.valid_mask, rate_floor_hz)
            for maps in fold_rate_maps_hz]


def _fired(fold_counts: Sequence[np.ndarray]) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Each fold's held-out steps as the decoder takes them: the rows that fired and their counts, end to end.

    Per fold ``(rows, counts, start)``: step ``i`` fired ``rows[start[i]:start[i + 1]]`` (int64) with
    ``counts[...]`` spikes (float64), as ``BayesDecoder.decode_held_out`` takes them.
    """
    out = []
    for c in fold_counts:
        c = np.asarray(c)
        steps, rows = np.nonzero(c)
        start = np.searchsorted(steps, np.arange(c.shape[0] + 1)).astype(np.int64)
        out.append((rows.astype(np.int64), c[steps, rows].astype(np.float64), start))
    return out


def fit_drift(
    fold_rate_maps_hz: Sequence[np.ndarray],
    fold_counts: Sequence[np.ndarray],
    fold_true_xy_cm: Sequence[np.ndarray],
    step_s: float,
    walk: RandomWalk,
    *,
    uniform_weight: float,
    temperature: float,
    rate_floor_hz: float = 0.01,
    median_without_cm: float | None = None,
    fold_mark_terms: Sequence[tuple[np.ndarray, np.ndarray]] | None = None,
) -> DriftFit:
    """Choose the drift gain and the velocity's time constant by held-out median error.

    The held-out blocks are decoded (as :func:`fit_temperature` does, at
    ``temperature``) with each of ``DRIFT_GAINS`` at the middle one of
    ``VELOCITY_TIME_CONSTANTS_S``, then with the best of those gains at the
    other time constants (a search one coordinate at a time: four passes
    where the whole grid takes six); the pair whose better point estimate
    (MAP or posterior mean) has the smallest median distance from the
    tracked position wins, if it beats the plain walk by more than
    ``_DRIFT_MIN_GAIN``. The velocity is the filter's own decoded one, so
    the choice needs no tracking at decoding time.

    Parameters
    ----------
    fold_rate_maps_hz, fold_counts, step_s, walk, uniform_weight, rate_floor_hz, fold_mark_terms
        As in :func:`fit_temperature`.
    fold_true_xy_cm : sequence of ndarray, each shape (n_steps_k, 2)
        Tracked position at the end of each step (NaN where unknown).
    temperature : float
        The likelihood temperature to decode with.
    median_without_cm : float, optional
        The plain walk's held-out median at ``temperature``, when known
        (``min(TemperatureFit.map_median_cm, mean_median_cm)``): saves a pass.

    Returns
    -------
    DriftFit

    Raises
    ------
    ValueError
        For sequences of different lengths or no step with a known position.
    """
    if not len(fold_rate_maps_hz) == len(fold_counts) == len(fold_true_xy_cm):
        raise ValueError("give one rate-map set, count array and position array per fold")
    truth = np.concatenate([_unscored(step_s, xy) for xy in fold_true_xy_cm])
    known = np.all(np.isfinite(truth), axis=1)
    if not known.any():
        raise ValueError("no held-out step has a known position; the tracker was lost throughout")
    _check_mark_terms(fold_mark_terms, [len(c) for c in fold_counts], walk.environment.n_bins)
    fired = _fired(fold_counts)
    fold_rate_maps_hz = _floored(fold_rate_maps_hz, walk, rate_floor_hz)
    env = walk.environment

    def median_cm(gain: float, time_constant_s: float) -> float:
        points = _held_out_pass(fold_rate_maps_hz, fired, step_s, walk, uniform_weight, temperature, rate_floor_hz,
                                gain, time_constant_s, fold_mark_terms).points_cm
        return min(_point_medians_cm(env, points, truth))

    without = median_cm(0.0, 1.0) if median_without_cm is None else median_without_cm
    plain = DriftFit(median_cm=without, median_without_cm=without)

    def tried(gain: float, time_constant_s: float) -> DriftFit:
        error = median_cm(gain, time_constant_s)
        logger.debug("drift gain %.2f over %.2f s: held-out median %.3f cm (%.3f without)", gain, time_constant_s,
                     error, without)
        return DriftFit(gain, time_constant_s, error, without)

    # One coordinate at a time: the gains at the middle time constant, then the other time constants at the best gain.
    middle = VELOCITY_TIME_CONSTANTS_S[len(VELOCITY_TIME_CONSTANTS_S) // 2]
    best = min((tried(gain, middle) for gain in DRIFT_GAINS), key=lambda fit: fit.median_cm)
    others = [tried(best.gain, t) for t in VELOCITY_TIME_CONSTANTS_S if t != middle]
    best = min([best, *others], key=lambda fit: fit.median_cm)
    return best if best.median_cm < without * (1.0 - _DRIFT_MIN_GAIN) else plain
