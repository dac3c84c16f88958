"""The ripple band and the compiled chunk kernel, against scipy.signal and closed forms."""

import math

import numpy as np
import pytest
from scipy import signal

from decoder.signals._kernels import ripple_chunk, ripple_chunk_numpy
from decoder.signals.ripple_band import RippleBand, design_ripple_band, group_delay_s

RATE_HZ = 1500.0


def _chunks(n, rng, largest=9):
    edges = [0]
    while edges[-1] < n:
        edges.append(min(n, edges[-1] + int(rng.integers(1, largest + 1))))
    return list(zip(edges[:-1], edges[1:]))


@pytest.mark.parametrize("order", [1, 2, 3])
def test_chunked_compiled_band_equals_its_twin_and_sosfilt_on_the_whole_signal(order):
    rng = np.random.default_rng(order)
    n_channels = 4
    x = rng.standard_normal((900, n_channels)) * 30
    sos = RippleBand(RATE_HZ, n_channels, order=order).sos_
    centre, inv_spread = rng.uniform(5, 10, n_channels), 1 / rng.uniform(2, 4, n_channels)
    states = [(np.zeros((order, 2, n_channels)), np.zeros((2, n_channels))) for _ in range(2)]
    ys, zs = [[], []], [[], []]
    for a, b in _chunks(x.shape[0], rng, largest=5):  # chunks of 1 and 2 samples included
        for k, fn in enumerate((ripple_chunk, ripple_chunk_numpy)):
            zi, tail = states[k]
            y, env, z = np.empty((b - a, n_channels)), np.empty((b - a, n_channels)), np.empty(b - a)
            fn(np.ascontiguousarray(x[a:b]), sos, zi, tail, 0.7, centre, inv_spread, y, env, z)
            ys[k].append(y)
            zs[k].append(z)
    np.testing.assert_allclose(np.concatenate(ys[0]), np.concatenate(ys[1]), atol=1e-9)
    np.testing.assert_allclose(np.concatenate(zs[0]), np.concatenate(zs[1]), atol=1e-9)
    # The twin's filter is scipy.signal.sosfilt itself; the whole signal at once gives the same.
    np.testing.assert_allclose(np.concatenate(ys[0]), signal.sosfilt(sos, x, axis=0), atol=1e-9)
    np.testing.assert_allclose(states[0][0], states[1][0], atol=1e-9)


@pytest.mark.parametrize("freq_hz", [150.0, 200.0, 250.0])
def test_envelope_of_a_sinusoid_at_the_centre_is_its_amplitude(freq_hz):
    # Closed form: for y[n] = A cos(w n + p), (y[n+1] - y[n-1]) / (2 sin w) = -A sin(w n + p), so
    # y^2 + that^2 = A^2 exactly when w is the centre the kernel is told. A pass-through section
    # (b = [1, 0, 0], a = [1, 0, 0]) leaves the sinusoid as it is.
    w = 2 * math.pi * freq_hz / RATE_HZ
    n = np.arange(600)
    x = (37.0 * np.cos(w * n + 0.3))[:, None]
    sos = np.array([[1.0, 0, 0, 1.0, 0, 0]])
    y, env, z = np.empty_like(x), np.empty_like(x), np.empty(n.size)
    ripple_chunk(x, sos, np.zeros((1, 2, 1)), np.zeros((2, 1)), 1 / (2 * math.sin(w)), np.zeros(1), np.ones(1),
                 y, env, z)
    np.testing.assert_allclose(env[2:, 0], 37.0, rtol=1e-12)


def test_group_delay_matches_scipy_group_delay():
    sos = design_ripple_band(RATE_HZ, (150.0, 250.0), 2)
    b, a = signal.sos2tf(sos)
    # Reference: scipy.signal.group_delay on the same filter as a transfer function (samples).
    _, gd = signal.group_delay((b, a), w=[200.0], fs=RATE_HZ)
    assert group_delay_s(sos, 200.0, RATE_HZ) == pytest.approx(gd[0] / RATE_HZ, rel=1e-3)


def test_a_band_above_half_the_rate_is_refused_with_a_reason():
    with pytest.raises(ValueError, match="half the sample rate"):
        design_ripple_band(400.0, (150.0, 250.0), 2)


def test_compiled_median_and_mad_match_numpy():
    from decoder.signals._kernels import median_and_mad, median_and_mad_numpy

    values = np.random.default_rng(2).rayleigh(3.0, 6001)
    # Reference: numpy.median, directly and through the twin.
    assert median_and_mad(values) == pytest.approx(median_and_mad_numpy(values), rel=1e-12)
    assert median_and_mad(values)[0] == np.median(values)
