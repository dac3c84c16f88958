"""The sequence filter's kernel: one content bin through the forward pass of each hypothesis, with a numpy twin.

:func:`sequence_step` is what :class:`decoder.inference.sequence_filter.SequenceFilter`
calls once per content bin; :func:`sequence_step_numpy` takes the same
arguments and gives the same result (tests use it as the reference,
``bench/ripples.py`` as the baseline). The model, its hypotheses and the
meaning of each argument are the filter's (see its docstring); the kernel
only runs the arithmetic.

The forward pass is the scaled one (Rabiner 1989, Proc. IEEE 77:257, eqs.
91-92): each hypothesis's forward vector is kept normalised, and the log of
each step's normaliser is added to that hypothesis's log-likelihood, so a
long event neither underflows nor needs a log per level. A step's normaliser
is below 1 when the hypothesis's moves carry mass off the grid (a sequence
"towards" that would pass the zone): the hypothesis pays for it, by design.

Hypotheses, in the order of the second axis of ``alpha`` and ``log_lik``:
0 towards the zone (the distance falls), 1 away from it (it rises), 2 no
sequence (it stays within the slack or jumps anywhere).
"""

from __future__ import annotations

import math

import numba
import numpy as np

#: The hypotheses, in the order of the kernel's second axis.
HYPOTHESES = ("towards", "away", "no_sequence")


@numba.njit(cache=True)
def _emission(posterior, level_of_bin, inv_count, n_levels, stray_p, out):
    """The bin's likelihood over the distance levels of one zone, into ``out`` (L,); False if it has no mass."""
    out[:] = 0.0
    total = 0.0
    n_grid = 0
    for x in range(posterior.size):
        lv = level_of_bin[x]
        if lv >= 0:
            out[lv] += posterior[x]
            total += posterior[x]
            n_grid += 1
    if not total > 0.0:
        return False
    floor = stray_p * total / n_grid
    for lv in range(n_levels):
        out[lv] = (1.0 - stray_p) * out[lv] * inv_count[lv] + floor
    return True


@numba.njit(cache=True)
def _predict_shift(alpha, n_levels, step_p, step_lo, sign, out):
    """``out[j] = sum_k alpha[j - sign (step_lo + k)] step_p[k]`` over the grid; moves off it are lost."""
    out[:n_levels] = 0.0
    for k in range(step_p.size):
        off = sign * (step_lo + k)
        p = step_p[k]
        if p == 0.0:
            continue
        j0 = max(0, off)
        j1 = min(n_levels, n_levels + off)
        for j in range(j0, j1):
            out[j] += p * alpha[j - off]


@numba.njit(cache=True)
def _against_the_rest(h, o1, o2):
    """``h - log((exp(o1) + exp(o2)) / 2)``: log odds of one hypothesis against the other two, even priors."""
    if math.isnan(h) or math.isnan(o1) or math.isnan(o2):
        return math.nan
    m = max(o1, o2)
    if m == -math.inf:
        return math.nan if h == -math.inf else math.inf
    return h - (m + math.log(math.exp(o1 - m) + math.exp(o2 - m)) - math.log(2.0))


@numba.njit(cache=True)
def sequence_step(posterior, observed, predict, level_of_bin, inv_count, start, n_levels, stray_p,
                  step_p, step_lo, stay_p, stay_weight, alpha, log_lik, log_odds, scratch):
    """Advance every zone's three forward filters by one content bin, in place.

    Parameters
    ----------
    posterior : ndarray of float64, shape (n_bins,)
        The bin's posterior over positions with the uniform prior (its likelihood, normalised).
    observed : bool
        False: the bin's spikes are left out (too few); time passes, no evidence is added.
    predict : bool
        False for an event's first bin: the forward vectors hold the start distribution.
    level_of_bin : ndarray of int64, shape (n_zones, n_bins)
        Each position's distance level to each zone; -1 off the grid.
    inv_count : ndarray of float64, shape (n_zones, L)
        1 / positions at each level (0 where none).
    start : ndarray of float64, shape (n_zones, L)
        The distribution of the distance under the uniform prior over positions; also where a jump lands.
    n_levels : ndarray of int64, shape (n_zones,)
        Each zone's levels (the rest of the L columns are padding).
    stray_p : float
        Probability that a bin's posterior is unrelated to the sequence (a uniform share of its likelihood).
    step_p : ndarray of float64, shape (K,)
        Probability of a move of ``-(step_lo + k)`` levels towards the zone (mirrored for away).
    step_lo : int
        Levels of the smallest move in ``step_p`` (negative: towards).
    stay_p : ndarray of float64, shape (2 m + 1,)
        The no-sequence hypothesis's move from ``-m`` to ``+m`` levels when it stays.
    stay_weight : float
        Probability that the no-sequence hypothesis stays (else it jumps to ``start``).
    alpha : ndarray of float64, shape (n_zones, 3, L)
        The normalised forward vectors (in/out).
    log_lik : ndarray of float64, shape (n_zones, 3)
        Each hypothesis's log-likelihood so far (in/out; -inf once a hypothesis cannot explain the bins).
    log_odds : ndarray of float64, shape (2, n_zones)
        Out: the log odds of towards (row 0) and of away (row 1) against the other two, even prior odds
        (NaN where no hypothesis explains the bins).
    scratch : ndarray of float64, shape (2, L)
    """
    m = (stay_p.size - 1) // 2
    emission = scratch[0]
    pred = scratch[1]
    for z in range(level_of_bin.shape[0]):
        n = n_levels[z]
        if observed:
            if not _emission(posterior, level_of_bin[z], inv_count[z], n, stray_p, emission):
                emission[:n] = 1.0
        else:
            emission[:n] = 1.0
        for h in range(3):
            a = alpha[z, h]
            if not predict:
                pred[:n] = a[:n]
            elif h == 0:
                _predict_shift(a, n, step_p, step_lo, 1, pred)
            elif h == 1:
                _predict_shift(a, n, step_p, step_lo, -1, pred)
            else:
                _predict_shift(a, n, stay_p, -m, 1, pred)
                mass = 0.0
                for j in range(n):
                    mass += a[j]
                for j in range(n):
                    pred[j] = stay_weight * pred[j] + (1.0 - stay_weight) * mass * start[z, j]
            c = 0.0
            for j in range(n):
                pred[j] *= emission[j]
                c += pred[j]
            if c > 0.0 and math.isfinite(log_lik[z, h]):
                for j in range(n):
                    a[j] = pred[j] / c
                log_lik[z, h] += math.log(c)
            else:
                log_lik[z, h] = -math.inf
        log_odds[0, z] = _against_the_rest(log_lik[z, 0], log_lik[z, 1], log_lik[z, 2])
        log_odds[1, z] = _against_the_rest(log_lik[z, 1], log_lik[z, 0], log_lik[z, 2])


def sequence_step_numpy(posterior, observed, predict, level_of_bin, inv_count, start, n_levels, stray_p,
                        step_p, step_lo, stay_p, stay_weight, alpha, log_lik, log_odds, scratch):
    """The numpy twin of :func:`sequence_step`: the same arguments, the same result."""
    m = (stay_p.size - 1) // 2
    for z in range(level_of_bin.shape[0]):
        n = int(n_levels[z])
        emission = np.ones(n)
        if observed:
            on = level_of_bin[z] >= 0
            total = posterior[on].sum()
            if total > 0:
                summed = np.bincount(level_of_bin[z][on], weights=posterior[on], minlength=n)[:n]
                emission = (1.0 - stray_p) * summed * inv_count[z, :n] + stray_p * total / np.count_nonzero(on)
        for h in range(3):
            a = alpha[z, h, :n]
            if not predict:
                pred = a.copy()
            else:
                kernel, lo, sign = ((step_p, step_lo, 1), (step_p, step_lo, -1), (stay_p, -m, 1))[h]
                pred = np.zeros(n)
                for k, p in enumerate(kernel):
                    off = sign * (lo + k)
                    if off >= 0:
                        pred[off:] += p * a[:n - off] if off < n else 0.0
                    else:
                        pred[:n + off] += p * a[-off:] if -off < n else 0.0
                if h == 2:
                    pred = stay_weight * pred + (1.0 - stay_weight) * a.sum() * start[z, :n]
            pred = pred * emission
            c = pred.sum()
            if c > 0 and np.isfinite(log_lik[z, h]):
                alpha[z, h, :n] = pred / c
                log_lik[z, h] += np.log(c)
            else:
                log_lik[z, h] = -np.inf
        for row, (h, o1, o2) in enumerate(((0, 1, 2), (1, 0, 2))):
            mine, rest = log_lik[z, h], np.logaddexp(log_lik[z, o1], log_lik[z, o2]) - np.log(2.0)
            both_impossible = mine == -np.inf and rest == -np.inf
            log_odds[row, z] = np.nan if both_impossible or np.isnan(mine + rest) else mine - rest
