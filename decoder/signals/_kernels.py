"""The ripple kernel (numba) and its numpy twin: band-pass, envelope and mean z-score of one chunk.

One compiled call per LFP chunk. The twin runs the band-pass with
``scipy.signal.sosfilt`` itself, so that the tests hold the compiled
cascade to the reference implementation; it is also the benchmark's
baseline.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy import signal


@numba.njit(cache=True)
def ripple_chunk(x, sos, zi, tail, inv_two_sin, centre, inv_spread, y, env, z):
    """Band-pass, envelope and mean z-score of one chunk, the envelope one sample late.

    The band-pass is the cascade of second-order sections in transposed
    direct form II, the form and state layout of ``scipy.signal.sosfilt``.
    For a narrow-band signal y[n] = A cos(w n + p), the central difference
    (y[n + 1] - y[n - 1]) / (2 sin w) is its quadrature -A sin(w n + p), so
    sqrt(y[n]^2 + quadrature^2) is A: the instantaneous envelope from three
    samples, one sample of delay instead of the half-length of an FIR
    Hilbert transformer. Off the centre frequency the estimate ripples a
    little about A; the z-score's spread absorbs it.

    Parameters
    ----------
    x : ndarray of float64, shape (n, n_channels)
        The chunk's samples (µV).
    sos : ndarray of float64, shape (n_sections, 6)
        The band-pass; ``a0`` of every section is 1.
    zi : ndarray of float64, shape (n_sections, 2, n_channels)
        The filter's state, as ``sosfilt(..., axis=0, zi=zi)`` keeps it;
        updated in place.
    tail : ndarray of float64, shape (2, n_channels)
        The last two band-passed samples before the chunk, oldest first;
        updated in place to the chunk's last two.
    inv_two_sin : float
        1 / (2 sin w0), w0 the band's centre in radians per sample.
    centre, inv_spread : ndarray of float64, shape (n_channels,)
        Each channel's baseline envelope and the inverse of its spread.
    y : ndarray of float64, shape (n, n_channels)
        Out: the band-passed samples.
    env : ndarray of float64, shape (n, n_channels)
        Out: the envelope at each chunk sample's previous sample.
    z : ndarray of float64, shape (n,)
        Out: the mean over channels of (env - centre) * inv_spread.
    """
    n, n_channels = x.shape
    n_sections = sos.shape[0]
    for i in range(n):
        for c in range(n_channels):
            v = x[i, c]
            for s in range(n_sections):
                out = sos[s, 0] * v + zi[s, 0, c]
                zi[s, 0, c] = sos[s, 1] * v - sos[s, 4] * out + zi[s, 1, c]
                zi[s, 1, c] = sos[s, 2] * v - sos[s, 5] * out
                v = out
            y[i, c] = v
    for i in range(n):
        total = 0.0
        for c in range(n_channels):
            if i >= 2:
                older, mid = y[i - 2, c], y[i - 1, c]
            elif i == 1:
                older, mid = tail[1, c], y[0, c]
            else:
                older, mid = tail[0, c], tail[1, c]
            q = (y[i, c] - older) * inv_two_sin
            e = np.sqrt(mid * mid + q * q)
            env[i, c] = e
            total += (e - centre[c]) * inv_spread[c]
        z[i] = total / n_channels
    if n >= 2:
        tail[0, :] = y[n - 2, :]
        tail[1, :] = y[n - 1, :]
    elif n == 1:
        tail[0, :] = tail[1, :]
        tail[1, :] = y[0, :]


def ripple_chunk_numpy(x, sos, zi, tail, inv_two_sin, centre, inv_spread, y, env, z):
    """Numpy twin of :func:`ripple_chunk`: the same outputs and the same updates of ``zi`` and ``tail``."""
    y[...], zi[...] = signal.sosfilt(sos, x, axis=0, zi=zi)
    ext = np.concatenate([tail, y], axis=0)
    q = (ext[2:] - ext[:-2]) * inv_two_sin
    env[...] = np.sqrt(ext[1:-1] ** 2 + q**2)
    z[...] = ((env - centre) * inv_spread).mean(axis=1)
    tail[...] = ext[-2:]


@numba.njit(cache=True)
def median_and_mad(values):
    """Median and median absolute deviation of ``values`` (n,) float64, n >= 1; one compiled call."""
    centre = np.median(values)
    return centre, np.median(np.abs(values - centre))


def median_and_mad_numpy(values):
    """Numpy twin of :func:`median_and_mad`."""
    centre = np.median(values)
    return centre, np.median(np.abs(values - centre))
