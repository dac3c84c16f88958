"""Latency samples in bounded memory (rig_adapters.live.loop.LatencySeries)."""

import numpy as np

from rig_adapters.sessions.summary import LatencyLog, LatencySeries


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


def test_extend_equals_appending_one_by_one():
    # Bulk and one-by-one must leave the same histogram, recent ring, maximum and kept values (common practice).
    rng = np.random.default_rng(3)
    samples = (10 ** rng.uniform(-4, 6, 5000)).tolist() + [1e-3, 1e5, 2e5, 0.0]
    for keep_all in (False, True):
        one, bulk = LatencySeries(keep_all=keep_all), LatencySeries(keep_all=keep_all)
        for ms in samples:
            one.append(ms)
        for part in (samples[:2500], [], samples[2500:2501], samples[2501:]):
            bulk.extend(part)
        assert len(one) == len(bulk) and one.max_ms == bulk.max_ms
        for q in (1, 50, 99, 100):
            assert one.percentile(q) == bulk.percentile(q)
        np.testing.assert_array_equal(one.recent(), bulk.recent())
        assert list(one) == list(bulk)
