"""Online scores: error percentiles and zone visits matched to events (decoder.session.scoring)."""

import numpy as np

from decoder.session.scoring import ErrorHistogram, VisitScore


def test_histogram_percentiles_match_numpy_within_the_resolution():
    rng = np.random.default_rng(0)
    errors = rng.gamma(2.0, 3.0, 5000)
    hist = ErrorHistogram(resolution_cm=0.05)
    for e in errors:
        hist.add(float(e))
    hist.add(float("nan"))                      # unknown positions are not errors
    assert hist.n == errors.size
    for q in (10, 50, 90, 99):
        # Reference: numpy.percentile; a binned percentile is exact to one bin.
        assert abs(hist.percentile(q) - np.percentile(errors, q)) <= 0.05
    assert ErrorHistogram().percentile(50) is None


def _run(score, steps, events):
    """steps: list of (t, inside); events: list of t (zone 0), merged by time."""
    items = [(t, 0, inside) for t, inside in steps] + [(t, 1, None) for t in events]
    for t, kind, inside in sorted(items, key=lambda x: (x[0], x[1])):
        if kind == 0:
            score.step(t, np.array([inside]))
        else:
            score.event(t, 0)
    return score.result()


def test_visits_hits_misses_false_and_latency_worked_by_hand():
    # The animal is in the zone from 1.0 to 2.0 s and from 5.0 to 5.5 s.
    t = np.round(np.arange(0, 8, 0.1), 1)
    inside = ((t >= 1.0) & (t < 2.0)) | ((t >= 5.0) & (t < 5.5))
    steps = list(zip(t, inside))
    # An event at 1.3 s (hit, 300 ms after entry), one at 1.6 s (repeat in the
    # same visit), one at 3.5 s (no visit near it: false); the second visit gets none (miss).
    result = _run(VisitScore(1), steps, [1.3, 1.6, 3.5])
    assert (result["entries"], result["hits"], result["misses"]) == (2, 1, 1)
    assert result["false_events"] == 1 and result["repeat_events"] == 1
    assert abs(result["latency_ms"]["p50"] - 300.0) < 1e-6


def test_an_event_leading_the_entry_counts_with_negative_latency():
    t = np.round(np.arange(0, 4, 0.1), 1)
    steps = list(zip(t, (t >= 2.0) & (t < 3.0)))
    result = _run(VisitScore(1, early_s=0.5), steps, [1.8])
    assert result["hits"] == 1 and result["false_events"] == 0
    assert abs(result["latency_ms"]["p50"] + 200.0) < 1e-6
