"""Latency samples in bounded memory (rig_adapters.loop.LatencySeries)."""

import numpy as np

from rig_adapters.loop import LatencyLog, LatencySeries


def test_percentiles_match_numpy_within_the_bin_width():
    rng = np.random.default_rng(2)
    samples = rng.lognormal(-0.5, 0.8, 50_000)
    series = LatencySeries()
    for v in samples:
        series.append(v)
    for q in (50, 90, 99, 99.9):
        # Reference: numpy.percentile by nearest rank (a sample, like a bin, not an
        # interpolation between two); the histogram's bins are 0.5 % wide.
        ref = np.percentile(samples, q, method="inverted_cdf")
        assert abs(series.percentile(q) - ref) <= 0.006 * ref
    assert series.max_ms == samples.max()
    assert series.last == samples[-1]
    np.testing.assert_array_equal(series.recent(), samples[-LatencySeries.RECENT:])


def test_memory_does_not_grow_with_the_session():
    series = LatencySeries()
    before = len(series._counts) + len(series._recent)
    for v in np.linspace(0.1, 5.0, 200_000):
        series.append(v)
    assert len(series._counts) + len(series._recent) == before
    assert series.values is None


def test_summary_of_an_empty_series_and_of_plain_lists():
    assert LatencyLog.percentiles(LatencySeries())["p50"] is None
    assert LatencyLog.percentiles([1.0, 3.0])["max"] == 3.0
