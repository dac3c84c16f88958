"""Numerical kernels of the Bayesian decoder, each with a plain numpy twin.

Every kernel ``name`` is compiled with numba and has a twin ``name_numpy``
with the same signature and the same result. Tests use the twins as the
reference; ``bench/decoder.py`` uses them as the baseline. Four steps of the
decoding have a numpy form only (``poisson_log_likelihood_numpy``,
``predict_grid_numpy``, ``posterior_from_log_numpy``,
``posterior_summary_numpy``): production runs them fused inside
:func:`decode_step`, and they stay as the parts of its twin, each checked
against an outside reference. Kernels write into
caller-owned ``out`` (and ``scratch``) arrays so that the decoding loop
allocates nothing large per step but the posterior it hands out; a twin takes
the same arguments even where numpy needs no scratch space, so that the two
are interchangeable.

:func:`decode_step` is what the decoder calls: one window from check to
summaries in one call, with the arithmetic of the separate steps and an
incremental log-likelihood. Its twin composes the separate twins.

Bins are flattened as in ``decoder.space.environments`` (row-major for a grid:
``bin = iy * nx + ix``). Posterior vectors hold exactly 0 outside the valid
bins.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba.core import types
from numba.extending import intrinsic

#: A bin whose log-likelihood lies this far below the best valid bin gets
#: weight exactly 0: exp(-700) ~ 1e-304 is below anything a posterior can
#: resolve, and skipping it keeps subnormal numbers out of the arithmetic.
LOG_WEIGHT_FLOOR = -700.0

#: Normalised posterior values below this are stored as 0, for the same reason.
PROB_FLOOR = 1e-300

#: With a uniform jump of weight ``eps`` in the prior, posterior values below
#: ``UNIFORM_CUTOFF * eps / n_valid`` are stored as 0, so that the next
#: prediction and the summaries cover only the rows where the posterior
#: lives rather than the whole arena. The mass dropped is at most
#: ``UNIFORM_CUTOFF * eps`` per step, a thousandth of what the jump spreads
#: over the bins at the next step; since every valid bin's prior holds at
#: least ``eps / n_valid`` from the jump, no prior value moves by more than
#: a relative ~``UNIFORM_CUTOFF`` (tests/test_decoding.py compares the step
#: with the reference filter, ``decoder.inference.filtering``).
UNIFORM_CUTOFF = 1e-3

#: If prior times likelihood (scaled so that the best valid bin has
#: likelihood 1) sums to less than this, the prior has no mass where the
#: spikes point and the product has underflowed; the caller must fall back.
MIN_EVIDENCE = 1e-300

#: Bins per block of the log-likelihood sums (8 KiB of float64).
_LIKELIHOOD_BLOCK = 1024

#: Value buckets per refinement pass of ``hpd_size``.
_HPD_BUCKETS = 256

#: Below this many candidates ``hpd_size`` sorts instead of bucketing.
_HPD_SORT_BELOW = 32

#: Each pass of ``hpd_size`` gathers the values within this factor below
#: those of the previous pass (the first: below the peak).
_HPD_GATHER_FACTOR = 2.0**-8


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
# 1e-17) evaluated with fused multiply-adds where the CPU has them, and 2^k
# built from its IEEE 754 bits (a table lookup would be a gather, slow in
# vector code); tests check it against numpy.exp.

_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_INV_LN2 = 1.44269504088896338700e00
_C2, _C3, _C4, _C5, _C6, _C7, _C8, _C9, _C10, _C11, _C12, _C13 = (1.0 / math.factorial(k) for k in range(2, 14))


@intrinsic
def _float_from_bits(typingctx, bits):
    """The float64 whose IEEE 754 bit pattern is the int64 ``bits``."""
    if bits != types.int64:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.float64))

    return types.float64(types.int64), codegen


@intrinsic
def _bits_of_float(typingctx, x):
    """The int64 with the IEEE 754 bit pattern of the float64 ``x``."""
    if x != types.float64:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))

    return types.int64(types.float64), codegen


@numba.njit(cache=True, fastmath={"contract"})
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
    # 2^k with -1010 <= k <= 0 (exp(LOG_WEIGHT_FLOOR) needs k down to -1010):
    # biased exponent 1023 + k >= 13, a normal double with a zero mantissa.
    return p * _float_from_bits(np.int64(1023 + int(k)) << 52)


@numba.njit(cache=True, fastmath={"reassoc"})
def _sum(a):
    # Reassociation lets the compiler keep several partial sums in vector
    # registers; the result differs from a left-to-right sum by rounding only.
    s = 0.0
    for j in range(a.shape[0]):
        s += a[j]
    return s


# Loops below index with range() rather than iterate over an array: numba
# vectorises the former only. No flag makes it vectorise a float maximum, but
# an integer one vectorises: non-negative doubles order like their bit
# patterns read as int64, and flipping the magnitude bits of negative ones
# extends that order to every double but NaN.

_MAGNITUDE_BITS = np.int64(0x7FFFFFFFFFFFFFFF)
_SMALLEST_INT64 = np.iinfo(np.int64).min


@numba.njit(cache=True)
def _max_nonnegative(a):
    """Largest value of a non-empty array of non-negative doubles (no NaN)."""
    m = np.int64(0)
    for j in range(a.shape[0]):
        m = max(m, _bits_of_float(a[j]))
    return _float_from_bits(m)


@numba.njit(cache=True)
def _max_where(a, keep):
    """Largest ``a[j]`` with ``keep[j]`` (no NaN; at least one ``keep``)."""
    m = _SMALLEST_INT64
    for j in range(a.shape[0]):
        b = _bits_of_float(a[j])
        key = b ^ ((b >> 63) & _MAGNITUDE_BITS)
        m = max(m, key if keep[j] else _SMALLEST_INT64)
    return _float_from_bits(m ^ ((m >> 63) & _MAGNITUDE_BITS))


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
def _add_weighted_rows(out, log_rate, rows, weights, n):
    """``out += sum_k weights[k] * log_rate[rows[k]]`` over the first ``n`` entries.

    Bins are done in blocks small enough for the output block to stay in L1
    cache while the rows stream past it, four rows per sweep; this halves the
    time of the plain row-by-row loop at 10,000 bins. Each bin receives its
    terms in the order of ``rows``.
    """
    n_bins = out.shape[0]
    for j0 in range(0, n_bins, _LIKELIHOOD_BLOCK):
        j1 = min(j0 + _LIKELIHOOD_BLOCK, n_bins)
        o = out[j0:j1]
        k = 0
        while k + 4 <= n:
            r0 = log_rate[rows[k], j0:j1]
            r1 = log_rate[rows[k + 1], j0:j1]
            r2 = log_rate[rows[k + 2], j0:j1]
            r3 = log_rate[rows[k + 3], j0:j1]
            n0 = weights[k]
            n1 = weights[k + 1]
            n2 = weights[k + 2]
            n3 = weights[k + 3]
            for j in range(j1 - j0):
                o[j] += n0 * r0[j] + n1 * r1[j] + n2 * r2[j] + n3 * r3[j]
            k += 4
        while k < n:
            r0 = log_rate[rows[k], j0:j1]
            n0 = weights[k]
            for j in range(j1 - j0):
                o[j] += n0 * r0[j]
            k += 1


def poisson_log_likelihood_numpy(fired_rows, fired_counts, log_rate, expected_total, out):
    """Log-likelihood of every bin for one window of spike counts (a step of :func:`decode_step_numpy`).

    Under the independent-Poisson model the log-likelihood of position ``x``
    is ``sum_i n_i log(lambda_i(x)) - W sum_i lambda_i(x)`` up to terms that do
    not depend on ``x`` (``-sum_i log n_i!`` and ``sum_i n_i log W``). Only the
    units that fired are touched; the silent units enter through
    ``expected_total``. :func:`decode_step` computes the same sums in place,
    updated from the previous window's.

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
    out[:] = fired_counts @ log_rate[fired_rows] - expected_total
    return out


# ---------------------------------------------------------------------------
# Normalisation to a posterior
# ---------------------------------------------------------------------------


def posterior_from_log_numpy(log_like, prior, valid, out, prob_floor=PROB_FLOOR):
    """Normalise ``prior * exp(log_like)`` over the valid bins (a step of :func:`decode_step_numpy`).

    The log-likelihood is shifted by its maximum over the valid bins before
    exponentiation (the log-sum-exp device), so no weight overflows. Weights
    more than ``-LOG_WEIGHT_FLOOR`` nats below the best bin, and normalised
    values below ``prob_floor``, are set to 0.

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
    prob_floor : float, default ``PROB_FLOOR``
        Normalised values below it are stored as 0 (see ``UNIFORM_CUTOFF``).

    Returns
    -------
    ok : bool
        False when the prior has (numerically) no mass where the likelihood
        is: the scaled evidence fell below ``MIN_EVIDENCE``. ``out`` is then
        meaningless and the caller must use another prior.
    """
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
    out[:] = np.where(v >= prob_floor, v, 0.0)
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
def _support_rows(p, nx, y0, y1):
    """First and last grid row holding a non-zero value of ``p``, among rows ``y0..y1``.

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Row-major grid values.
    nx : int
    y0, y1 : int
        Rows searched, inclusive.

    Returns
    -------
    y0, y1 : int
        Inclusive; ``y1 < y0`` when every row searched is zero.
    """
    while y0 <= y1 and not _any_nonzero(p[y0 * nx : (y0 + 1) * nx]):
        y0 += 1
    while y1 > y0 and not _any_nonzero(p[y1 * nx : (y1 + 1) * nx]):
        y1 -= 1
    return y0, y1


@numba.njit(cache=True)
def _any_nonzero(a):
    for j in range(a.shape[0]):
        if a[j] != 0.0:
            return True
    return False


@numba.njit(cache=True, fastmath={"contract"})
def _symmetric_filter(src, kernel_1d, step, dst):
    """``dst[j] = sum_k kernel_1d[k] * src[j + k * step]`` for a symmetric kernel.

    Taps ``k`` and ``2r - k`` share a weight, so they are added before the
    multiplication, and three pairs go in each sweep over ``dst``: a sixth
    of the loads and stores of one sweep per tap.

    Parameters
    ----------
    src : ndarray, shape (>= len(dst) + 2 * r * step,), float64
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        Symmetric: ``kernel_1d[k] == kernel_1d[2 * r - k]``.
    step : int
    dst : ndarray, float64
        Receives the result; must not overlap ``src``.
    """
    r = kernel_1d.shape[0] // 2
    n = dst.shape[0]
    centre = src[r * step : r * step + n]
    w = kernel_1d[r]
    for j in range(n):
        dst[j] = w * centre[j]
    k = 0
    while k + 3 <= r:
        a0 = src[k * step : k * step + n]
        b0 = src[(2 * r - k) * step : (2 * r - k) * step + n]
        a1 = src[(k + 1) * step : (k + 1) * step + n]
        b1 = src[(2 * r - k - 1) * step : (2 * r - k - 1) * step + n]
        a2 = src[(k + 2) * step : (k + 2) * step + n]
        b2 = src[(2 * r - k - 2) * step : (2 * r - k - 2) * step + n]
        w0 = kernel_1d[k]
        w1 = kernel_1d[k + 1]
        w2 = kernel_1d[k + 2]
        for j in range(n):
            dst[j] += w0 * (a0[j] + b0[j]) + w1 * (a1[j] + b1[j]) + w2 * (a2[j] + b2[j])
        k += 3
    while k < r:
        a0 = src[k * step : k * step + n]
        b0 = src[(2 * r - k) * step : (2 * r - k) * step + n]
        w0 = kernel_1d[k]
        for j in range(n):
            dst[j] += w0 * (a0[j] + b0[j])
        k += 1


@numba.njit(cache=True, fastmath={"contract"})
def _filter(src, kernel_1d, step, dst):
    """``dst[j] = sum_k kernel_1d[k] * src[j + k * step]``, any kernel (:func:`_symmetric_filter` for symmetric ones).

    Parameters
    ----------
    src : ndarray, shape (>= len(dst) + 2 * r * step,), float64
    kernel_1d : ndarray, shape (2 * r + 1,), float64
    step : int
    dst : ndarray, float64
        Receives the result; must not overlap ``src``.
    """
    n = dst.shape[0]
    w = kernel_1d[0]
    for j in range(n):
        dst[j] = w * src[j]
    for k in range(1, kernel_1d.shape[0]):
        a = src[k * step : k * step + n]
        w = kernel_1d[k]
        for j in range(n):
            dst[j] += w * a[j]


@numba.njit(cache=True)
def _predict_grid_rows(p, ny, nx, kernel_x, kernel_y, symmetric, mask_f, inv_norm, y0, y1, out, grid_scratch):
    """The random-walk step of :func:`predict_grid_numpy` for a ``p`` that is 0 outside rows ``y0..y1``.

    Only the rows ``y0 - r .. y1 + r`` (``r`` the kernel's reach) can receive
    mass; nothing of ``out`` outside them is written, and callers treat it
    as 0. The x pass runs first, on the rows of ``p`` only, the y pass then
    spreads them. Both work on copies of the grid padded with zeros (columns
    for the x pass, rows for the y pass), so that each is a few long loops
    over contiguous memory (shifted by single bins, or by whole padded rows)
    that vectorise, where loops over single rows would be too short to.

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Current posterior, 0 outside rows ``y0..y1`` and outside the valid
        bins. May be the same array as ``out``.
    ny, nx, mask_f, inv_norm
        As in :func:`predict_grid_numpy`; ``inv_norm`` is read on the
        non-zero bins of ``p`` only.
    kernel_x, kernel_y : ndarray, shape (2 * r + 1,), float64
        The walk along x and along y, as the filter takes them:
        ``kernel[k]`` weighs a move of ``r - k`` bins (for a symmetric
        kernel, the walk's own kernel; tilted ones from :func:`tilt_kernels`).
    symmetric : bool
        Both kernels symmetric: the filter adds paired taps first.
    y0, y1 : int
        Inclusive, ``0 <= y0 <= y1 < ny``.
    out : ndarray, shape (ny * nx,), float64
        Receives the prediction in the returned rows.
    grid_scratch : ndarray, shape (>= (2 * ny + 2 * r) * (nx + 2 * r),), float64
        Overwritten.

    Returns
    -------
    y0, y1 : int
        Inclusive rows that may hold non-zero predictions.
    """
    r = kernel_x.shape[0] // 2
    stride = nx + 2 * r
    # Grid row iy, column ix is rows_in[iy * stride + r + ix] before the x
    # pass and along_x[(iy + r) * stride + r + ix] after it (r zero rows on
    # top); the y pass writes rows_in[iy * stride + r + ix] again.
    rows_in = grid_scratch[: ny * stride]
    along_x = grid_scratch[ny * stride : (2 * ny + 2 * r) * stride]
    out_y0 = max(0, y0 - r)
    out_y1 = min(ny - 1, y1 + r)
    for iy in range(y0, y1 + 1):
        dst = rows_in[iy * stride : (iy + 1) * stride]
        src = p[iy * nx : (iy + 1) * nx]
        inv = inv_norm[iy * nx : (iy + 1) * nx]
        dst[:r] = 0.0
        dst[r + nx :] = 0.0
        for ix in range(nx):
            dst[r + ix] = src[ix] * inv[ix]
    # From the first real bin of row y0 to the last of row y1; the padding
    # columns between rows get values that only ever reach padding columns.
    j0 = y0 * stride + r
    j1 = y1 * stride + r + nx
    if symmetric:
        _symmetric_filter(rows_in[j0 - r : j1 + r], kernel_x, 1, along_x[j0 + r * stride : j1 + r * stride])
    else:
        _filter(rows_in[j0 - r : j1 + r], kernel_x, 1, along_x[j0 + r * stride : j1 + r * stride])
    # Every row the y pass reads (grid rows out_y0 - r .. out_y1 + r) that
    # the x pass did not write is zero.
    along_x[out_y0 * stride : (y0 + r) * stride] = 0.0
    along_x[(y1 + 1 + r) * stride : (out_y1 + 2 * r + 1) * stride] = 0.0
    j0 = out_y0 * stride + r
    j1 = out_y1 * stride + r + nx
    if symmetric:
        _symmetric_filter(along_x[j0 : j1 + 2 * r * stride], kernel_y, stride, rows_in[j0:j1])
    else:
        _filter(along_x[j0 : j1 + 2 * r * stride], kernel_y, stride, rows_in[j0:j1])
    for iy in range(out_y0, out_y1 + 1):
        dst = out[iy * nx : (iy + 1) * nx]
        src = rows_in[iy * stride + r : iy * stride + r + nx]
        m = mask_f[iy * nx : (iy + 1) * nx]
        for ix in range(nx):
            dst[ix] = src[ix] * m[ix]
    return out_y0, out_y1


def predict_grid_numpy(p, ny, nx, kernel_1d, mask_f, inv_norm, out, scratch):
    """One random-walk step on a grid arena: ``mask * conv(p / conv(mask))`` (a step of :func:`decode_step_numpy`).

    This applies the transition ``T[i, j] = K(i, j) m_j / sum_k K(i, k) m_k``
    (from bin ``i`` to bin ``j``) without forming it: ``K`` is the separable
    kernel, ``m`` the valid-bin mask, and ``inv_norm = 1 / conv(m)`` on valid
    bins (0 elsewhere) is precomputed. Only the rows around the non-zero
    values of ``p``, grown by the kernel's reach, are convolved inside
    :func:`decode_step` (:func:`_predict_grid_rows`): a posterior is mostly
    zero far from its peak.

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Current posterior, 0 outside the valid bins. May be the same array
        as ``out``.
    ny, nx : int
        Grid shape.
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        Sampled 1-D Gaussian of the random walk (symmetric).
    mask_f : ndarray, shape (ny * nx,), float64
        1.0 on valid bins, 0.0 elsewhere.
    inv_norm : ndarray, shape (ny * nx,), float64
        ``1 / conv(mask_f)`` on valid bins, 0 elsewhere.
    out, scratch : ndarray, shape (ny * nx,), float64
        ``out`` receives the prediction (sums to ``p.sum()``); ``scratch``
        is not used.

    Returns
    -------
    out : ndarray, shape (ny * nx,)
    """
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
# Heading and angular velocity: the joint state of the heading ring
# ---------------------------------------------------------------------------


@numba.njit(cache=True)
def predict_heading_velocity(joint, velocity_transition, shift_bins, valid, joint_predicted, out):
    """One step of the joint state of heading and angular velocity; ``out`` receives the heading's marginal.

    The state is a heading bin ``i`` of ``n`` around the ring and an
    angular-velocity bin ``a`` of ``m``, flattened ``i * m + a``. One step
    first moves the velocity, ``a -> b`` with probability
    ``velocity_transition[a, b]`` (a discretised Ornstein-Uhlenbeck
    process), then turns the heading by the new velocity's ``shift_bins[b]``
    bins: the mass of bin ``i`` goes to ``i + k`` and ``i + k + 1`` (modulo
    ``n``) in the shares ``1 - f`` and ``f``, ``k + f = shift_bins[b]``,
    which is the exact move of a heading spread evenly over its bin (the
    constant-velocity model of target tracking, Bar-Shalom, Li and
    Kirubarajan 2001, ch. 6, on a ring of bins). Invalid heading bins get
    no mass.

    Parameters
    ----------
    joint : ndarray, shape (n * m,), float64
        The last posterior over the joint state.
    velocity_transition : ndarray, shape (m, m), float64, C-contiguous
        Row-stochastic.
    shift_bins : ndarray, shape (m,), float64
        Heading turn per step of each velocity bin, in bins (signed).
    valid : ndarray, shape (n,), bool
    joint_predicted : ndarray, shape (n * m,), float64
        Receives the predicted joint state.
    out : ndarray, shape (n,), float64
        Receives the predicted heading marginal, ``sum_b joint_predicted[i * m + b]``.

    Returns
    -------
    out : ndarray, shape (n,)
    """
    n, m = out.shape[0], shift_bins.shape[0]
    for x in range(n * m):
        joint_predicted[x] = 0.0
    moved = np.empty(m)
    for i in range(n):
        base = i * m
        any_mass = False
        for a in range(m):
            if joint[base + a] != 0.0:
                any_mass = True
                break
        if not any_mass:
            continue
        for b in range(m):
            moved[b] = 0.0
        for a in range(m):
            w = joint[base + a]
            if w == 0.0:
                continue
            row = velocity_transition[a]
            for b in range(m):
                moved[b] += w * row[b]
        for b in range(m):
            k = math.floor(shift_bins[b])
            f = shift_bins[b] - k
            j0 = (i + k) % n
            j1 = (j0 + 1) % n
            joint_predicted[j0 * m + b] += (1.0 - f) * moved[b]
            joint_predicted[j1 * m + b] += f * moved[b]
    for j in range(n):
        s = 0.0
        if valid[j]:
            for b in range(m):
                s += joint_predicted[j * m + b]
        else:
            for b in range(m):
                joint_predicted[j * m + b] = 0.0
        out[j] = s
    return out


def predict_heading_velocity_numpy(joint, velocity_transition, shift_bins, valid, joint_predicted, out):
    """Numpy twin of :func:`predict_heading_velocity`."""
    n, m = out.shape[0], shift_bins.shape[0]
    with np.errstate(under="ignore"):
        moved = joint.reshape(n, m) @ velocity_transition
    k = np.floor(shift_bins).astype(np.int64)
    f = shift_bins - k
    columns = np.arange(m)
    rows = np.arange(n)[:, None]
    pred = np.zeros((n, m))
    np.add.at(pred, ((rows + k[None, :]) % n, columns[None, :]), (1.0 - f)[None, :] * moved)
    np.add.at(pred, ((rows + k[None, :] + 1) % n, columns[None, :]), f[None, :] * moved)
    pred[~valid] = 0.0
    joint_predicted[:] = pred.ravel()
    out[:] = pred.sum(axis=1)
    return out


@numba.njit(cache=True)
def carry_heading_velocity(posterior, joint_predicted, velocity_prior, predicted_used, uniform_weight, uniform_level,
                           joint):
    """The joint state's posterior from the heading's: ``joint[i, b] = posterior[i] * prior(b | i)``.

    The likelihood depends on the heading only, so conditioning on the
    spikes leaves the velocity's distribution at each heading as the prior
    had it: the prediction mixed with the uniform jump (whose velocity is
    drawn from ``velocity_prior``), normalised per heading bin. Where the
    window was decoded without the prediction (the first step, or the
    prediction underflowed) or the prior had no mass, the velocity is
    ``velocity_prior``.

    Parameters
    ----------
    posterior : ndarray, shape (n,), float64
    joint_predicted : ndarray, shape (n * m,), float64
        From :func:`predict_heading_velocity`.
    velocity_prior : ndarray, shape (m,), float64
        Sums to 1.
    predicted_used : bool
    uniform_weight, uniform_level : float
        As in :func:`decode_step`.
    joint : ndarray, shape (n * m,), float64
        Receives the joint posterior.
    """
    n, m = posterior.shape[0], velocity_prior.shape[0]
    keep = 1.0 - uniform_weight
    for j in range(n):
        p = posterior[j]
        base = j * m
        s = 0.0
        if predicted_used and p != 0.0:
            for b in range(m):
                s += keep * joint_predicted[base + b] + uniform_level * velocity_prior[b]
        if s > 0.0:
            scale = p / s
            for b in range(m):
                joint[base + b] = scale * (keep * joint_predicted[base + b] + uniform_level * velocity_prior[b])
        else:
            for b in range(m):
                joint[base + b] = p * velocity_prior[b]


def carry_heading_velocity_numpy(posterior, joint_predicted, velocity_prior, predicted_used, uniform_weight,
                                 uniform_level, joint):
    """Numpy twin of :func:`carry_heading_velocity`."""
    n, m = posterior.shape[0], velocity_prior.shape[0]
    fresh = posterior[:, None] * velocity_prior[None, :]
    if not predicted_used:
        joint[:] = fresh.ravel()
        return
    prior = (1.0 - uniform_weight) * joint_predicted.reshape(n, m) + uniform_level * velocity_prior[None, :]
    total = prior.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
        carried = np.where((total > 0.0)[:, None], posterior[:, None] * prior / total[:, None], fresh)
    joint[:] = np.where((posterior == 0.0)[:, None], 0.0, carried).ravel()


# ---------------------------------------------------------------------------
# Drift: the walk tilted towards the decoded velocity
# ---------------------------------------------------------------------------

#: Slots of the float64 ``drift`` vector of :func:`decode_step`. Settings:
#: the gain on the velocity (0: no drift, the plain walk), the weight of the
#: newest displacement in the velocity's exponential average
#: (``1 - exp(-step_s / time_constant_s)``), ``1 / s^2`` of the walk (1/cm²),
#: the longest drift and displacement per step (cm), and the grid's bin (cm).
#: State between calls: the velocity (cm per step, x and y), the last
#: decoded point (cm), and whether there is one (1.0) or not (0.0).
DRIFT_GAIN, DRIFT_ALPHA, DRIFT_INV_VAR, DRIFT_MAX_CM, DRIFT_BIN_CM = 0, 1, 2, 3, 4
DRIFT_VX, DRIFT_VY, DRIFT_LAST_X, DRIFT_LAST_Y, DRIFT_HAS_LAST = 5, 6, 7, 8, 9
DRIFT_SIZE = 10


@numba.njit(cache=True)
def drift_tilt(drift):
    """The tilt of the next step's walk: ``gain * velocity / s^2`` (1/cm), the drift at most ``DRIFT_MAX_CM`` long.

    Multiplying a Gaussian step kernel ``N(d; 0, s^2)`` by ``exp(theta . d)``
    and renormalising gives ``N(d; s^2 theta, s^2)`` exactly (exponential
    tilting), so ``theta = mu / s^2`` moves the walk's mean to the drift
    ``mu = gain * velocity`` and leaves its spread alone.

    Parameters
    ----------
    drift : ndarray, shape (DRIFT_SIZE,), float64

    Returns
    -------
    theta_x, theta_y : float
    """
    mu_x = drift[DRIFT_GAIN] * drift[DRIFT_VX]
    mu_y = drift[DRIFT_GAIN] * drift[DRIFT_VY]
    size = math.sqrt(mu_x * mu_x + mu_y * mu_y)
    cap = drift[DRIFT_MAX_CM]
    if size > cap:
        mu_x *= cap / size
        mu_y *= cap / size
    return mu_x * drift[DRIFT_INV_VAR], mu_y * drift[DRIFT_INV_VAR]


@numba.njit(cache=True)
def update_velocity(drift, x_cm, y_cm):
    """Fold the step's decoded point into the velocity: an exponential average of its displacement per step.

    A displacement longer than ``DRIFT_MAX_CM`` (a jump of the estimate
    between two modes, not movement) is shortened to it.

    Parameters
    ----------
    drift : ndarray, shape (DRIFT_SIZE,), float64
        Updated in place.
    x_cm, y_cm : float
        The step's decoded point.
    """
    if drift[DRIFT_HAS_LAST] == 1.0:
        dx = x_cm - drift[DRIFT_LAST_X]
        dy = y_cm - drift[DRIFT_LAST_Y]
        size = math.sqrt(dx * dx + dy * dy)
        cap = drift[DRIFT_MAX_CM]
        if size > cap:
            dx *= cap / size
            dy *= cap / size
        a = drift[DRIFT_ALPHA]
        drift[DRIFT_VX] += a * (dx - drift[DRIFT_VX])
        drift[DRIFT_VY] += a * (dy - drift[DRIFT_VY])
    drift[DRIFT_LAST_X] = x_cm
    drift[DRIFT_LAST_Y] = y_cm
    drift[DRIFT_HAS_LAST] = 1.0


@numba.njit(cache=True)
def tilt_kernels(kernel_1d, bin_cm, theta_x, theta_y, kernel_x, kernel_y):
    """The grid walk tilted by ``theta``, per axis, as :func:`_predict_grid_rows` takes it.

    ``kernel[k]`` weighs a move of ``d = (r - k) * bin_cm``: ``kernel_1d[k] *
    exp(theta * d)`` (``kernel_1d`` symmetric). A separable tilt of a
    separable kernel stays separable.

    Parameters
    ----------
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        The walk's symmetric kernel.
    bin_cm, theta_x, theta_y : float
    kernel_x, kernel_y : ndarray, shape (2 * r + 1,), float64
        Receive the tilted kernels.
    """
    r = kernel_1d.shape[0] // 2
    for k in range(kernel_1d.shape[0]):
        d = (r - k) * bin_cm
        kernel_x[k] = kernel_1d[k] * math.exp(theta_x * d)
        kernel_y[k] = kernel_1d[k] * math.exp(theta_y * d)


def tilt_kernels_numpy(kernel_1d, bin_cm, theta_x, theta_y, kernel_x, kernel_y):
    """Numpy twin of :func:`tilt_kernels`."""
    r = kernel_1d.shape[0] // 2
    d = (r - np.arange(kernel_1d.shape[0])) * bin_cm
    kernel_x[:] = kernel_1d * np.exp(theta_x * d)
    kernel_y[:] = kernel_1d * np.exp(theta_y * d)


@numba.njit(cache=True)
def _add_moves(src, kernel, step, dst):
    """``dst[j] = sum_k kernel[k] * src[j + (2 * r - k) * step]``, ``k`` ascending, with no fused multiply-adds.

    The sums of :func:`_tilted_inv_norm`, in the order its bin-by-bin form
    adds their terms (``kernel[k]`` weighs a move of ``r - k`` bins). Not
    :func:`_filter`, which reads the taps the other way round and fuses
    multiply and add: either would round the normalisers differently from
    that form, and a replay's steps with them.

    Parameters
    ----------
    src : ndarray, shape (>= len(dst) + 2 * r * step,), float64
    kernel : ndarray, shape (2 * r + 1,), float64
    step : int
    dst : ndarray, float64
        Receives the sums; must not overlap ``src``.
    """
    last = kernel.shape[0] - 1
    n = dst.shape[0]
    for j in range(n):
        dst[j] = 0.0
    for k in range(last + 1):
        a = src[(last - k) * step : (last - k) * step + n]
        w = kernel[k]
        for j in range(n):
            dst[j] += w * a[j]


@numba.njit(cache=True, error_model="numpy")
def _tilted_inv_norm(p, ny, nx, kernel_x, kernel_y, mask_f, interior, y0, y1, inv, grid_scratch):
    """``inv[i] = 1 / sum_j K_tilted(i -> j) m_j`` on the non-zero bins of ``p`` in rows ``y0..y1``.

    A bin whose whole reach is valid (``interior``) sums the full kernels,
    ``sum(kernel_x) * sum(kernel_y)``. Bins near a wall or the grid's edge
    sum their reach; a broad posterior (a high likelihood temperature)
    touches hundreds of them on a ragged map of visited bins, so the sum is
    taken apart as the kernel is: the mask's rows along x (rows
    ``y0 - r .. y1 + r``), then those sums along y, each as a few long loops
    over grid rows padded with zeros, as in :func:`_predict_grid_rows`.
    Every bin receives its terms in the order of the sum written out bin by
    bin (``kernel_x[k]`` ascending within a row, then ``kernel_y[k]``
    ascending), with no fused multiply-adds, and a term beyond the grid
    (0 times a kernel weight) leaves a non-negative sum as it was: the
    result is that sum's, bit for bit (tests/test_movement_drift.py).

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Current posterior; 0 outside rows ``y0..y1``.
    ny, nx : int
    kernel_x, kernel_y : ndarray, shape (2 * r + 1,), float64
        The tilted walk (:func:`tilt_kernels`): ``kernel[k]`` weighs a move
        of ``r - k`` bins, to column (row) ``i + r - k``.
    mask_f : ndarray, shape (ny * nx,), float64
    interior : ndarray, shape (ny * nx,), bool
        Bins whose whole reach is valid.
    y0, y1 : int
        Inclusive, ``0 <= y0 <= y1 < ny``.
    inv : ndarray, shape (ny * nx,), float64
        Receives the normalisers on rows ``y0..y1`` (0 where ``p`` is 0).
    grid_scratch : ndarray, shape (>= (2 * ny + 2 * r) * (nx + 2 * r),), float64
        Overwritten.
    """
    r = kernel_x.shape[0] // 2
    full = 0.0
    for k in range(kernel_x.shape[0]):
        full += kernel_x[k]
    sum_y = 0.0
    for k in range(kernel_y.shape[0]):
        sum_y += kernel_y[k]
    full = 1.0 / (full * sum_y)
    stride = nx + 2 * r
    m0 = max(0, y0 - r)
    m1 = min(ny - 1, y1 + r)
    # Grid row g, column ix is padded[(g - m0) * stride + r + ix] (the mask),
    # along_x[(g - y0 + r) * stride + r + ix] after the x pass (rows beyond
    # the grid are zero) and, after the y pass, padded[(g - y0) * stride + r + ix].
    padded = grid_scratch[: ny * stride]
    along_x = grid_scratch[ny * stride : (2 * ny + 2 * r) * stride]
    for g in range(m0, m1 + 1):
        dst = padded[(g - m0) * stride : (g - m0 + 1) * stride]
        src = mask_f[g * nx : (g + 1) * nx]
        dst[:r] = 0.0
        dst[r + nx :] = 0.0
        for ix in range(nx):
            dst[r + ix] = src[ix]
    # From the first real bin of row m0 to the last of row m1; the padding
    # columns between get values that only ever reach padding columns.
    n = (m1 - m0) * stride + nx
    _add_moves(padded[: n + 2 * r], kernel_x, 1, along_x[(m0 - y0 + r) * stride + r : (m0 - y0 + r) * stride + r + n])
    along_x[: (m0 - y0 + r) * stride] = 0.0
    along_x[(m1 - y0 + r + 1) * stride : (y1 - y0 + 2 * r + 1) * stride] = 0.0
    n = (y1 - y0) * stride + nx
    total = padded[r : r + n]
    _add_moves(along_x[r : r + n + 2 * r * stride], kernel_y, stride, total)
    for iy in range(y0, y1 + 1):
        row_total = total[(iy - y0) * stride : (iy - y0) * stride + nx]
        row_p = p[iy * nx : (iy + 1) * nx]
        row_interior = interior[iy * nx : (iy + 1) * nx]
        row_inv = inv[iy * nx : (iy + 1) * nx]
        for ix in range(nx):
            # Read beside the non-zero bins: a number, never what the buffer held. A non-zero
            # bin is valid, so its own move (kernel[r] > 0) makes its total positive.
            row_inv[ix] = 0.0 if row_p[ix] == 0.0 else (full if row_interior[ix] else 1.0 / row_total[ix])


def predict_grid_tilted_numpy(p, ny, nx, kernel_1d, bin_cm, theta_x, theta_y, mask_f, out):
    """One step of the tilted random walk on a grid arena, written out with numpy (a step of :func:`decode_step_numpy`).

    ``T[i, j] = K(j - i) exp(theta . (c_j - c_i)) m_j / sum_k K(k - i)
    exp(theta . (c_k - c_i)) m_k``: the walk's separable kernel ``K``
    reweighted towards ``theta`` and normalised over the valid bins of each
    row, so no mass leaves the arena. ``theta = 0`` is
    :func:`predict_grid_numpy`'s walk.

    Parameters
    ----------
    p : ndarray, shape (ny * nx,), float64
        Current posterior, 0 outside the valid bins.
    ny, nx : int
    kernel_1d : ndarray, shape (2 * r + 1,), float64
        The walk's symmetric kernel, ``kernel_1d[r + k]`` for a move of ``k`` bins.
    bin_cm, theta_x, theta_y : float
        Bin size (cm) and the tilt (1/cm, :func:`drift_tilt`).
    mask_f : ndarray, shape (ny * nx,), float64
    out : ndarray, shape (ny * nx,), float64
        Receives the prediction.

    Returns
    -------
    out : ndarray, shape (ny * nx,)
    """
    r = kernel_1d.shape[0] // 2
    moves_cm = np.arange(-r, r + 1) * bin_cm
    kx = kernel_1d * np.exp(theta_x * moves_cm)  # kx[r + k]: a move of k columns
    ky = kernel_1d * np.exp(theta_y * moves_cm)
    mask = np.pad(mask_f.reshape(ny, nx), r)
    # Row sums: norm[i] = sum_k K(k) m_{i + k}.
    norm = sum(ky[a] * kx[b] * mask[a : a + ny, b : b + nx] for a in range(2 * r + 1) for b in range(2 * r + 1))
    valid = mask_f.reshape(ny, nx) > 0
    q = np.pad(np.where(valid, p.reshape(ny, nx) / np.where(valid, norm, 1.0), 0.0), r)
    # Mass from bin i - k arrives at bin i with weight K(k).
    with np.errstate(under="ignore"):
        moved = sum(ky[a] * kx[b] * q[2 * r - a : 2 * r - a + ny, 2 * r - b : 2 * r - b + nx]
                    for a in range(2 * r + 1) for b in range(2 * r + 1))
    out[:] = (moved * mask_f.reshape(ny, nx)).ravel()
    return out


@numba.njit(cache=True)
def predict_dense_tilted(p, transition, centers_x_cm, centers_y_cm, theta_x, theta_y, out, scratch):
    """One step of the tilted walk with an explicit transition: each row reweighted by ``exp(theta . (c_j - c_i))``.

    ``T'[i, j] = T[i, j] exp(theta . (c_j - c_i)) / sum_k T[i, k] exp(theta .
    (c_k - c_i))``: the planar displacement of each move projected on the
    drift, so along a track, a graph's edges or the heading ring the walk
    leans the way the decoded point moves, and moves ``T`` forbids stay
    forbidden (mass never leaves the graph).

    Parameters
    ----------
    p : ndarray, shape (n_bins,), float64
    transition : ndarray, shape (n_bins, n_bins), float64, C-contiguous
        Row-stochastic on the valid bins.
    centers_x_cm, centers_y_cm : ndarray, shape (n_bins,), float64
    theta_x, theta_y : float
        The tilt, 1/cm (:func:`drift_tilt`).
    out, scratch : ndarray, shape (n_bins,), float64
        ``out`` receives the prediction; ``scratch`` is overwritten.

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
        cx = centers_x_cm[i]
        cy = centers_y_cm[i]
        total = 0.0
        for j in range(n):
            t = row[j]
            if t != 0.0:
                t *= math.exp(theta_x * (centers_x_cm[j] - cx) + theta_y * (centers_y_cm[j] - cy))
            scratch[j] = t
            total += t
        w /= total
        for j in range(n):
            out[j] += w * scratch[j]
    return out


def predict_dense_tilted_numpy(p, transition, centers_x_cm, centers_y_cm, theta_x, theta_y, out, scratch):
    """Numpy twin of :func:`predict_dense_tilted`: the tilted matrix formed, rows normalised, ``p @ T'``."""
    shift = theta_x * (centers_x_cm[None, :] - centers_x_cm[:, None]) + theta_y * (
        centers_y_cm[None, :] - centers_y_cm[:, None]
    )
    tilted = np.where(transition != 0.0, transition * np.exp(shift), 0.0)
    total = tilted.sum(axis=1, keepdims=True)
    tilted = np.divide(tilted, total, out=np.zeros_like(tilted), where=total > 0)
    with np.errstate(under="ignore"):
        out[:] = p @ tilted
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
    gives ``m``). No full sort: one pass gathers the values within a factor
    ``2**8`` of the peak (a few dozen for a decoded position, which is
    concentrated), and if they do not reach ``mass`` the next pass gathers
    the next factor ``2**8`` down, and so on; the values of the pass that
    crosses ``mass`` are refined by bucketing, then sorted once few are left.

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
        Number of bins in the region (0 if every weight is 0).

    References
    ----------
    Box GEP, Tiao GC (1973). Bayesian Inference in Statistical Analysis.
    Addison-Wesley (highest posterior density regions).
    """
    if p.shape[0] == 0:
        return 0
    return _hpd_and_first_max(p, _max_nonnegative(p), _sum(p), mass, scratch)[0]


@numba.njit(cache=True)
def _hpd_and_first_max(p, peak, total, mass, scratch):
    """:func:`hpd_size`, given the maximum and the sum of ``p``, and the first index of the maximum.

    Returns
    -------
    n_hpd, first_max : int
    """
    target = mass * total
    first = 0
    found = False
    acc_mass = 0.0
    acc_count = 0
    upper = np.inf
    t = peak * _HPD_GATHER_FACTOR
    while True:
        # Gather the positive values in [t, upper): all of them once t
        # underflows to 0 (or the peak is 0).
        n_c = 0
        got = 0.0
        lo = np.inf
        hi = 0.0
        for j in range(p.shape[0]):
            v = p[j]
            if v >= t and v < upper and v > 0.0:
                scratch[n_c] = v
                n_c += 1
                got += v
                lo = min(lo, v)
                hi = max(hi, v)
                if v == peak and not found:
                    first = j
                    found = True
        if acc_mass + got >= target or not t > 0.0:
            return _hpd_refine(scratch, n_c, lo, hi, target, acc_mass, acc_count), first
        acc_mass += got
        acc_count += n_c
        upper = t
        t *= _HPD_GATHER_FACTOR


@numba.njit(cache=True)
def _hpd_refine(scratch, n_c, lo, hi, target, acc_mass, acc_count):
    """Finish :func:`hpd_size` on the candidates of a bracket.

    Parameters
    ----------
    scratch : ndarray, shape (>= n_c,), float64
        The candidate values in ``scratch[:n_c]``; overwritten.
    n_c : int
    lo, hi : float
        Their minimum and maximum.
    target : float
        Mass the region must reach.
    acc_mass, acc_count : float, int
        Mass and number of the values above every candidate (all in the region).

    Returns
    -------
    n : int
    """
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
                    for m in range(n_c):
                        if vals[m] >= t:
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


def posterior_summary_numpy(p, centers_x_cm, centers_y_cm):
    """Maximum a posteriori bin, its probability and the posterior mean (a step of :func:`decode_step_numpy`).

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


# ---------------------------------------------------------------------------
# One decoding step, fused
# ---------------------------------------------------------------------------

#: ``decode_step`` updates the log-likelihood of the previous window in place
#: (only the rows whose count changed) at most this many steps in a row
#: before computing it afresh, so that rounding cannot build up: each update
#: adds a few ulp of the largest term, and 32 of them stay far below what a
#: posterior can show (tests/test_kernels.py bounds it).
LIKELIHOOD_REFRESH_STEPS = 32

#: ``transition_kind`` of :func:`decode_step`: uniform prior at every step,
#: separable random walk on a grid, dense transition matrix, the joint state
#: of heading and angular velocity on the heading ring
#: (:func:`predict_heading_velocity`).
NO_TRANSITION, GRID_TRANSITION, DENSE_TRANSITION, VELOCITY_TRANSITION = 0, 1, 2, 3

#: Slots of the int64 ``state`` vector of :func:`decode_step`: updates since
#: the last exact log-likelihood (-1: compute it afresh at the next step),
#: whether ``previous`` holds the last posterior (1) or not (0), and the
#: first and last grid rows (inclusive) outside which it is 0.
STATE_UPDATES, STATE_HAS_PREVIOUS, STATE_Y0, STATE_Y1 = 0, 1, 2, 3
STATE_SIZE = 4

#: Status returned by :func:`decode_step` besides the index (>= 0) of the
#: first bad input entry: decoded, or decoded with the uniform prior after
#: the state-space prior underflowed.
STEP_OK, STEP_UNDERFLOW = -1, -2


@numba.njit(cache=True)
def _update_log_likelihood(now, last, log_rate, expected_total, state, rows, weights, log_like):
    """Bring ``log_like`` from the counts ``last`` to the counts ``now``.

    Consecutive windows share most of their spikes, so usually only a few
    rows changed: ``log_like += (now - last)[u] * log_rate[u]`` over those.
    The log-likelihood is computed afresh instead when ``state`` asks for it,
    after ``LIKELIHOOD_REFRESH_STEPS`` updates, or when more rows changed than
    fired (then afresh is cheaper). Counts are whole numbers below 2^53, so
    the differences are exact; only the additions round.
    """
    n_units = now.shape[0]
    n_fired = 0
    n_changed = 0
    for u in range(n_units):
        c = now[u]
        if c != 0.0:
            n_fired += 1
        if c != last[u]:
            rows[n_changed] = u
            weights[n_changed] = c - last[u]
            n_changed += 1
    updates = state[STATE_UPDATES]
    if updates < 0 or updates >= LIKELIHOOD_REFRESH_STEPS or n_changed > n_fired:
        n = 0
        for u in range(n_units):
            if now[u] != 0.0:
                rows[n] = u
                weights[n] = now[u]
                n += 1
        for j in range(log_like.shape[0]):
            log_like[j] = -expected_total[j]
        _add_weighted_rows(log_like, log_rate, rows, weights, n)
        state[STATE_UPDATES] = 0
    else:
        _add_weighted_rows(log_like, log_rate, rows, weights, n_changed)
        state[STATE_UPDATES] = updates + 1
    last[:] = now


@numba.njit(cache=True)
def _add_mark_terms(log_like, mark_terms):
    """``mark_terms[2] = log_like + mark_terms[0] - mark_terms[1]`` (the twin's order of operations, bit for bit)."""
    for j in range(log_like.shape[0]):
        mark_terms[2, j] = log_like[j] + mark_terms[0, j] - mark_terms[1, j]


@numba.njit(cache=True, fastmath={"reassoc"})
def _weigh(log_like, best, prior, valid, out):
    """The unnormalised posterior of :func:`posterior_from_log_numpy`; returns its sum."""
    total = 0.0
    for j in range(out.shape[0]):
        d = log_like[j] - best
        e = _exp_nonpositive(max(d, LOG_WEIGHT_FLOOR))
        w = prior[j] * e if (valid[j] and d > LOG_WEIGHT_FLOOR) else 0.0
        out[j] = w
        total += w
    return total


@numba.njit(cache=True, fastmath={"reassoc"})
def _normalise(out, total, centers_x_cm, centers_y_cm, prob_floor):
    """Divide by ``total`` (values below ``prob_floor`` become 0); return the new sum and the mean centre."""
    inv = 1.0 / total
    s = 0.0
    mean_x = 0.0
    mean_y = 0.0
    for j in range(out.shape[0]):
        v = out[j] * inv
        v = v if v >= prob_floor else 0.0
        out[j] = v
        s += v
        mean_x += v * centers_x_cm[j]
        mean_y += v * centers_y_cm[j]
    return s, mean_x, mean_y


@numba.njit(cache=True, fastmath={"reassoc"})
def _mix_uniform(predicted, j0, j1, uniform_weight, uniform_level, valid):
    """``predicted = (1 - uniform_weight) * predicted + uniform_level`` on the valid bins, 0 elsewhere.

    ``predicted`` is read on bins ``j0..j1 - 1`` only and taken as 0 outside
    them (where :func:`_predict_grid_rows` writes nothing).
    """
    keep = 1.0 - uniform_weight
    for j in range(predicted.shape[0]):
        if not valid[j]:
            predicted[j] = 0.0
        elif j0 <= j < j1:
            predicted[j] = keep * predicted[j] + uniform_level
        else:
            predicted[j] = uniform_level


@numba.njit(cache=True)
def _prob_floor(uniform_weight, uniform_level):
    """Normalised posterior values below this are stored as 0 (see ``UNIFORM_CUTOFF``)."""
    if uniform_weight == 0.0:
        return PROB_FLOOR
    return max(PROB_FLOOR, UNIFORM_CUTOFF * uniform_level)


@numba.njit(cache=True)
def decode_step(
    fired_rows,
    fired_counts,
    max_count,
    log_rate,
    expected_total,
    valid,
    uniform,
    uniform_weight,
    uniform_level,
    transition_kind,
    ny,
    nx,
    kernel_1d,
    mask_f,
    inv_norm,
    interior,
    transition,
    centers_x_cm,
    centers_y_cm,
    zone_start,
    zone_bins,
    hpd_mass,
    state,
    drift,
    unit_counts,
    unit_rows,
    log_like,
    previous,
    mark_terms,
    predicted,
    scratch,
    grid_scratch,
    out,
):
    """One window decoded: check, likelihood, prior, posterior and its summaries in one call.

    The same arithmetic as :func:`first_bad_entry`, :func:`poisson_log_likelihood_numpy`,
    :func:`predict_grid_numpy` or :func:`predict_dense`, :func:`posterior_from_log_numpy`,
    :func:`posterior_summary_numpy`, :func:`hpd_size` and :func:`zone_mass` in turn,
    with three economies: the log-likelihood of the previous window is
    updated where counts changed instead of recomputed (see
    ``LIKELIHOOD_REFRESH_STEPS``); on a grid the prediction, the
    exponentials and the summaries cover only the rows the prior can reach
    (the previous posterior's non-zero rows grown by the random walk's
    reach), outside which the posterior is exactly 0 (with a uniform jump
    every bin is weighed, and the rows carried to the next step are those
    above the ``UNIFORM_CUTOFF``); and one call replaces a dozen.

    Parameters
    ----------
    fired_rows : ndarray, shape (k,), int64
        Model rows of the units that fired; repeats add up.
    fired_counts : ndarray, shape (k,), float64
        Their spike counts.
    max_count : float
        Counts must be whole numbers in ``[0, max_count)``, ``max_count <= 2**53``.
    log_rate : ndarray, shape (n_units, n_bins), float64, C-contiguous
        Natural log of each unit's rate map in Hz.
    expected_total : ndarray, shape (n_bins,), float64
        Expected spike count of the population in the window at each bin.
    valid : ndarray, shape (n_bins,), bool
        Bins decoded over; at least one.
    uniform : ndarray, shape (n_bins,), float64
        1.0 on valid bins, 0.0 elsewhere: the flat prior.
    uniform_weight : float
        Probability per step of a jump to a uniformly drawn valid bin, in
        [0, 1): the prior is ``(1 - uniform_weight) * prediction +
        uniform_level`` on the valid bins (with a transition and a previous
        posterior). 0 gives the plain random walk.
    uniform_level : float
        ``uniform_weight / n_valid``.
    transition_kind : int
        ``NO_TRANSITION``, ``GRID_TRANSITION``, ``DENSE_TRANSITION`` or
        ``VELOCITY_TRANSITION``. The last keeps a joint state of heading and
        angular velocity (``m`` velocity bins) in arguments the other kinds
        use otherwise: ``transition`` is the velocity's transition (m, m),
        ``kernel_1d`` the heading turn per step of each velocity bin in bins
        (m,), ``mask_f`` the velocity's prior (m,), ``inv_norm`` the joint
        posterior (n_bins * m,), kept between calls like ``log_like``, and
        ``grid_scratch`` the joint prediction (n_bins * m,), overwritten
        (:func:`predict_heading_velocity`, :func:`carry_heading_velocity`).
    ny, nx : int
        Grid shape (``1, n_bins`` for an environment that is not a grid).
    kernel_1d, mask_f, inv_norm : ndarray, float64
        The random walk on a grid, as in :func:`predict_grid_numpy` (any 1-D
        arrays for other kinds).
    interior : ndarray, shape (n_bins,), bool
        On a grid, the bins whose whole reach of the walk is valid (see
        :func:`_tilted_inv_norm`); any 1-D array for other kinds.
    transition : ndarray, shape (n_bins, n_bins), float64
        The dense transition, as in :func:`predict_dense` (any 2-D array for
        other kinds).
    centers_x_cm, centers_y_cm : ndarray, shape (n_bins,), float64
        Bin centres.
    zone_start, zone_bins : ndarray, int64
        Zones as in :func:`zone_mass`.
    hpd_mass : float
        Mass of the highest-posterior-density region, in (0, 1].
    state : ndarray, shape (STATE_SIZE,), int64
        The filter's state between calls (see ``STATE_UPDATES``); updated.
        Set ``state[STATE_UPDATES] = -1`` and ``state[STATE_HAS_PREVIOUS] = 0``
        to start afresh.
    drift : ndarray, shape (DRIFT_SIZE,), float64
        The drift's settings and the velocity between calls (see
        ``DRIFT_GAIN``); updated. With a gain above 0 and a transition the
        walk is tilted by :func:`drift_tilt` (:func:`tilt_kernels` on a
        grid, :func:`predict_dense_tilted` otherwise) and the posterior
        mean is folded into the velocity (:func:`update_velocity`); a gain
        of 0 leaves the walk and the vector untouched. Starting afresh
        forgets the velocity.
    unit_counts : ndarray, shape (3, n_units), float64
        Row 0 holds the counts behind ``log_like`` between calls; rows 1
        and 2 are overwritten.
    unit_rows : ndarray, shape (n_units,), int64
        Overwritten.
    log_like : ndarray, shape (n_bins,), float64
        The log-likelihood of the last window, kept between calls.
    previous : ndarray, shape (>= n_bins,), float64
        The last posterior (first ``n_bins`` values), when ``state`` says so;
        read only.
    mark_terms : ndarray, shape (3, n_bins) or (0, n_bins), float64, writable
        The window's likelihood from waveform marks (clusterless decoding),
        or no rows for none: row 0 the sum over the window's marked spikes
        of ``log lambda(x, m)``, row 1 the marks' expected count (their
        ground-process rate integrated over the window), both already
        divided by the likelihood temperature; row 2 is overwritten with the
        whole log-likelihood, ``log_like + row 0 - row 1``.
    predicted, scratch : ndarray, shape (n_bins,), float64
        Overwritten.
    grid_scratch : ndarray, shape ((2 * ny + len(kernel_1d) - 1) * (nx + len(kernel_1d) - 1),), float64
        Overwritten (for ``GRID_TRANSITION``; any 1-D array otherwise).
    out : ndarray, shape (n_bins + 4 + n_zones,), float64
        Receives the posterior (``[:n_bins]``), the centre of the MAP bin
        (``[n_bins:n_bins + 2]``), the posterior mean (``[n_bins + 2:n_bins + 4]``)
        and the zone masses (``[n_bins + 4:]``).

    Returns
    -------
    status : int
        ``STEP_OK``; ``STEP_UNDERFLOW`` when the state-space prior had no mass
        where the spikes point and the window was decoded with the uniform
        prior; or the index of the first bad entry of the input, in which
        case nothing else was written and ``state`` is unchanged.
    map_bin, n_hpd, n_spikes : int
        First bin of highest probability, bins in the HPD region, spikes in
        the window.
    peak_prob : float
        Posterior probability of ``map_bin``.

    References
    ----------
    Zhang K, Ginzburg I, McNaughton BL, Sejnowski TJ (1998). J Neurophysiol
    79:1017-1044 (likelihood). Brown EN, Frank LM, Tang D, Quirk MC, Wilson
    MA (1998). J Neurosci 18:7411-7425 (state-space prior).
    """
    n_units = log_rate.shape[0]
    bad = first_bad_entry(fired_rows, fired_counts, n_units, max_count)
    if bad >= 0:
        return bad, 0, 0, 0, 0.0

    now = unit_counts[1]
    now[:] = 0.0
    n_spikes = 0.0
    for i in range(fired_rows.shape[0]):
        now[fired_rows[i]] += fired_counts[i]
        n_spikes += fired_counts[i]
    return _decode_counts(
        n_spikes, log_rate, expected_total, valid, uniform, uniform_weight, uniform_level, transition_kind, ny, nx,
        kernel_1d, mask_f, inv_norm, interior, transition, centers_x_cm, centers_y_cm, zone_start, zone_bins, hpd_mass, state, drift,
        unit_counts, unit_rows, log_like, previous, mark_terms, predicted, scratch, grid_scratch, out,
    )


@numba.njit(cache=True)
def _decode_counts(
    n_spikes, log_rate, expected_total, valid, uniform, uniform_weight, uniform_level, transition_kind, ny, nx, kernel_1d, mask_f, inv_norm,
    interior, transition, centers_x_cm, centers_y_cm, zone_start, zone_bins, hpd_mass, state, drift, unit_counts, unit_rows,
    log_like, previous, mark_terms, predicted, scratch, grid_scratch, out,
):
    """:func:`decode_step` from the window's counts per unit, already in ``unit_counts[1]`` (checked)."""
    n_bins = log_rate.shape[1]
    now = unit_counts[1]
    _update_log_likelihood(
        now, unit_counts[0], log_rate, expected_total, state, unit_rows, unit_counts[2], log_like
    )
    # The units' part stays in log_like, updated in place from window to
    # window; the marks' part is new every window and is added beside it.
    if mark_terms.shape[0] == 3:
        _add_mark_terms(log_like, mark_terms)
        log_like = mark_terms[2]
    best = _max_where(log_like, valid)

    # The prior is 0 outside grid rows y0..y1, and so is the posterior; the
    # arithmetic below covers those rows only (bins j0..j1 - 1).
    y0, y1 = 0, ny - 1
    prior = uniform
    drifting = drift[DRIFT_GAIN] > 0.0 and transition_kind != NO_TRANSITION
    theta_x, theta_y = 0.0, 0.0
    if drifting and state[STATE_HAS_PREVIOUS] == 0:
        drift[DRIFT_VX] = 0.0
        drift[DRIFT_VY] = 0.0
        drift[DRIFT_HAS_LAST] = 0.0
    elif drifting:
        theta_x, theta_y = drift_tilt(drift)
    tilted = theta_x != 0.0 or theta_y != 0.0
    if state[STATE_HAS_PREVIOUS] == 1 and transition_kind == GRID_TRANSITION:
        p_y0, p_y1 = state[STATE_Y0], state[STATE_Y1]
        if tilted:
            kernel_x = np.empty_like(kernel_1d)
            kernel_y = np.empty_like(kernel_1d)
            tilt_kernels(kernel_1d, drift[DRIFT_BIN_CM], theta_x, theta_y, kernel_x, kernel_y)
            # scratch holds the tilted rows' normalisers until the summaries need it.
            _tilted_inv_norm(
                previous, ny, nx, kernel_x, kernel_y, mask_f, interior, p_y0, p_y1, scratch, grid_scratch
            )
            y0, y1 = _predict_grid_rows(
                previous, ny, nx, kernel_x, kernel_y, False, mask_f, scratch, p_y0, p_y1, predicted, grid_scratch
            )
        else:
            y0, y1 = _predict_grid_rows(
                previous, ny, nx, kernel_1d, kernel_1d, True, mask_f, inv_norm, p_y0, p_y1, predicted, grid_scratch
            )
        prior = predicted
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == DENSE_TRANSITION:
        if tilted:
            predict_dense_tilted(
                previous[:n_bins], transition, centers_x_cm, centers_y_cm, theta_x, theta_y, predicted, scratch
            )
        else:
            predict_dense(previous[:n_bins], transition, predicted)
        prior = predicted
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == VELOCITY_TRANSITION:
        predict_heading_velocity(inv_norm, transition, kernel_1d, valid, grid_scratch, predicted)
        prior = predicted
    if uniform_weight > 0.0 and state[STATE_HAS_PREVIOUS] == 1 and transition_kind != NO_TRANSITION:
        # The uniform jump gives every valid bin prior mass: weigh them all.
        _mix_uniform(predicted, y0 * nx, (y1 + 1) * nx, uniform_weight, uniform_level, valid)
        y0, y1 = 0, ny - 1

    post = out[:n_bins]
    status = STEP_OK
    j0, j1 = y0 * nx, (y1 + 1) * nx
    total = _weigh(log_like[j0:j1], best, prior[j0:j1], valid[j0:j1], post[j0:j1])
    if not total >= MIN_EVIDENCE:
        status = STEP_UNDERFLOW
        y0, y1 = 0, ny - 1
        j0, j1 = 0, n_bins
        # With a flat prior the best valid bin has weight exactly 1.
        total = _weigh(log_like, best, uniform, valid, post)
    post[:j0] = 0.0
    post[j1:] = 0.0
    total, mean_x, mean_y = _normalise(
        post[j0:j1], total, centers_x_cm[j0:j1], centers_y_cm[j0:j1], _prob_floor(uniform_weight, uniform_level)
    )
    y0, y1 = _support_rows(post, nx, y0, y1)
    if drifting:
        update_velocity(drift, mean_x, mean_y)
    if transition_kind == VELOCITY_TRANSITION:
        used = state[STATE_HAS_PREVIOUS] == 1 and status == STEP_OK
        carry_heading_velocity(post, grid_scratch, mask_f, used, uniform_weight, uniform_level, inv_norm)
    if transition_kind != NO_TRANSITION:
        state[STATE_HAS_PREVIOUS] = 1
        state[STATE_Y0] = y0
        state[STATE_Y1] = y1

    # Summaries over the non-zero rows: the first maximum there is the first
    # of the whole posterior, which is 0 elsewhere.
    j0, j1 = y0 * nx, (y1 + 1) * nx
    band = post[j0:j1]
    peak = _max_nonnegative(band)
    n_hpd, map_bin = _hpd_and_first_max(band, peak, total, hpd_mass, scratch)
    map_bin += j0
    out[n_bins] = centers_x_cm[map_bin]
    out[n_bins + 1] = centers_y_cm[map_bin]
    out[n_bins + 2] = mean_x
    out[n_bins + 3] = mean_y
    zone_mass(post, zone_start, zone_bins, out[n_bins + 4 :])
    return status, map_bin, n_hpd, int(n_spikes), peak


def decode_step_numpy(
    fired_rows,
    fired_counts,
    max_count,
    log_rate,
    expected_total,
    valid,
    uniform,
    uniform_weight,
    uniform_level,
    transition_kind,
    ny,
    nx,
    kernel_1d,
    mask_f,
    inv_norm,
    interior,
    transition,
    centers_x_cm,
    centers_y_cm,
    zone_start,
    zone_bins,
    hpd_mass,
    state,
    drift,
    unit_counts,
    unit_rows,
    log_like,
    previous,
    mark_terms,
    predicted,
    scratch,
    grid_scratch,
    out,
):
    """Numpy twin of :func:`decode_step`: the separate twins in turn, the log-likelihood afresh every step."""
    n_units, n_bins = log_rate.shape
    bad = first_bad_entry_numpy(fired_rows, fired_counts, n_units, max_count)
    if bad >= 0:
        return bad, 0, 0, 0, 0.0
    unit_counts[0] = np.bincount(fired_rows, weights=fired_counts, minlength=n_units)
    state[STATE_UPDATES] = 0
    poisson_log_likelihood_numpy(fired_rows, fired_counts, log_rate, expected_total, log_like)
    if mark_terms.shape[0] == 3:
        mark_terms[2] = log_like + mark_terms[0] - mark_terms[1]
        log_like = mark_terms[2]
    prior = uniform
    drifting = drift[DRIFT_GAIN] > 0.0 and transition_kind != NO_TRANSITION
    theta_x, theta_y = 0.0, 0.0
    if drifting and state[STATE_HAS_PREVIOUS] == 0:
        drift[[DRIFT_VX, DRIFT_VY, DRIFT_HAS_LAST]] = 0.0
    elif drifting:
        theta_x, theta_y = drift_tilt.py_func(drift)
    tilted = theta_x != 0.0 or theta_y != 0.0
    if state[STATE_HAS_PREVIOUS] == 1 and transition_kind == GRID_TRANSITION and tilted:
        prior = predict_grid_tilted_numpy(
            previous[:n_bins], ny, nx, kernel_1d, drift[DRIFT_BIN_CM], theta_x, theta_y, mask_f, predicted
        )
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == GRID_TRANSITION:
        prior = predict_grid_numpy(previous[:n_bins], ny, nx, kernel_1d, mask_f, inv_norm, predicted, scratch)
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == DENSE_TRANSITION and tilted:
        prior = predict_dense_tilted_numpy(
            previous[:n_bins], transition, centers_x_cm, centers_y_cm, theta_x, theta_y, predicted, scratch
        )
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == DENSE_TRANSITION:
        prior = predict_dense_numpy(previous[:n_bins], transition, predicted)
    elif state[STATE_HAS_PREVIOUS] == 1 and transition_kind == VELOCITY_TRANSITION:
        prior = predict_heading_velocity_numpy(inv_norm, transition, kernel_1d, valid, grid_scratch, predicted)
    if uniform_weight > 0.0 and state[STATE_HAS_PREVIOUS] == 1 and transition_kind != NO_TRANSITION:
        prior = np.where(valid, (1.0 - uniform_weight) * prior + uniform_level, 0.0)
    post = out[:n_bins]
    status = STEP_OK
    if not posterior_from_log_numpy(log_like, prior, valid, post, _prob_floor(uniform_weight, uniform_level)):
        status = STEP_UNDERFLOW
        posterior_from_log_numpy(log_like, uniform, valid, post)
    if transition_kind == VELOCITY_TRANSITION:
        used = state[STATE_HAS_PREVIOUS] == 1 and status == STEP_OK
        carry_heading_velocity_numpy(post, grid_scratch, mask_f, used, uniform_weight, uniform_level, inv_norm)
    if transition_kind != NO_TRANSITION:
        # Every row of the grid, a band outside which the posterior is 0.
        state[STATE_HAS_PREVIOUS:] = (1, 0, ny - 1)
    map_bin, peak, mean_x, mean_y = posterior_summary_numpy(post, centers_x_cm, centers_y_cm)
    if drifting:
        # The velocity's few scalar operations, as the compiled step does them.
        update_velocity.py_func(drift, mean_x, mean_y)
    out[n_bins : n_bins + 4] = (centers_x_cm[map_bin], centers_y_cm[map_bin], mean_x, mean_y)
    zone_mass_numpy(post, zone_start, zone_bins, out[n_bins + 4 :])
    n_hpd = hpd_size_numpy(post, hpd_mass, scratch)
    return status, map_bin, n_hpd, int(fired_counts.sum()), peak


@numba.njit(cache=True)
def decode_window_step(
    held_t_s, held_rows, start, stop, t_end_s, window_s, max_count, log_rate, expected_total, valid, uniform,
    uniform_weight, uniform_level, transition_kind, ny, nx, kernel_1d, mask_f, inv_norm, interior, transition, centers_x_cm, centers_y_cm, zone_start,
    zone_bins, hpd_mass, state, drift, unit_counts, unit_rows, log_like, previous, mark_terms, predicted, scratch, grid_scratch,
    out,
):
    """:func:`decode_step` for the window ``(t_end_s - window_s, t_end_s]`` of held spikes, counted in the same call.

    The same numbers, bit for bit, as counting the window first (as the twin does, with numpy)
    and passing its rows and counts to :func:`decode_step`: a unit's count is
    a sum of ones either way. Counting here saves the decoding loop a call
    and two arrays per step.

    Parameters
    ----------
    held_t_s : ndarray, shape (n,), float64
        Spike times, sorted over ``start:stop``.
    held_rows : ndarray, shape (n,), int64
        Model row of each spike.
    start, stop : int
        The held part of the arrays.
    t_end_s, window_s : float
    max_count, log_rate, ..., out
        As in :func:`decode_step` (``max_count`` is not needed: counts of
        held spikes are whole numbers by construction).

    Returns
    -------
    status, map_bin, n_hpd, n_spikes, peak_prob
        As in :func:`decode_step`; a status ``>= 0`` is the index (into the
        held arrays) of a spike whose row is out of range.
    first : int
        Index of the first held spike inside the window or after it.
    """
    n_units = log_rate.shape[0]
    held = held_t_s[start:stop]
    lo = start + np.searchsorted(held, t_end_s - window_s, side="right")
    hi = start + np.searchsorted(held, t_end_s, side="right")
    for i in range(lo, hi):
        if not 0 <= held_rows[i] < n_units:
            return i, 0, 0, 0, 0.0, lo
    now = unit_counts[1]
    now[:] = 0.0
    for i in range(lo, hi):
        now[held_rows[i]] += 1.0
    status, map_bin, n_hpd, n_spikes, peak = _decode_counts(
        float(hi - lo), log_rate, expected_total, valid, uniform, uniform_weight, uniform_level, transition_kind, ny,
        nx, kernel_1d, mask_f, inv_norm, interior, transition, centers_x_cm, centers_y_cm, zone_start, zone_bins, hpd_mass, state, drift, unit_counts,
        unit_rows, log_like, previous, mark_terms, predicted, scratch, grid_scratch, out,
    )
    return status, map_bin, n_hpd, n_spikes, peak, lo


def decode_window_step_numpy(held_t_s, held_rows, start, stop, t_end_s, window_s, *decode_args):
    """Numpy twin of :func:`decode_window_step`: the window counted with numpy, then :func:`decode_step_numpy`."""
    n_units = decode_args[1].shape[0]
    held_t, rows = held_t_s[start:stop], held_rows[start:stop]
    lo = int(np.searchsorted(held_t, t_end_s - window_s, side="right"))
    hi = int(np.searchsorted(held_t, t_end_s, side="right"))
    in_window = rows[lo:hi]
    bad = np.flatnonzero((in_window < 0) | (in_window >= n_units))
    if bad.size:
        return start + lo + int(bad[0]), 0, 0, 0, 0.0, start + lo
    binned = np.bincount(in_window, minlength=n_units)
    fired = np.flatnonzero(binned)
    return (*decode_step_numpy(fired, binned[fired].astype(np.float64), *decode_args), start + lo)


# -- the held-out pass of calibration: many windows decoded and scored in one call --------------------

#: numpy's pairwise summation: runs of at most this many values are added in eight running sums.
_PAIRWISE_BLOCK = 128


@numba.njit(cache=True)
def _block_sum(a, lo, n):
    """``a[lo:lo + n]``, ``n <= _PAIRWISE_BLOCK``, summed as numpy sums one block (see :func:`_pairwise_sum`)."""
    if n < 8:
        res = 0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = lo + 8
    end = lo + n - n % 8
    while i < end:
        r0 += a[i]
        r1 += a[i + 1]
        r2 += a[i + 2]
        r3 += a[i + 3]
        r4 += a[i + 4]
        r5 += a[i + 5]
        r6 += a[i + 6]
        r7 += a[i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < lo + n:
        res += a[i]
        i += 1
    return res


@numba.njit(cache=True)
def _pairwise_sum(a, lo, n):
    """``a[lo:lo + n]`` summed in numpy's pairwise order, bit for bit what ``ndarray.sum`` gives on it.

    numpy adds a contiguous float64 run of up to ``_PAIRWISE_BLOCK`` values
    in eight interleaved running sums, joined as ``((r0 + r1) + (r2 + r3)) +
    ((r4 + r5) + (r6 + r7))``, and splits a longer run in two at half its
    length rounded down to a multiple of eight, adding the halves' sums.
    The halving is walked here with a small stack, not by recursion (a
    cached kernel calling a recursive one crashed numba 0.68).
    ``tests/test_kernels.py`` holds this to numpy's sum.

    References
    ----------
    Higham NJ (1993). The accuracy of floating point summation. SIAM J Sci
    Comput 14:783-799 (pairwise summation).
    """
    if n <= _PAIRWISE_BLOCK:
        return _block_sum(a, lo, n)
    # Each level: its run (start, length), whether its left half is summed, and that sum.
    starts = np.empty(64, np.int64)
    lengths = np.empty(64, np.int64)
    left_done = np.zeros(64, np.bool_)
    left_sum = np.empty(64)
    depth = 0
    starts[0], lengths[0] = lo, n
    while True:
        m = lengths[depth]
        if m > _PAIRWISE_BLOCK:
            half = m // 2
            half -= half % 8
            left_done[depth] = False
            starts[depth + 1], lengths[depth + 1] = starts[depth], half
            depth += 1
            continue
        value = _block_sum(a, starts[depth], m)
        while True:
            depth -= 1
            if depth < 0:
                return value
            if not left_done[depth]:
                left_done[depth] = True
                left_sum[depth] = value
                half = lengths[depth] // 2
                half -= half % 8
                starts[depth + 1], lengths[depth + 1] = starts[depth] + half, lengths[depth] - half
                depth += 1
                break
            value = left_sum[depth] + value


@numba.njit(cache=True)
def mass_above(p, level, scratch):
    """Total of the values of ``p`` above ``level``: ``p[p > level].sum()``, bit for bit.

    Parameters
    ----------
    p : ndarray, shape (n,), float64
    level : float
    scratch : ndarray, shape (>= n,), float64
        Overwritten: the values above ``level`` gathered in order, then
        summed in numpy's order (:func:`_pairwise_sum`).

    Returns
    -------
    float
    """
    k = 0
    for j in range(p.shape[0]):
        if p[j] > level:
            scratch[k] = p[j]
            k += 1
    return 0.0 + _pairwise_sum(scratch, 0, k)


def mass_above_numpy(p, level, scratch):
    """Numpy twin of :func:`mass_above` (the tests' reference)."""
    return float(p[p > level].sum())


@numba.njit(cache=True)
def decode_held_out(fired_rows, fired_counts, step_start, true_bins, keep, mark_log_like, mark_expected, temperature,
                    has_transition, decode_before, buffers, mark_terms, decode_after, points, above, n_hpd, kept):
    """Decode consecutive windows with :func:`decode_step` and score each against its known bin, in one call.

    The held-out pass of ``decoder.encoding.calibration``: a Python loop
    over :meth:`BayesDecoder.decode` cost a third of the pass beside the
    compiled step itself. Each window is decoded exactly as ``decode`` does
    it (the same kernel, the marks' terms tempered in the same way, the
    posterior carried to the next window), so every number is the one that
    loop gave.

    Parameters
    ----------
    fired_rows : ndarray, shape (n_fired,), int64
    fired_counts : ndarray, shape (n_fired,), float64
        The windows' fired rows and counts end to end; window ``i`` holds
        entries ``step_start[i]:step_start[i + 1]``.
    step_start : ndarray, shape (n_steps + 1,), int64
    true_bins : ndarray, shape (n_steps,), int64
        The known bin of each window, -1 where unknown (not scored).
    keep : ndarray, shape (n_steps,), bool
        Windows whose posterior is copied into ``kept``, in order.
    mark_log_like : ndarray, shape (n_steps, n_bins) or (0, n_bins), float64
        Each window's marks log-likelihood (untempered), or no rows.
    mark_expected : ndarray, shape (n_bins,), float64
        The marks' expected count (untempered); read only with marks.
    temperature : float
        The decoder's likelihood temperature, dividing the marks' terms.
    has_transition : bool
        Whether each posterior is the next window's prior (the state-space
        prior) or the given one stays (the uniform prior).
    decode_before, decode_after : tuple
        :func:`decode_step`'s arguments between the counts and
        ``previous``, and between ``mark_terms`` and ``out``.
    buffers : ndarray, shape (3, n_bins + 4 + n_zones), float64
        Row 2 holds the posterior before the first window (the decoder's
        ``previous``); rows 0 and 1 take the windows' outputs in turn.
    mark_terms : ndarray, shape (3, n_bins) or (0, n_bins), float64
        :func:`decode_step`'s ``mark_terms`` (overwritten with marks).
    points : ndarray, shape (n_steps, 4), float64
        Out: each window's MAP centre and posterior mean (x, y each).
    above : ndarray, shape (n_steps,), float64
        Out, where the bin is known: the posterior mass of the bins more
        probable than the known one (:func:`mass_above`); the bin lies in
        the HPD region of a mass when this is below it.
    n_hpd : ndarray, shape (n_steps,), int64
        Out: the number of bins in each window's HPD region.
    kept : ndarray, shape (keep.sum(), n_bins), float64
        Out: the posteriors of the ``keep`` windows.

    Returns
    -------
    status : int
        -1, or the first window with a bad entry (outputs before it are written).
    bad_entry : int
        That window's bad entry, as :func:`decode_step` returns it.
    underflows : int
        Windows decoded with the uniform prior after the state-space prior underflowed.
    last : int
        Row of ``buffers`` holding the last posterior carried (2: none was).
    """
    n_bins = mark_terms.shape[1]
    scratch = np.empty(n_bins)
    with_marks = mark_log_like.shape[0] > 0
    last = 2
    n_kept = 0
    underflows = 0
    for i in range(true_bins.shape[0]):
        if with_marks:
            for j in range(n_bins):
                mark_terms[0, j] = mark_log_like[i, j] / temperature
                mark_terms[1, j] = mark_expected[j] / temperature
        out = buffers[i % 2]
        a, b = step_start[i], step_start[i + 1]
        status, map_bin, size, n_spikes, peak = decode_step(
            fired_rows[a:b], fired_counts[a:b], *decode_before, buffers[last], mark_terms, *decode_after, out
        )
        if status >= 0:
            return i, status, underflows, last
        if status == STEP_UNDERFLOW:
            underflows += 1
        if has_transition:
            last = i % 2
        for j in range(4):
            points[i, j] = out[n_bins + j]
        n_hpd[i] = size
        t = true_bins[i]
        if t >= 0:
            above[i] = mass_above(out[:n_bins], out[t], scratch)
        if keep[i]:
            kept[n_kept, :] = out[:n_bins]
            n_kept += 1
    return -1, -1, underflows, last


def decode_held_out_numpy(fired_rows, fired_counts, step_start, true_bins, keep, mark_log_like, mark_expected,
                          temperature, has_transition, decode_before, buffers, mark_terms, decode_after, points, above,
                          n_hpd, kept):
    """Numpy twin of :func:`decode_held_out`: :func:`decode_step_numpy` window by window."""
    n_bins = mark_terms.shape[1]
    last, n_kept, underflows = 2, 0, 0
    for i in range(true_bins.shape[0]):
        if mark_log_like.shape[0]:
            np.divide(mark_log_like[i], temperature, out=mark_terms[0])
            np.divide(mark_expected, temperature, out=mark_terms[1])
        out = buffers[i % 2]
        a, b = step_start[i], step_start[i + 1]
        status, _, size, _, _ = decode_step_numpy(fired_rows[a:b], fired_counts[a:b], *decode_before, buffers[last],
                                                  mark_terms, *decode_after, out)
        if status >= 0:
            return i, status, underflows, last
        underflows += status == STEP_UNDERFLOW
        if has_transition:
            last = i % 2
        points[i] = out[n_bins : n_bins + 4]
        n_hpd[i] = size
        if true_bins[i] >= 0:
            above[i] = mass_above_numpy(out[:n_bins], out[true_bins[i]], None)
        if keep[i]:
            kept[n_kept] = out[:n_bins]
            n_kept += 1
    return -1, -1, underflows, last
