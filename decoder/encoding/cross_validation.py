"""Blocked cross-validation of a place model: folds of contiguous time, and the held-out decoding error.

Data time is cut into blocks of ``cv_block_s`` from the first frame; block
``b`` belongs to fold ``b mod cv_folds``, so a fold is made of stretches of
the session, never of random frames, and neighbouring frames (which share
position and firing) do not sit on both sides of a split. Evaluation
samples are taken only where their spike-count window lies inside one
block (common practice for time series). Each fold is then decoded with
maps fitted on the others.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Environment

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class CrossValidatedError:
    """Decoding error on held-out folds; ``float()`` of it is the median.

    Attributes
    ----------
    median_cm : float
        Median distance between decoded (MAP) and true position over all
        held-out samples, cm (along the track on a track or graph).
    fold_median_cm : ndarray, shape (cv_folds,)
        The same per fold; NaN for a fold without samples.
    fold_n_samples : ndarray of int64, shape (cv_folds,)
    errors_cm : ndarray, shape (n_samples,)
        Every sample's error.
    fold_of_sample : ndarray of int64, shape (n_samples,)
    """

    median_cm: float
    fold_median_cm: np.ndarray
    fold_n_samples: np.ndarray
    errors_cm: np.ndarray
    fold_of_sample: np.ndarray

    def __float__(self) -> float:
        return self.median_cm


def cv_block(t_s: np.ndarray, t0_s: float, block_s: float) -> np.ndarray:
    """Index of the cross-validation block each time falls in (as floats; fold = block mod folds).

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
        Data times, s.
    t0_s : float
        Start of block 0, s: the session's first frame.
    block_s : float
        Block length, s.

    Returns
    -------
    ndarray of float64, shape (n,)
        Whole numbers; negative before ``t0_s``.
    """
    return np.floor((t_s - t0_s) / block_s)


def held_out_error(
    environment: Environment,
    sample: np.ndarray,
    row: np.ndarray,
    count: np.ndarray,
    sample_fold: np.ndarray,
    sample_xy_cm: np.ndarray,
    cv_folds: int,
    fit_without: Callable[[int], tuple[np.ndarray, np.ndarray] | None],
    window_s: float,
    rate_floor_hz: float,
) -> CrossValidatedError:
    """Decode every evaluation sample with maps fitted on the other folds, and measure the error.

    Each sample is decoded with a uniform prior from the spikes in its
    window. Samples whose window holds no spike carry no information and are
    skipped.

    Parameters
    ----------
    environment : Environment
    sample, row : ndarray of int64, shape (n_pairs,)
        Sparse spike counts: sample index and model row, sorted by sample.
    count : ndarray of float64, shape (n_pairs,)
    sample_fold : ndarray of int64, shape (n_samples,)
        Fold of every evaluation sample.
    sample_xy_cm : ndarray of float64, shape (n_samples, 2)
        Tracked position at every evaluation sample.
    cv_folds : int
    fit_without : callable
        ``fit_without(fold)`` gives rate maps (n_units, n_bins) and the
        visited mask (n_bins,) fitted on every fold but ``fold``, or None
        when the other folds hold no training data.
    window_s : float
        Length of a sample's spike-count window, s.
    rate_floor_hz : float

    Returns
    -------
    CrossValidatedError

    Raises
    ------
    ValueError
        If no sample holds a spike, or none could be decoded.

    References
    ----------
    Zhang, K., Ginzburg, I., McNaughton, B. L. & Sejnowski, T. J. (1998).
    Interpreting neuronal population activity by reconstruction: unified
    framework with application to hippocampal place cells. Journal of
    Neurophysiology 79, 1017-1044.
    """
    with_spikes = np.unique(sample)
    if with_spikes.size == 0:
        raise ValueError(
            "no evaluation sample with spikes yet; cross-validation needs running time and spikes"
        )
    bounds = np.searchsorted(sample, with_spikes), np.searchsorted(sample, with_spikes, side="right")
    decoded = np.full((len(with_spikes), 2), np.nan)
    fold_of = sample_fold[with_spikes]
    for fold in range(cv_folds):
        held_out = np.flatnonzero(fold_of == fold)
        if held_out.size == 0:
            continue
        fitted = fit_without(fold)
        if fitted is None:
            logger.info("fold %d has no training data in the other folds; skipped", fold)
            continue
        rates, visited = fitted
        decoder = BayesDecoder(
            rates, environment, visited, window_s, prior="uniform", rate_floor_hz=rate_floor_hz,
        )
        for i in held_out:
            lo, hi = bounds[0][i], bounds[1][i]
            step = decoder.decode(row[lo:hi].astype(np.int64), count[lo:hi])
            decoded[i] = step.map_xy_cm
    errors = environment.distance_cm(decoded, sample_xy_cm[with_spikes])
    ok = np.isfinite(errors)
    errors, fold_of = errors[ok], fold_of[ok]
    if errors.size == 0:
        raise ValueError("no held-out sample could be decoded; the folds need more running time")
    fold_n = np.bincount(fold_of, minlength=cv_folds)
    fold_median = np.array(
        [np.median(errors[fold_of == f]) if fold_n[f] else np.nan for f in range(cv_folds)]
    )
    return CrossValidatedError(
        median_cm=float(np.median(errors)),
        fold_median_cm=fold_median,
        fold_n_samples=fold_n,
        errors_cm=errors,
        fold_of_sample=fold_of,
    )
