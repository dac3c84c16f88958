"""Numerical kernels of the Bayesian decoder, each with a plain numpy twin.

Every kernel ``name`` is compiled with numba and has a twin ``name_numpy``
with the same signature and the same result. Tests use the twins as the
reference; ``bench/decoder.py`` uses them as the baseline. Kernels write into
caller-owned ``out`` (and ``scratch``) arrays so that the decoding loop
allocates nothing large per step; a twin takes the same arguments even where
numpy needs no scratch space, so that the two are interchangeable.

Bins are flattened as in ``decoder.environments`` (row-major for a grid:
``bin = iy * nx + ix``). Posterior vectors hold exactly 0 outside the valid
bins.
"""

from __future__ import annotations

import math

import numba
import numpy as np

#: A bin whose log-likelihood lies this far below the best valid bin gets
#: weight exactly 0: exp(-700) ~ 1e-304 is below anything a posterior can
#: resolve, and skipping it keeps subnormal numbers out of the arithmetic.
LOG_WEIGHT_FLOOR = -700.0

#: Normalised posterior values below this are stored as 0, for the same reason.
PROB_FLOOR = 1e-300

#: If prior times likelihood (scaled so that the best valid bin has
#: likelihood 1) sums to less than this, the prior has no mass where the
#: spikes point and the product has underflowed; the caller must fall back.
MIN_EVIDENCE = 1e-300

#: Bins per block of ``poisson_log_likelihood`` (8 KiB of float64).
_LIKELIHOOD_BLOCK = 1024

#: Value buckets per refinement pass of ``hpd_size``.
_HPD_BUCKETS = 256

#: Below this many candidates ``hpd_size`` sorts instead of bucketing.
_HPD_SORT_BELOW = 32


# ---------------------------------------------------------------------------
# Scalar helpers the compiler can vectorise
# ---------------------------------------------------------------------------

# numba calls the C library's scalar exp, which no loop can vectorise (there
# is no vector maths library without SVML), and a plain float sum is a chain
# of dependent additions. Over 10,000 bins the two helpers below are about 3x
# and 8x faster. The exp is the textbook one: d = k ln2 + r with
# |r| <= ln2 / 2 (Cody & Waite 1980, Software Manual for the Elementary
# Functions, Prentice-Hall, with ln2 split in two parts so that k ln2 is
# exact), a degree-13 Taylor polynomial for exp(r) (truncation error below
# 1e-17) and 2^k from a table; tests check it against numpy.exp.

_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_INV_LN2 = 1.44269504088896338700e00
#: 2^-k for k = 0 .. 1010: exp(LOG_WEIGHT_FLOOR) needs k up to 1010, still a normal double.
_POW2_NEG = 2.0 ** -np.arange(1011.0)
_C2, _C3, _C4, _C5, _C6, _C7, _C8, _C9, _C10, _C11, _C12, _C13 = (1.0 / math.factorial(k) for k in range(2, 14))


@numba.njit(cache=True)
def _exp_nonpositive(d):
    """``exp(d)`` for ``LOG_WEIGHT_FLOOR <= d <= 0``, to 1 ulp, in vectorisable form.

    Parameters
    ----------
    d : float

    Returns
    -------
    float
    """
    k = math.floor(d * _INV_LN2 + 0.5)
    r = (d - k * _LN2_HI) - k * _LN2_LO
    p = _C13 * r + _C12
    p = p * r + _C11
    p = p * r + _C10
    p = p * r + _C9
    p = p * r + _C8
    p = p * r + _C7
    p = p * r + _C6
    p = p * r + _C5
    p = p * r + _C4
    p = p * r + _C3
    p = p * r + _C2
    p = (p * r + 1.0) * r + 1.0
    return p * _POW2_NEG[int(-k)]


@numba.njit(cache=True, fastmath={"reassoc"})
def _sum(a):
    # Reassociation lets the compiler keep several partial sums in vector
    # registers; the result differs from a left-to-right sum by rounding only.
    s = 0.0
    for j in range(a.shape[0]):
        s += a[j]
    return s


@numba.njit(cache=True, fastmath={"reassoc"})
def _dot(a, b):
    s = 0.0
    for j in range(a.shape[0]):
        s += a[j] * b[j]
    return s


# ---------------------------------------------------------------------------
# Input check
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def first_bad_entry(fired_rows, fired_counts, n_units, max_count):
    """Index of the first entry that is not a valid (row, spike count) pair.

    One pass instead of half a dozen numpy calls: the check runs on every
    decoded window.

    Parameters
    ----------
    fired_rows : ndarray, shape (k,), int64
    fired_counts : ndarray, shape (k,), float64
    n_units : int
        Rows must lie in ``0 .. n_units - 1``.
    max_count : float
        Counts must be whole numbers in ``[0, max_count)``; NaN fails.

    Returns
    -------
    int
        The first offending index, or -1 when every entry is valid.
    """
    for i in range(fired_rows.shape[0]):
        r = fired_rows[i]
        c = fired_counts[i]
        if r < 0 or r >= n_units or not (c >= 0.0 and c < max_count and c == math.floor(c)):
            return i
    return -1


def first_bad_entry_numpy(fired_rows, fired_counts, n_units, max_count):
    """Numpy twin of :func:`first_bad_entry`."""
    c = fired_counts
    ok = (fired_rows >= 0) & (fired_rows < n_units) & (c >= 0) & (c < max_count) & (c == np.floor(c))
    bad = np.flatnonzero(~ok)
    return int(bad[0]) if bad.size else -1


# ---------------------------------------------------------------------------
# Poisson log-likelihood
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def poisson_log_likelihood(fired_rows, fired_counts, log_rate, expected_total, out):
    """Log-likelihood of every bin for one window of spike counts.

    Under the independent-Poisson model the log-likelihood of position ``x``
    is ``sum_i n_i log(lambda_i(x)) - W sum_i lambda_i(x)`` up to terms that do
    not depend on ``x`` (``-sum_i log n_i!`` and ``sum_i n_i log W``). Only the
    units that fired are touched; the silent units enter through
    ``expected_total``.

    Parameters
    ----------
    fired_rows : ndarray, shape (k,), int64
        Model rows of the units that fired in the window; repeats add up.
    fired_counts : ndarray, shape (k,), float64
        Spike counts of those units in the window.
    log_rate : ndarray, shape (n_units, n_bins), float64, C-contiguous
        Natural log of each unit's rate map in Hz (finite everywhere).
    expected_total : ndarray, shape (n_bins,), float64
        ``window_s * sum_i lambda_i(x)``, the expected spike count of the
        whole population in the window at each bin.
    out : ndarray, shape (n_bins,), float64
        Receives the log-likelihood; finite wherever the inputs are.

    Returns
    -------
    out : ndarray, shape (n_bins,)

    References
    ----------
    Zhang K, Ginzburg I, McNaughton BL, Sejnowski TJ (1998). Interpreting
    neuronal population activity by reconstruction: unified framework with
    application to hippocampal place cells. J Neurophysiol 79:1017-1044.
    """
    n_bins = out.shape[0]
    n_fired = fired_rows.shape[0]
    # Bins are done in blocks small enough for the output block to stay in L1
    # cache while the fired rows stream past it, four rows per sweep; this
    # halves the time of the plain row-by-row loop at 10,000 bins.
    for j0 in range(0, n_bins, _LIKELIHOOD_BLOCK):
        j1 = min(j0 + _LIKELIHOOD_BLOCK, n_bins)
        o = out[j0:j1]
        e = expected_total[j0:j1]
        for j in range(j1 - j0):
            o[j] = -e[j]
        k = 0
        while k + 4 <= n_fired:
            r0 = log_rate[fired_rows[k], j0:j1]
            r1 = log_rate[fired_rows[k + 1], j0:j1]
            r2 = log_rate[fired_rows[k + 2], j0:j1]
            r3 = log_rate[fired_rows[k + 3], j0:j1]
            n0 = fired_counts[k]
            n1 = fired_counts[k + 1]
            n2 = fired_counts[k + 2]
            n3 = fired_counts[k + 3]
            for j in range(j1 - j0):
                o[j] += n0 * r0[j] + n1 * r1[j] + n2 * r2[j] + n3 * r3[j]
            k += 4
        while k < n_fired:
            r0 = log_rate[fired_rows[k], j0:j1]
            n0 = fired_counts[k]
            for j in range(j1 - j0):
                o[j] += n0 * r0[j]
            k += 1
    return out


def poisson_log_likelihood_numpy(fired_rows, fired_counts, log_rate, expected_total, out):
    """Numpy twin of :func:`poisson_log_likelihood`."""
    out[:] = fired_counts @ log_rate[fired_rows] - expected_total
    return out


# ---------------------------------------------------------------------------
# Normalisation to a posterior
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def posterior_from_log(log_like, prior, valid, out):
    """Normalise ``prior * exp(log_like)`` over the valid bins.

    The log-likelihood is shifted by its maximum over the valid bins before
    exponentiation (the log-sum-exp device), so no weight overflows. Weights
    more than ``-LOG_WEIGHT_FLOOR`` nats below the best bin, and normalised
    values below ``PROB_FLOOR``, are set to 0.

    Parameters
    ----------
    log_like : ndarray, shape (n_bins,), float64
        Log-likelihood up to a constant, finite.
    prior : ndarray, shape (n_bins,), float64
        Prior weights, non-negative, in any scale (normalisation divides it out).
    valid : ndarray, shape (n_bins,), bool
        Bins the animal can occupy; at least one must be True.
    out : ndarray, shape (n_bins,), float64
        Receives the posterior: sums to 1, exactly 0 outside ``valid``.

    Returns
    -------
    ok : bool
        False when the prior has (numerically) no mass where the likelihood
        is: the scaled evidence fell below ``MIN_EVIDENCE``. ``out`` is then
        meaningless and the caller must use another prior.
    """
    n_bins = out.shape[0]
    best = -np.inf
    for j in range(n_bins):
        if valid[j] and log_like[j] > best:
            best = log_like[j]
    # Branch-free so that the loop vectorises: the floor is applied after the
    # exp, which is evaluated on a clamped argument.
    for j in range(n_bins):
        d = log_like[j] - best
        e = _exp_nonpositive(max(d, LOG_WEIGHT_FLOOR))
        out[j] = prior[j] * e if (valid[j] and d > LOG_WEIGHT_FLOOR) else 0.0
    total = _sum(out)
    if not total >= MIN_EVIDENCE:
        return False
    inv = 1.0 / total
    for j in range(n_bins):
        v = out[j] * inv
        out[j] = v if v >= PROB_FLOOR else 0.0
    return True


def posterior_from_log_numpy(log_like, prior, valid, out):
    """Numpy twin of :func:`posterior_from_log`."""
    best = log_like[valid].max()
    d = np.where(valid, log_like - best, -np.inf)
    keep = d > LOG_WEIGHT_FLOOR
    # Products of two small numbers may underflow to 0, which is the intent.
    with np.errstate(under="ignore"):
        w = np.where(keep, prior * np.exp(np.maximum(d, LOG_WEIGHT_FLOOR)), 0.0)
        total = w.sum()
        if not total >= MIN_EVIDENCE:
            return False
        v = w / total
    out[:] = np.where(v >= PROB_FLOOR, v, 0.0)
    return True


# ---------------------------------------------------------------------------
# Random-walk prediction
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def convolve_separable(values, ny, nx, kernel_1d, out, scratch):
    """Convolve a grid with a symmetric separable kernel, zero outside the grid.

    Parameters
    ----------
    values : ndarray, shape (ny * nx,), float64
        Grid values, row-major; may be the same array as ``out``.
    ny, nx : int
        Grid shape.
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        Symmetric 1-D kernel applied along y and then along x.
    out, scratch : ndarray, shape (ny * nx,), float64
        ``out`` receives the result; ``scratch`` is overwritten.

    Returns
    -------
    out : ndarray, shape (ny * nx,)
    """
    r = kernel_1d.shape[0] // 2
    grid = values.reshape((ny, nx))
    along_y = scratch.reshape((ny, nx))
    result = out.reshape((ny, nx))
    # A posterior is mostly zero far from its peak; rows that are zero
    # throughout are skipped in both passes.
    row_nonzero = np.zeros(ny, dtype=np.bool_)
    for iy in range(ny):
        row = grid[iy]
        for ix in range(nx):
            if row[ix] != 0.0:
                row_nonzero[iy] = True
                break
    # The y pass reads whole rows and the x pass works on a zero-padded copy
    # of one row, so every inner loop runs over contiguous memory with no
    # bounds tests and vectorises; ``values`` is consumed by the y pass.
    along_y_nonzero = np.zeros(ny, dtype=np.bool_)
    for iy in range(ny):
        dst = along_y[iy]
        dst[:] = 0.0
        for src in range(max(0, iy - r), min(ny, iy + r + 1)):
            if not row_nonzero[src]:
                continue
            along_y_nonzero[iy] = True
            w = kernel_1d[src - iy + r]
            src_row = grid[src]
            for ix in range(nx):
                dst[ix] += w * src_row[ix]
    padded = np.zeros(nx + 2 * r)
    for iy in range(ny):
        dst = result[iy]
        dst[:] = 0.0
        if not along_y_nonzero[iy]:
            continue
        padded[r : r + nx] = along_y[iy]
        for k in range(2 * r + 1):
            w = kernel_1d[k]
            for ix in range(nx):
                dst[ix] += w * padded[ix + k]
    return out


def convolve_separable_numpy(values, ny, nx, kernel_1d, out, scratch):
    """Numpy twin of :func:`convolve_separable` (``scratch`` is not needed)."""
    r = kernel_1d.shape[0] // 2
    grid = np.pad(values.reshape(ny, nx), r)
    # Far tails of a posterior times kernel tails may underflow to 0, harmlessly.
    with np.errstate(under="ignore"):
        along_y = sum(w * grid[k : k + ny, :] for k, w in enumerate(kernel_1d))
        along_x = sum(w * along_y[:, k : k + nx] for k, w in enumerate(kernel_1d))
    out[:] = along_x.ravel()
    return out


@numba.njit(cache=True)
def predict_grid(p, ny, nx, kernel_1d, mask_f, inv_norm, out, scratch):
    """One random-walk step on a grid arena: ``mask * conv(p / conv(mask))``.

    This applies the transition ``T[i, j] = K(i, j) m_j / sum_k K(i, k) m_k``
    (from bin ``i`` to bin ``j``) without forming it: ``K`` is the separable
    kernel, ``m`` the valid-bin mask, and ``inv_norm = 1 / conv(m)`` on valid
    bins (0 elsewhere) is precomputed.

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Current posterior, 0 outside the valid bins.
    ny, nx : int
        Grid shape.
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        Sampled 1-D Gaussian of the random walk.
    mask_f : ndarray, shape (ny * nx,), float64
        1.0 on valid bins, 0.0 elsewhere.
    inv_norm : ndarray, shape (ny * nx,), float64
        ``1 / conv(mask_f)`` on valid bins, 0 elsewhere.
    out, scratch : ndarray, shape (ny * nx,), float64
        ``out`` receives the prediction (sums to ``p.sum()``); ``scratch``
        is overwritten.

    Returns
    -------
    out : ndarray, shape (ny * nx,)
    """
    n = ny * nx
    for i in range(n):
        out[i] = p[i] * inv_norm[i]
    convolve_separable(out, ny, nx, kernel_1d, out, scratch)
    for i in range(n):
        out[i] *= mask_f[i]
    return out


def predict_grid_numpy(p, ny, nx, kernel_1d, mask_f, inv_norm, out, scratch):
    """Numpy twin of :func:`predict_grid`."""
    with np.errstate(under="ignore"):
        convolve_separable_numpy(p * inv_norm, ny, nx, kernel_1d, out, scratch)
        out *= mask_f
    return out


@numba.njit(cache=True)
def predict_dense(p, transition, out):
    """One random-walk step with an explicit transition matrix: ``p @ T``.

    Parameters
    ----------
    p : ndarray, shape (n_bins,), float64
        Current posterior.
    transition : ndarray, shape (n_bins, n_bins), float64, C-contiguous
        ``transition[i, j]`` is the probability of moving from bin ``i`` to
        bin ``j`` in one step.
    out : ndarray, shape (n_bins,), float64
        Receives the prediction.

    Returns
    -------
    out : ndarray, shape (n_bins,)
    """
    n = out.shape[0]
    for j in range(n):
        out[j] = 0.0
    for i in range(n):
        w = p[i]
        if w == 0.0:
            continue
        row = transition[i]
        for j in range(n):
            out[j] += w * row[j]
    return out


def predict_dense_numpy(p, transition, out):
    """Numpy twin of :func:`predict_dense`."""
    with np.errstate(under="ignore"):
        out[:] = p @ transition
    return out


# ---------------------------------------------------------------------------
# Posterior summaries
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def hpd_size(p, mass, scratch):
    """Number of bins in the highest-posterior-density region of ``mass``.

    The region is the superlevel set ``{j : p_j >= t}`` for the largest
    threshold ``t`` whose set holds at least ``mass`` of the total; bins tied
    at the threshold are all included (a posterior uniform over ``m`` bins
    gives ``m``). The threshold is found by repeated bucketing of the
    candidate values rather than a full sort, so the cost is a few passes
    over the non-zero bins.

    Parameters
    ----------
    p : ndarray, shape (n_bins,), float64
        Non-negative weights (normally a posterior).
    mass : float
        Probability mass of the region, in (0, 1].
    scratch : ndarray, shape (n_bins,), float64
        Overwritten.

    Returns
    -------
    n : int
        Number of bins in the region.

    References
    ----------
    Box GEP, Tiao GC (1973). Bayesian Inference in Statistical Analysis.
    Addison-Wesley (highest posterior density regions).
    """
    n_c = 0
    total = 0.0
    lo = np.inf
    hi = 0.0
    for v in p:
        if v > 0.0:
            scratch[n_c] = v
            n_c += 1
            total += v
            lo = min(lo, v)
            hi = max(hi, v)
    target = mass * total
    acc_mass = 0.0
    acc_count = 0
    bucket_mass = np.empty(_HPD_BUCKETS)
    bucket_count = np.empty(_HPD_BUCKETS, dtype=np.int64)
    while n_c > 0:
        if lo == hi:
            return acc_count + n_c
        scale = _HPD_BUCKETS / (hi - lo)
        # Few candidates left, or values so close that the bucket scale overflows: sort them.
        if n_c < _HPD_SORT_BELOW or not math.isfinite(scale):
            vals = np.sort(scratch[:n_c])[::-1]
            cum = acc_mass
            for i in range(n_c):
                cum += vals[i]
                if cum >= target:
                    t = vals[i]
                    n_in = 0
                    for v in vals:
                        if v >= t:
                            n_in += 1
                    return acc_count + n_in
            return acc_count + n_c
        bucket_mass[:] = 0.0
        bucket_count[:] = 0
        for i in range(n_c):
            v = scratch[i]
            b = min(int((v - lo) * scale), _HPD_BUCKETS - 1)
            bucket_mass[b] += v
            bucket_count[b] += 1
        crossing = -1
        for b in range(_HPD_BUCKETS - 1, -1, -1):
            if acc_mass + bucket_mass[b] >= target:
                crossing = b
                break
            acc_mass += bucket_mass[b]
            acc_count += bucket_count[b]
        if crossing < 0:
            # Rounding left the whole set just short of ``target``.
            return acc_count
        n_next = 0
        lo_next = np.inf
        hi_next = 0.0
        for i in range(n_c):
            v = scratch[i]
            if min(int((v - lo) * scale), _HPD_BUCKETS - 1) == crossing:
                scratch[n_next] = v
                n_next += 1
                lo_next = min(lo_next, v)
                hi_next = max(hi_next, v)
        n_c = n_next
        lo = lo_next
        hi = hi_next
    return acc_count


def hpd_size_numpy(p, mass, scratch):
    """Numpy twin of :func:`hpd_size`, by a full sort (``scratch`` is not needed)."""
    desc = np.sort(p[p > 0.0])[::-1]
    cum = np.cumsum(desc)
    i = min(int(np.searchsorted(cum, mass * cum[-1], side="left")), desc.size - 1)
    return int(np.count_nonzero(p >= desc[i]))


@numba.njit(cache=True)
def posterior_summary(p, centers_x_cm, centers_y_cm):
    """Maximum a posteriori bin, its probability and the posterior mean.

    Parameters
    ----------
    p : ndarray, shape (n_bins,), float64
        Posterior (sums to 1).
    centers_x_cm, centers_y_cm : ndarray, shape (n_bins,), float64
        Bin centres.

    Returns
    -------
    map_bin : int
        First bin of highest probability.
    peak_prob : float
    mean_x_cm, mean_y_cm : float
    """
    best = 0
    peak = -1.0
    for j in range(p.shape[0]):
        if p[j] > peak:
            peak = p[j]
            best = j
    return best, peak, _dot(p, centers_x_cm), _dot(p, centers_y_cm)


def posterior_summary_numpy(p, centers_x_cm, centers_y_cm):
    """Numpy twin of :func:`posterior_summary`."""
    best = int(np.argmax(p))
    return best, float(p[best]), float(p @ centers_x_cm), float(p @ centers_y_cm)


@numba.njit(cache=True)
def zone_mass(p, zone_start, zone_bins, out):
    """Posterior mass inside each zone.

    Parameters
    ----------
    p : ndarray, shape (n_bins,), float64
        Posterior.
    zone_start : ndarray, shape (n_zones + 1,), int64
        Zone ``z`` owns ``zone_bins[zone_start[z]:zone_start[z + 1]]``.
    zone_bins : ndarray, shape (total,), int64
        Bin indices of all zones, concatenated.
    out : ndarray, shape (n_zones,), float64
        Receives the masses.

    Returns
    -------
    out : ndarray, shape (n_zones,)
    """
    for z in range(out.shape[0]):
        s = 0.0
        for i in range(zone_start[z], zone_start[z + 1]):
            s += p[zone_bins[i]]
        out[z] = s
    return out


def zone_mass_numpy(p, zone_start, zone_bins, out):
    """Numpy twin of :func:`zone_mass`."""
    for z in range(out.shape[0]):
        out[z] = p[zone_bins[zone_start[z] : zone_start[z + 1]]].sum()
    return out
