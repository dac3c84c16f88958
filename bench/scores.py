"""Scores of a decoded trajectory against the true one: HPD coverage and lag, in plain numpy.

Shared by the accuracy benchmark for placeloop and the textbook decoder alike,
so that both are scored by one rule.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def in_hpd(posterior: np.ndarray, true_bin: int, mass: float = 0.95) -> bool:
    """Whether ``true_bin`` lies in the highest-posterior-density region of ``mass``.

    The region is the smallest set of bins, taken from the most probable
    down, whose probabilities add up to at least ``mass`` (the usual
    definition of an HPD region; e.g. Gelman et al., Bayesian Data Analysis,
    from memory). A bin is inside exactly when the bins more probable than it
    hold less than ``mass``; ties count in its favour.

    Parameters
    ----------
    posterior : ndarray of float64, shape (n_bins,)
        Sums to 1.
    true_bin : int
        Negative (the true position off every bin) is never inside.
    mass : float
    """
    if true_bin < 0:
        return False
    p = np.asarray(posterior, np.float64)
    return float(p[p > p[true_bin]].sum()) < mass


def best_lag_s(t_s: np.ndarray, decoded_xy_cm: np.ndarray, true_xy_at: Callable[[np.ndarray], np.ndarray],
               distance_cm: Callable[[np.ndarray, np.ndarray], np.ndarray],
               lags_s: np.ndarray | None = None) -> tuple[float, float]:
    """The shift that best aligns a decoded trajectory with the true one.

    For each candidate lag ``L`` the decoded position at ``t`` is compared
    with the true position at ``t - L``; the lag with the smallest median
    distance wins. A positive lag means the decoded trajectory trails the
    animal.

    Parameters
    ----------
    t_s : ndarray of float64, shape (n,)
        Times the decoded positions are dated at.
    decoded_xy_cm : ndarray of float64, shape (n, 2)
    true_xy_at : callable
        True positions at an array of times, shape (n,) -> (n, 2).
    distance_cm : callable
        Distance between two (n, 2) arrays of positions, shape (n,).
    lags_s : ndarray of float64, optional
        Candidates; -0.5 to 0.5 s in 10 ms steps by default.

    Returns
    -------
    lag_s : float
    median_cm : float
        The median distance at that lag.
    """
    if lags_s is None:
        lags_s = np.round(np.arange(-50, 51) * 0.01, 2)
    medians = np.array([np.nanmedian(distance_cm(decoded_xy_cm, true_xy_at(t_s - lag))) for lag in lags_s])
    best = int(np.nanargmin(medians))
    return float(lags_s[best]), float(medians[best])
