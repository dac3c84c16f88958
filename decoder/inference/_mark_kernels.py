"""Numerical kernels of clusterless decoding (waveform marks), each with a plain numpy twin.

The marked point-process model (Kloosterman et al. 2014; Deng et al. 2015)
gives each spike with mark ``m`` (its amplitudes on the channels of its
electrode group) and each position ``x`` the intensity

    lambda(x, m) = sum_i K_m(m - m_i) G(x, x_i) / occ(x)

over the group's encoding spikes ``i`` (marks ``m_i`` at positions
``x_i``), with ``K_m`` a Gaussian product kernel in mark space, ``G`` the
Gaussian smoothing over position and ``occ`` the smoothed occupancy in
seconds; a window of marked spikes ``k`` then has the log-likelihood
``sum_k log lambda(x, m_k) - window_s * sum_g Lambda_g(x)``, where
``Lambda_g`` is the group's ground-process rate. The kernels here give the
first sum; ``decoder.encoding.mark_model`` builds their arrays at fit time.

How the work stays bounded: each group's encoding spikes are kept in
buckets of their first channel, a quarter of ``cutoff_sd`` kernel widths
wide, and sorted on their second channel within a bucket, so only those
within ``cutoff_sd`` widths on both are visited (a binary search in each
bucket within reach), and of those only the ones within ``cutoff_sd``
widths on every channel weigh anything (the Gaussian has fallen below
``exp(-cutoff_sd**2 / 2)`` of its peak beyond). The weights are summed per
position bin and smoothed over position (on a grid arena by the separable
kernel over the box of bins they reach, elsewhere by the sparse smoothing
operator), and only the bins so reached get a logarithm: elsewhere the
intensity is the floor.

How the work is fast: the visited encoding spikes are taken a chunk at a
time, and each pass over a chunk is a branch-free loop the compiler
vectorises: squared distances four channels a sweep (marks channel by
channel), the weights by an exponential of our own (libm's is one call
per value), then a plain scatter into the histogram. Distances, weights and
the grid's smoothing are float32: amplitudes in uV carry far fewer than 7
significant digits, and the log-likelihood of a spike moves by ~1e-6 at
most (tests/test_marks_model.py holds the kernel to its float64 numpy
twin); histograms, intensity ratios and sums are float64.

References
----------
Kloosterman F, Layton SP, Chen Z, Wilson MA (2014). Bayesian decoding using
unsorted spikes in the rat hippocampus. J Neurophysiol 111:217-227.

Deng X, Liu DF, Kay K, Frank LM, Eden UT (2015). Clusterless decoding of
position from multiunit activity using a marked point process filter.
Neural Comput 27:1438-1460.
"""

from __future__ import annotations

import math

import numba
import numpy as np


@numba.njit(cache=True)
def _first_beyond(keys, lo, hi, value, strict):
    """First index in ``lo..hi`` with ``keys[i] > value`` (``strict``) or ``>= value``; ``hi`` if none.

    ``keys`` ascend over ``lo..hi``.
    """
    while lo < hi:
        mid = (lo + hi) // 2
        if keys[mid] < value or (strict and keys[mid] == value):
            lo = mid + 1
        else:
            hi = mid
    return lo


#: Candidates weighed at once: their squared distances and weights stay in
#: the first-level cache, and the scratch does not grow with the model.
CHUNK = 256

#: The buckets of channel 0 are this many to a cutoff width: a spike visits
#: its reach plus at most one bucket width on channel 0.
BUCKETS_PER_CUTOFF = 4

_LOG2_E = np.float32(1.0 / math.log(2.0))
_LN_2 = np.float32(math.log(2.0))
_SQRT_HALF = np.float32(math.sqrt(0.5))
_HALF = np.float32(0.5)
_ONE = np.float32(1.0)
_EXP_TAYLOR = tuple(np.float32(1.0 / math.factorial(k)) for k in range(7))

#: Largest argument of :func:`_exp_neg`: ``e^-87`` (1.6e-38) is the least
#: normal float32; a weight below it counts as it, far below any floor.
EXP_ARG_MAX = 87.0


@numba.njit(cache=True, inline="always")
def _exp_neg(x):
    """``e^-x`` for ``0 <= x <= 87`` (float32) within ~2e-7 relative, in arithmetic the compiler vectorises.

    libm's ``exp`` is one call per value; here ``e^-x = 2^-t`` with
    ``t = x log2(e)`` split into its integer part ``n``, whose power of two
    is built from the exponent bits, and ``g = (n + 1/2 - t) ln 2`` in
    ``[-ln(2)/2, ln(2)/2]``, where the Taylor series of ``e^g`` to degree 6
    is off by at most ``2^(1/2) (ln(2)/2)^7 / 7!`` (1.7e-7), near float32's
    own rounding (6e-8).
    """
    t = x * _LOG2_E
    n = np.int32(t)
    g = (np.float32(n) + _HALF - t) * _LN_2
    p = _EXP_TAYLOR[6]
    p = p * g + _EXP_TAYLOR[5]
    p = p * g + _EXP_TAYLOR[4]
    p = p * g + _EXP_TAYLOR[3]
    p = p * g + _EXP_TAYLOR[2]
    p = p * g + _ONE
    p = p * g + _ONE
    return np.int32((127 - n) << 23).view(np.float32) * (p * _SQRT_HALF)


@numba.njit(cache=True, fastmath={"contract"}, inline="always")
def _distances(enc_marks, c, c0, n, mark, nch, inv_bandwidth_uv, first, d2, far):
    """Channels ``c..c+3`` of the chunk ``c0:c0+n``: squared distances in kernel s.d.

    Summed into ``d2``, the largest channel's into ``far``; overwritten on
    the ``first`` pass, accumulated after. A channel beyond ``nch`` counts 0
    (its encoding row is 0 and so is the mark taken here).
    """
    zero = np.float32(0.0)
    m0 = mark[c]
    m1 = mark[c + 1] if c + 1 < nch else zero
    m2 = mark[c + 2] if c + 2 < nch else zero
    m3 = mark[c + 3] if c + 3 < nch else zero
    r0, r1 = enc_marks[c, c0:c0 + n], enc_marks[c + 1, c0:c0 + n]
    r2, r3 = enc_marks[c + 2, c0:c0 + n], enc_marks[c + 3, c0:c0 + n]
    for j in range(n):
        z0 = (r0[j] - m0) * inv_bandwidth_uv
        z1 = (r1[j] - m1) * inv_bandwidth_uv
        z2 = (r2[j] - m2) * inv_bandwidth_uv
        z3 = (r3[j] - m3) * inv_bandwidth_uv
        z0, z1, z2, z3 = z0 * z0, z1 * z1, z2 * z2, z3 * z3
        total = (z0 + z1) + (z2 + z3)
        largest = max(max(z0, z1), max(z2, z3))
        if first:
            d2[j] = total
            far[j] = largest
        else:
            d2[j] += total
            far[j] = max(far[j], largest)


@numba.njit(cache=True, fastmath={"contract"})
def mark_log_intensity_sum(
    spike_groups, spike_marks, group_start, group_channels, enc_marks, enc_bins, enc_weights, bucket_start, group_bucket,
    group_min0_uv, bucket_uv, inv_bandwidth_uv, cutoff_sd,
    spread_start, spread_bins, spread_weights, grid_nx, kernel_1d, bin_scale, group_scale, group_log_floor, valid,
    scratch, out,
):
    """Sum over a window's marked spikes of ``log max(lambda(x, m), floor)`` at every bin, into ``out``.

    Parameters
    ----------
    spike_groups : ndarray, shape (k,), int64
        Model row of each spike's group (``0..n_groups-1``).
    spike_marks : ndarray, shape (k, n_channels_max), float32
        Marks in uV, the group's channels first (the rest ignored).
    group_start : ndarray, shape (n_groups + 1,), int64
        Group ``g`` owns encoding spikes ``group_start[g]:group_start[g + 1]``.
    group_channels : ndarray, shape (n_groups,), int64
        Channels of each group.
    enc_marks : ndarray, shape (n_channels_max, n_enc), float32
        Encoding marks in uV, channel by channel (each channel's marks
        contiguous, so the distances are computed a chunk at a time in
        vector registers), in buckets of channel 0 (below) and ascending on
        channel 1 (channel 0 for a one-channel group) within each bucket.
    enc_bins : ndarray, shape (n_enc,), int32
        Position bin of each encoding spike.
    enc_weights : ndarray, shape (n_enc,), float32
        Spikes each encoding mark stands for (1, or more after
        :func:`merge_marks`: whole numbers, exact in float32).
    bucket_start : ndarray, shape (n_buckets + 1,), int64
        Bucket ``u`` holds encoding spikes ``bucket_start[u]:bucket_start[u + 1]``.
    group_bucket : ndarray, shape (n_groups + 1,), int64
        Group ``g`` owns buckets ``group_bucket[g]:group_bucket[g + 1]``; its
        bucket ``u`` holds channel 0 in ``[min0 + u w, min0 + (u + 1) w)``
        with ``w = bucket_uv``.
    group_min0_uv : ndarray, shape (n_groups,), float64
        The least channel-0 mark of each group.
    bucket_uv : float
        Width of a bucket on channel 0, uV.
    inv_bandwidth_uv : float
        1 / the mark kernel's s.d. (uV), the same on every channel.
    cutoff_sd : float
        Encoding spikes further than this many s.d. on any channel weigh 0.
    spread_start, spread_bins, spread_weights : ndarray, int64, int64, float64
        The position smoothing by source bin: bin ``b`` spreads to
        ``spread_bins[spread_start[b]:spread_start[b + 1]]`` with those weights.
    grid_nx : int
        Columns of a grid arena (bins row-major), or 0.
    kernel_1d : ndarray, shape (2 r + 1,), float32
        On a grid arena (``grid_nx > 0``), the smoothing is this kernel along
        each axis in turn, zero beyond the grid: the same operator as the
        spread arrays (which then go unused), applied by convolution over
        the rows and columns the spike's weights reach, which costs less
        than spreading bin by bin once a spike weighs more than a few
        hundred bins.
    bin_scale : ndarray, shape (n_bins,), float64
        The mark kernel's normalisation over the smoothed occupancy (s) of each bin.
    group_scale : ndarray, shape (n_groups,), float64
        Spikes placed over spikes kept, per group (reservoir sampling).
    group_log_floor : ndarray, shape (n_groups,), float64
        Natural log of the least intensity of a spike of each group.
    valid : ndarray, shape (n_bins,), bool
    scratch : tuple of ndarray
        From :func:`make_scratch`, as it left it or as this left it (each
        array a buffer of its own, so the compiler can tell them apart).
    out : ndarray, shape (n_bins,), float64
        Receives the sum (overwritten).

    Returns
    -------
    int
        Encoding spikes weighed (the work done).
    """
    n_bins = out.shape[0]
    k = spike_groups.shape[0]
    floor_sum = 0.0
    for s in range(k):
        floor_sum += group_log_floor[spike_groups[s]]
    for j in range(n_bins):
        out[j] = floor_sum if valid[j] else 0.0
    width = cutoff_sd / inv_bandwidth_uv
    cut2 = cutoff_sd * cutoff_sd
    hist, acc, product, box_src, box_x, box_y, d2, far, w, targets, is_target = scratch
    inv_bw32, cut2_32, arg_max = np.float32(inv_bandwidth_uv), np.float32(cut2), np.float32(EXP_ARG_MAX)
    weighed = 0
    multiplied = 0
    if grid_nx > 0:
        product[:] = 1.0
    for s in range(k):
        g = spike_groups[s]
        nch = group_channels[g]
        key = enc_marks[1 if nch > 1 else 0]
        # Only the buckets of channel 0 within reach, and in each the run within reach on the key channel.
        first, n_buckets = group_bucket[g], group_bucket[g + 1] - group_bucket[g]
        m0 = np.float64(spike_marks[s, 0]) - group_min0_uv[g]
        u_lo = int(max(0.0, math.floor((m0 - width) / bucket_uv)))
        u_hi = int(min(n_buckets - 1.0, math.floor((m0 + width) / bucket_uv)))
        mk = np.float64(spike_marks[s, 1 if nch > 1 else 0])
        b_lo, b_hi = n_bins, -1
        for u in range(u_lo, u_hi + 1):
            hi = bucket_start[first + u + 1]
            i0 = _first_beyond(key, bucket_start[first + u], hi, mk - width, False)
            i1 = _first_beyond(key, i0, hi, mk + width, True)
            for c0 in range(i0, i1, CHUNK):
                n = min(CHUNK, i1 - c0)
                # Four channels a pass, one sweep of the chunk each (enc_marks has the rows, zero beyond a group's).
                for c in range(0, nch, 4):
                    _distances(enc_marks, c, c0, n, spike_marks[s], nch, inv_bw32, c == 0, d2, far)
                # Every candidate gets its weight, 0 beyond the cutoff (no branch to mispredict),
                # and the bins they reach as a vector reduction, so that the scatter below is nothing else.
                # (Indexed through slices: an index that may be negative would be wrapped element by element.)
                chunk_weights, chunk_bins = enc_weights[c0:c0 + n], enc_bins[c0:c0 + n]
                for j in range(n):
                    near = np.int64(far[j] <= cut2_32)
                    weighed += near
                    w[j] = _exp_neg(min(_HALF * d2[j], arg_max)) * chunk_weights[j] * np.float32(near)
                    b = np.int64(chunk_bins[j])
                    b_lo = min(b_lo, b + (1 - near) * n_bins)
                    b_hi = max(b_hi, b * near - (1 - near))
                for j in range(n):
                    hist[np.uint32(chunk_bins[j])] += np.float64(w[j])  # bins are >= 0: no wraparound to test
        if b_hi < 0:
            continue
        scale = group_scale[g]
        log_floor = group_log_floor[g]
        if grid_nx > 0:
            _convolve_and_multiply(b_lo // grid_nx, b_hi // grid_nx, scale, grid_nx, kernel_1d, bin_scale, log_floor,
                                   hist, box_src, box_x, box_y, product)
            multiplied += 1
            if multiplied == _SPIKES_PER_LOG:
                _flush_products(product, valid, out)
                multiplied = 0
            continue
        n_targets = 0
        for b in range(b_lo, b_hi + 1):
            if hist[b] == 0.0:
                continue
            v = hist[b] * scale
            hist[b] = 0.0
            for e in range(spread_start[b], spread_start[b + 1]):
                t = spread_bins[e]
                if is_target[t] == 0:
                    is_target[t] = 1
                    targets[n_targets] = t
                    n_targets += 1
                acc[t] += v * spread_weights[e]
        for q in range(n_targets):
            t = targets[q]
            if valid[t]:
                lam = acc[t] * bin_scale[t]
                if lam > 0.0:
                    v = math.log(lam)
                    if v > log_floor:
                        out[t] += v - log_floor
            acc[t] = 0.0
            is_target[t] = 0
    if multiplied:
        _flush_products(product, valid, out)
    return weighed


#: On the grid path, the intensity ratios of this many spikes are multiplied
#: before one logarithm per bin: each ratio lies in [1, lambda_max / floor],
#: at most ~1e12 for any realistic model, so 16 of them stay far below the
#: largest double (1.8e308), and the logarithms cost a sixteenth.
_SPIKES_PER_LOG = 16


@numba.njit(cache=True)
def _flush_products(product, valid, out):
    """``out += log(product)`` on the valid bins, and ``product`` back to 1."""
    for j in range(out.shape[0]):
        if valid[j]:
            out[j] += math.log(product[j])
        product[j] = 1.0


def make_scratch(n_bins, grid_nx, kernel_1d):
    """The scratch :func:`mark_log_intensity_sum` needs, zeroed: a tuple of buffers, each of its own.

    Parameters
    ----------
    n_bins, grid_nx : int
    kernel_1d : ndarray, shape (2 r + 1,)
        As given to the kernel (empty off a grid).
    """
    r = kernel_1d.shape[0] // 2
    ny, nx = (n_bins // grid_nx, grid_nx) if grid_nx > 0 else (0, 0)
    row = nx + 2 * r
    return (np.zeros(n_bins), np.zeros(n_bins), np.ones(n_bins),  # histogram, spread, product of ratios
            # the grid's box: weights, smoothed along x, smoothed along both
            np.zeros(ny * row + 1, np.float32), np.zeros((ny + 4 * r) * row + 1, np.float32),
            np.zeros(ny * row + 1, np.float32),
            # a chunk's squared distances, largest channel term, weights
            np.zeros(CHUNK, np.float32), np.zeros(CHUNK, np.float32), np.zeros(CHUNK, np.float32),
            np.zeros(n_bins, np.int64), np.zeros(n_bins, np.int64))  # spread targets and their flags


@numba.njit(cache=True, fastmath={"contract", "reassoc"}, inline="always")
def _sweep(dst, src, src_at, step, taps, n):
    """``dst[j] = sum_k taps[k] src[src_at + k step + j]`` for ``j < n``: four taps a sweep, long vector loops."""
    out = dst[:n]
    for j in range(n):
        out[j] = np.float32(0.0)
    n_taps = taps.shape[0]
    k = 0
    while k + 4 <= n_taps:
        w0, w1, w2, w3 = taps[k], taps[k + 1], taps[k + 2], taps[k + 3]
        a = src_at + k * step
        s0, s1 = src[a:a + n], src[a + step:a + step + n]
        s2, s3 = src[a + 2 * step:a + 2 * step + n], src[a + 3 * step:a + 3 * step + n]
        for j in range(n):
            out[j] += (w0 * s0[j] + w1 * s1[j]) + (w2 * s2[j] + w3 * s3[j])
        k += 4
    while k < n_taps:
        w0 = taps[k]
        s0 = src[src_at + k * step:src_at + k * step + n]
        for j in range(n):
            out[j] += w0 * s0[j]
        k += 1


@numba.njit(cache=True, fastmath={"contract", "reassoc"})
def _convolve_and_multiply(y0, y1, scale, nx, kernel_1d, bin_scale, log_floor, hist, box_src, box_x, box_y, product):
    """The grid path of :func:`mark_log_intensity_sum` for one spike whose weights lie in rows ``y0..y1``.

    The box of the spike's weights, widened by the kernel's reach ``r``,
    is laid out with rows of ``width + 2 r`` (the weights at column
    ``r + x - xa``, zeros around), so that each smoothing pass is one long
    sweep over all rows, which the compiler vectorises: along x (the last
    ``2 r`` columns of each row come out meaningless and are never read),
    then along y over ``2 r`` zero rows above and below the weights. Then
    ``max(lambda / floor, 1)`` is multiplied into ``product``. ``hist`` and
    the box buffers go back to 0.
    """
    n_bins = product.shape[0]
    ny = n_bins // nx
    r = kernel_1d.shape[0] // 2
    # (Rows through slices: an index that may be negative would be wrapped element by element.)
    x0, x1 = nx, -1
    for y in range(y0, y1 + 1):
        weights = hist[y * nx:(y + 1) * nx]
        for x in range(nx):
            x0 = min(x0, x if weights[x] != 0.0 else nx)
            x1 = max(x1, x if weights[x] != 0.0 else -1)
    xa, xb = max(0, x0 - r), min(nx - 1, x1 + r)
    ya, yb = max(0, y0 - r), min(ny - 1, y1 + r)
    width = xb - xa + 1
    stride = width + 2 * r
    h0, h = y1 - y0 + 1, yb - ya + 1
    for y in range(y0, y1 + 1):
        weights = hist[y * nx + x0:y * nx + x1 + 1]
        box_row = box_src[(y - y0) * stride + r + x0 - xa:]
        for i in range(x1 - x0 + 1):
            box_row[i] = np.float32(weights[i])
            weights[i] = 0.0
    _sweep(box_x[2 * r * stride:], box_src, 0, 1, kernel_1d, h0 * stride - 2 * r)
    # Output row y takes source rows y - r .. y + r, at rows y - y0 + r .. y - y0 + 3 r of box_x.
    _sweep(box_y, box_x, (ya - y0 + r) * stride, stride, kernel_1d, h * stride)
    ratio_scale = scale / math.exp(log_floor)
    for y in range(ya, yb + 1):
        row, at = y * nx + xa, (y - ya) * stride
        smoothed, scales, products = box_y[at:at + width], bin_scale[row:row + width], product[row:row + width]
        for i in range(width):
            products[i] *= max(smoothed[i] * ratio_scale * scales[i], 1.0)
    box_src[:h0 * stride] = 0.0
    box_x[2 * r * stride:(2 * r + h0) * stride] = 0.0


def mark_log_intensity_sum_numpy(
    spike_groups, spike_marks, group_start, group_channels, enc_marks, enc_bins, enc_weights, bucket_start, group_bucket,
    group_min0_uv, bucket_uv, inv_bandwidth_uv, cutoff_sd,
    spread_start, spread_bins, spread_weights, grid_nx, kernel_1d, bin_scale, group_scale, group_log_floor, valid,
    scratch, out,
):
    """Numpy twin of :func:`mark_log_intensity_sum`: every encoding spike of the group weighed, no search.

    The smoothing is always the spread arrays (the same operator as the
    grid's kernel); the buckets, ``grid_nx``, ``kernel_1d`` and the scratch
    are not needed.
    """
    n_bins = out.shape[0]
    lengths = np.diff(spread_start)
    source_of = np.repeat(np.arange(n_bins), lengths)
    out[:] = 0.0
    weighed = 0
    for s in range(spike_groups.shape[0]):
        g = spike_groups[s]
        nch = group_channels[g]
        enc = enc_marks[:nch, group_start[g]:group_start[g + 1]].T
        z = (enc.astype(np.float64) - spike_marks[s, :nch].astype(np.float64)) * inv_bandwidth_uv
        near = np.all(z * z <= cutoff_sd * cutoff_sd, axis=1)
        weighed += int(near.sum())
        d2 = (z[near] ** 2).sum(axis=1)
        own = slice(group_start[g], group_start[g + 1])
        hist = np.bincount(enc_bins[own][near], weights=enc_weights[own][near].astype(np.float64) * np.exp(-0.5 * d2),
                           minlength=n_bins) * group_scale[g]
        lam = np.bincount(spread_bins, weights=hist[source_of] * spread_weights, minlength=n_bins) * bin_scale
        with np.errstate(divide="ignore"):
            out += np.where(valid, np.maximum(np.log(lam), group_log_floor[g]), 0.0)
    return weighed


@numba.njit(cache=True)
def merge_marks(marks, bins, inv_bandwidth_uv, merge_sd, centres, centre_bins, centre_weights):
    """Kernel density compression of one group's encoding marks (Sodkomkham et al. 2016).

    In bin order, each mark joins the first component of its own position
    bin within ``merge_sd`` kernel s.d. of it (its centre moves to the
    weighted mean) or starts a new one; the density becomes a weighted sum
    of far fewer kernels, changed by at most ~``merge_sd**2 / 2`` of a kernel
    width where marks merged.

    Parameters
    ----------
    marks : ndarray, shape (n, c), float32
        Marks in uV, ordered by ``bins``.
    bins : ndarray, shape (n,), int64
        Position bin of each mark, non-decreasing.
    inv_bandwidth_uv, merge_sd : float
    centres, centre_bins, centre_weights : ndarray, shapes (n, c), (n,), (n,); float32, int64, float64
        Receive the components (the first ``m``).

    Returns
    -------
    int
        ``m``, the number of components.

    References
    ----------
    Sodkomkham D, Ciliberti D, Wilson MA, Fukui K, Moriyama K, Numao M,
    Kloosterman F (2016). Kernel density compression for real-time Bayesian
    encoding/decoding of unsorted hippocampal spikes. Knowl-Based Syst
    94:1-12.
    """
    n, c = marks.shape
    limit = merge_sd * merge_sd
    m = 0
    first_of_bin = 0
    for p in range(n):
        if p == 0 or bins[p] != bins[p - 1]:
            first_of_bin = m
        joined = False
        for q in range(first_of_bin, m):
            d2 = 0.0
            for k in range(c):
                z = (np.float64(marks[p, k]) - np.float64(centres[q, k])) * inv_bandwidth_uv
                d2 += z * z
            if d2 <= limit:
                w = centre_weights[q]
                for k in range(c):
                    centres[q, k] = (centres[q, k] * w + marks[p, k]) / (w + 1.0)
                centre_weights[q] = w + 1.0
                joined = True
                break
        if not joined:
            for k in range(c):
                centres[m, k] = marks[p, k]
            centre_bins[m] = bins[p]
            centre_weights[m] = 1.0
            m += 1
    return m


def merge_marks_numpy(marks, bins, inv_bandwidth_uv, merge_sd, centres, centre_bins, centre_weights):
    """Numpy twin of :func:`merge_marks` (the same greedy pass, each candidate test vectorised)."""
    m = 0
    first_of_bin = 0
    for p in range(marks.shape[0]):
        if p == 0 or bins[p] != bins[p - 1]:
            first_of_bin = m
        if m > first_of_bin:
            z = (marks[p].astype(np.float64) - centres[first_of_bin:m].astype(np.float64)) * inv_bandwidth_uv
            close = np.flatnonzero((z * z).sum(axis=1) <= merge_sd * merge_sd)
            if close.size:
                q = first_of_bin + close[0]
                w = centre_weights[q]
                centres[q] = (centres[q].astype(np.float64) * w + marks[p].astype(np.float64)) / (w + 1.0)
                centre_weights[q] = w + 1.0
                continue
        centres[m] = marks[p]
        centre_bins[m] = bins[p]
        centre_weights[m] = 1.0
        m += 1
    return m
