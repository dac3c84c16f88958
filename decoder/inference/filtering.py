"""Reference causal filter over non-overlapping time bins, in plain numpy.

:func:`filter_posteriors` runs the state-space filter over a whole sequence
of spike-count bins at once: each spike counted once, in the bin of the
step it fell in; between steps the previous posterior is moved by a
``random_walk.RandomWalk`` (Gaussian on the masked grid, or the dense
transition of a track or graph), tilted towards the decoded velocity if
asked, and mixed with a uniform jump; the
likelihood is the independent-Poisson one raised to ``1 / temperature``.
The filtered posterior at the end of a step is the position at that step,
not the centre of a window.

It is the reference the tests and the calibration (``decoder.encoding.calibration``)
use; the decoding loop's fused kernel (``_kernels.decode_step``) computes
the same filter one step at a time (``[decoder] method = "filter"``), with
a relative cut-off on the posterior when ``uniform_weight > 0``.

:func:`hpd_contains` says whether a bin lies inside a posterior's
highest-posterior-density region, the test behind coverage figures.

References
----------
Brown EN, Frank LM, Tang D, Quirk MC, Wilson MA (1998). A statistical
paradigm for neural spike train decoding applied to position prediction
from ensemble firing patterns of rat hippocampal place cells. J Neurosci
18:7411-7425.

Rabiner LR (1989). A tutorial on hidden Markov models and selected
applications in speech recognition. Proc IEEE 77:257-286 (the forward pass).
"""

from __future__ import annotations

import math

import numpy as np

from decoder.inference.decoding import HPD_MASS, MAX_DRIFT_SD
from decoder.inference.random_walk import RandomWalk


def tempered_log_likelihood(
    counts: np.ndarray, rate_maps_hz: np.ndarray, step_s: float, temperature: float = 1.0,
    rate_floor_hz: float = 0.01,
) -> np.ndarray:
    """Independent-Poisson log-likelihood of every bin at every step, divided by ``temperature``.

    ``(sum_i n_i log(lambda_i(x)) - step_s sum_i lambda_i(x)) / temperature``,
    up to terms that do not depend on the position (Zhang et al. 1998).

    Parameters
    ----------
    counts : ndarray, shape (n_steps, n_units)
        Spike counts per step and unit.
    rate_maps_hz : ndarray of float64, shape (n_units, n_bins)
        Rates below ``rate_floor_hz`` (and NaN) are raised to it, as in
        ``decoding.BayesDecoder``.
    step_s, temperature, rate_floor_hz : float

    Returns
    -------
    ndarray of float64, shape (n_steps, n_bins)
    """
    rates = np.fmax(np.asarray(rate_maps_hz, dtype=np.float64), rate_floor_hz)
    counts = np.asarray(counts, dtype=np.float64)
    return (counts @ np.log(rates) - step_s * rates.sum(axis=0)) / temperature


def filter_posteriors(
    counts: np.ndarray,
    rate_maps_hz: np.ndarray,
    step_s: float,
    walk: RandomWalk,
    *,
    uniform_weight: float = 0.0,
    temperature: float = 1.0,
    rate_floor_hz: float = 0.01,
    drift_gain: float = 0.0,
    velocity_time_constant_s: float = 1.0,
) -> np.ndarray:
    """Filtered posterior at every step of a sequence of non-overlapping bins.

    The first step's prior is uniform over ``walk.valid_mask``; step ``t``'s
    is ``(1 - uniform_weight) * walk.predict(p_{t-1}) + uniform_weight /
    n_valid`` on the valid bins. Each posterior is that prior times
    ``exp(log-likelihood / temperature)``, normalised over the valid bins.

    Parameters
    ----------
    counts : ndarray, shape (n_steps, n_units)
        Spike counts per step (each spike in exactly one step).
    rate_maps_hz : ndarray of float64, shape (n_units, n_bins)
    step_s : float
        Length of one bin, s.
    walk : RandomWalk
        The transition between steps; its ``valid_mask`` is the bins
        decoded over.
    uniform_weight : float, default 0.0
        Probability per step of a jump to a uniformly drawn valid bin, in [0, 1).
    temperature : float, default 1.0
        The log-likelihood is divided by it; > 1 widens the posterior.
    rate_floor_hz : float, default 0.01
    drift_gain : float, default 0.0
        In [0, 1]. Above 0 the walk of step ``t + 1`` is tilted
        (``walk.predict(p, tilt)``) so that its mean moves by ``mu =
        drift_gain * v_t``, ``theta = mu / s^2`` (``s = walk.sd_cm``), with
        ``v_t`` the exponentially weighted average of the posterior mean's
        displacement per step, ``v_t = v_{t-1} + a (d_t - v_{t-1})``, ``a =
        1 - exp(-step_s / velocity_time_constant_s)``, ``v_0 = 0``; ``d_t``
        and ``mu`` are shortened to ``decoding.MAX_DRIFT_SD * s`` at most.
    velocity_time_constant_s : float, default 1.0

    Returns
    -------
    ndarray of float64, shape (n_steps, n_bins)
        Each row sums to 1 and is 0 outside the valid bins.

    Raises
    ------
    ValueError
        For arrays whose shapes disagree with each other or with the walk,
        a weight, temperature or step out of range, or a step whose prior
        has no mass where its likelihood has any (only with
        ``uniform_weight = 0``).

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (40, 0), bin_cm=10)
    >>> rates = np.array([[20.0, 1, 1, 1], [1, 1, 1, 20.0]])
    >>> walk = RandomWalk(track, track.valid_mask, 5.0, backend="numpy")
    >>> post = filter_posteriors(np.array([[2, 0], [1, 0]]), rates, 0.1, walk)
    >>> int(post[-1].argmax())
    0
    """
    counts = np.asarray(counts)
    rates = np.asarray(rate_maps_hz, dtype=np.float64)
    n_bins = walk.environment.n_bins
    if rates.ndim != 2 or rates.shape[1] != n_bins:
        raise ValueError(f"rate_maps_hz must have shape (n_units, {n_bins}), got {rates.shape}")
    if counts.ndim != 2 or counts.shape[1] != rates.shape[0]:
        raise ValueError(f"counts must have shape (n_steps, {rates.shape[0]}), got {counts.shape}")
    if not (math.isfinite(step_s) and step_s > 0):
        raise ValueError(f"step_s must be a positive number of seconds, got {step_s!r}")
    if not 0 <= uniform_weight < 1:
        raise ValueError(f"uniform_weight must be a probability in [0, 1), got {uniform_weight!r}")
    if not (math.isfinite(temperature) and temperature > 0):
        raise ValueError(f"temperature must be a positive number, got {temperature!r}")
    valid = walk.valid_mask
    uniform = valid / valid.sum()
    log_like = tempered_log_likelihood(counts, rates, step_s, temperature, rate_floor_hz)
    log_like[:, ~valid] = -np.inf
    # Shifting each step by its best bin keeps exp() in range.
    like = np.exp(log_like - log_like.max(axis=1, keepdims=True))
    if not 0 <= drift_gain <= 1:
        raise ValueError(f"drift_gain must be a number in [0, 1], got {drift_gain!r}")
    centers = np.asarray(walk.environment.bin_centers_cm, dtype=np.float64)
    keep = math.exp(-step_s / velocity_time_constant_s)
    cap_cm = MAX_DRIFT_SD * walk.sd_cm

    def shortened(d: np.ndarray) -> np.ndarray:
        size = math.hypot(*d)
        return d * (cap_cm / size) if size > cap_cm else d

    out = np.empty((counts.shape[0], n_bins))
    prior = uniform
    velocity, last = np.zeros(2), None
    for t in range(counts.shape[0]):
        joint = prior * like[t]
        evidence = joint.sum()
        if not evidence > 0:
            # The reference never falls back silently, unlike the live decoder.
            raise ValueError(
                f"step {t}: the prior has no mass where the spikes point; use uniform_weight > 0"
            )
        out[t] = joint / evidence
        tilt = np.zeros(2)
        if drift_gain > 0:
            mean = out[t] @ centers
            if last is not None:
                velocity = keep * velocity + (1.0 - keep) * shortened(mean - last)
            last = mean
            tilt = shortened(drift_gain * velocity) / walk.sd_cm**2
        prior = (1.0 - uniform_weight) * walk.predict(out[t], tilt) + uniform_weight * uniform
    return out


def hpd_contains(posteriors: np.ndarray, bins: np.ndarray, mass: float = HPD_MASS) -> np.ndarray:
    """Whether each bin lies inside its posterior's highest-posterior-density region.

    The region is the smallest set of bins, taken in decreasing
    probability, whose mass reaches ``mass``. A bin is inside when the bins
    more probable than it hold less than ``mass`` (ties go in together).

    Parameters
    ----------
    posteriors : ndarray of float64, shape (n_steps, n_bins)
    bins : ndarray of int, shape (n_steps,)
        The true bin at each step; ``-1`` (lost) gives False.
    mass : float, default ``HPD_MASS``

    Returns
    -------
    ndarray of bool, shape (n_steps,)
    """
    post = np.asarray(posteriors, dtype=np.float64)
    bins = np.asarray(bins, dtype=np.int64)
    known = bins >= 0
    p_true = post[np.arange(len(bins)), np.where(known, bins, 0)]
    above = np.where(post > p_true[:, np.newaxis], post, 0.0).sum(axis=1)
    return known & (above < mass)


def hpd_mass(posteriors: np.ndarray, mass: float = HPD_MASS) -> np.ndarray:
    """Mass of each posterior's highest-posterior-density region (>= ``mass`` on bins).

    The expected coverage of the region when positions are drawn from the
    posterior itself: a little above ``mass``, since whole bins go in.

    Parameters
    ----------
    posteriors : ndarray of float64, shape (n_steps, n_bins)
    mass : float, default ``HPD_MASS``

    Returns
    -------
    ndarray of float64, shape (n_steps,)
    """
    ordered = -np.sort(-np.asarray(posteriors, dtype=np.float64), axis=1)
    cum = np.cumsum(ordered, axis=1)
    last = np.minimum((cum < mass).sum(axis=1), ordered.shape[1] - 1)
    return cum[np.arange(len(cum)), last]
