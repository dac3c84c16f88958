"""Tests for decoder.session.clock: least-squares clock fits and the pulse aligner.

The fit is checked against numpy.polyfit and scipy.stats.linregress
(reference libraries). Pulse trains are built from a known offset and drift;
20 ppm is within the tens of ppm usually quoted for uncompensated quartz
oscillators (from memory).
"""

import numpy as np
import pytest
from scipy import stats

from decoder.session.clock import (
    REFIT_AFTER_PULSES,
    ClockAligner,
    ClockMismatchError,
    fit_clock,
)

OFFSET_S = 1234.5678
DRIFT_PPM = 20.0


def pulse_train(n=50, period_s=1.0, jitter_s=50e-6, seed=3, offset_s=OFFSET_S, drift_ppm=DRIFT_PPM):
    """Times of the same pulses on another clock and on the reference clock."""
    rng = np.random.default_rng(seed)
    other = 17.0 + period_s * np.arange(n) + rng.normal(0.0, jitter_s, n)
    ref = offset_s + (1.0 + drift_ppm * 1e-6) * other + rng.normal(0.0, jitter_s, n)
    return ref, other


def test_fit_matches_numpy_polyfit_and_scipy_linregress():
    ref, other = pulse_train()
    fit = fit_clock(ref, other)
    slope, intercept = np.polyfit(other, ref, 1)
    # Reference library: numpy.polyfit, degree 1 (ordinary least squares).
    assert fit.slope == pytest.approx(slope, rel=1e-12)
    assert fit.offset_s == pytest.approx(intercept, abs=1e-9)
    lr = stats.linregress(other, ref)
    # Reference library: scipy.stats.linregress.
    assert fit.drift_ppm == pytest.approx((lr.slope - 1.0) * 1e6, abs=1e-4)
    assert fit.offset_s == pytest.approx(lr.intercept, abs=1e-9)
    residual = ref - (intercept + slope * other)
    assert fit.max_residual_s == pytest.approx(np.max(np.abs(residual)), abs=1e-10)
    assert fit.n_pulses == 50


def test_fit_recovers_known_offset_and_drift():
    ref, other = pulse_train(n=200, jitter_s=20e-6)
    fit = fit_clock(ref, other)
    # Standard error of an OLS slope, sigma / sqrt(sum (x - mean x)^2) (textbook
    # regression): sigma ~ 28 us (20 us of jitter on each clock), and 200 pulses
    # 1 s apart give sum ~ 6.7e5 s^2, so SE ~ 0.035 ppm; 0.2 ppm is beyond 5 SE.
    assert fit.drift_ppm == pytest.approx(DRIFT_PPM, abs=0.2)
    # Near the middle of the train the prediction's SE is ~ sigma / sqrt(200) ~ 2 us.
    assert float(fit.to_reference(100.0)) == pytest.approx(OFFSET_S + (1 + DRIFT_PPM * 1e-6) * 100.0, abs=2e-5)


def test_exact_line_is_recovered_exactly():
    other = np.linspace(0.0, 3600.0, 61)
    ref = OFFSET_S + (1 + DRIFT_PPM * 1e-6) * other
    fit = fit_clock(ref, other)
    # A noise-free line: least squares returns it to rounding error.
    assert fit.drift_ppm == pytest.approx(DRIFT_PPM, abs=1e-6)
    assert fit.max_residual_s < 1e-9
    np.testing.assert_allclose(fit.to_reference(other), ref, atol=1e-9)


def test_single_pulse_fits_offset_only():
    fit = fit_clock([10.5], [0.5])
    assert (fit.offset_s, fit.drift_ppm, fit.n_pulses) == (10.0, 0.0, 1)


@pytest.mark.parametrize(
    "ref, other, message",
    [
        ([], [], "at least one pulse"),
        ([1.0, 2.0], [1.0], "equally long"),
        ([1.0, np.nan], [1.0, 2.0], "finite"),
        ([1.0, 2.0], [3.0, 3.0], "share one time"),
    ],
)
def test_fit_rejects_bad_input(ref, other, message):
    with pytest.raises(ValueError, match=message):
        fit_clock(ref, other)


def feed(aligner, ref, other, source="tracker", ids=None):
    ids = range(len(ref)) if ids is None else ids
    for pulse_id, t_ref, t_other in zip(ids, ref, other):
        aligner.add_pulse("ephys", pulse_id, t_ref)
        aligner.add_pulse(source, pulse_id, t_other)


def test_aligner_matches_offline_fit_and_is_identity_for_reference():
    ref, other = pulse_train(n=30)
    aligner = ClockAligner("ephys", max_pulses=30)
    feed(aligner, ref, other)
    offline = fit_clock(ref, other)
    # The aligner's online fit over all 30 pulses equals the batch fit (itself checked against numpy.polyfit).
    assert aligner.fit("tracker") == offline
    assert aligner.to_reference("tracker", 20.0) == pytest.approx(float(offline.to_reference(20.0)), abs=1e-12)
    assert aligner.to_reference("ephys", 20.0) == 20.0
    np.testing.assert_array_equal(aligner.to_reference("ephys", np.array([1.0, 2.0])), [1.0, 2.0])
    assert aligner.counters["matched"] == 30


def test_not_aligned_returns_none_until_min_pulses():
    aligner = ClockAligner("ephys", min_pulses=3)
    assert aligner.to_reference("tracker", 1.0) is None
    feed(aligner, [101.0, 102.0], [1.0, 2.0])
    assert aligner.to_reference("tracker", 1.0) is None and not aligner.is_aligned("tracker")
    feed(aligner, [103.0], [3.0], ids=[2])
    assert aligner.to_reference("tracker", 1.5) == pytest.approx(101.5)


def test_pulses_match_by_id_in_any_arrival_order():
    aligner = ClockAligner("ephys")
    # The tracker reports first, and out of order.
    for pulse_id, t in [(1, 2.0), (0, 1.0), (2, 3.0)]:
        aligner.add_pulse("tracker", pulse_id, t)
    for pulse_id, t in [(0, 51.0), (2, 53.0), (1, 52.0)]:
        aligner.add_pulse("ephys", pulse_id, t)
    assert aligner.to_reference("tracker", 10.0) == pytest.approx(60.0)


def test_sliding_window_tracks_a_drift_change():
    aligner = ClockAligner("ephys", max_pulses=20)
    ref1, other1 = pulse_train(n=40, jitter_s=0.0, drift_ppm=20.0)
    feed(aligner, ref1, other1)
    # The clock warms up: from the 40th pulse it runs at 35 ppm, continuing smoothly.
    other2 = other1[-1] + np.arange(1, 41, dtype=float)
    ref2 = ref1[-1] + (1 + 35e-6) * (other2 - other1[-1])
    feed(aligner, ref2, other2, ids=range(40, 80))
    # Once the window holds only post-change pulses, the fit is the new line (worked by hand).
    assert aligner.fit("tracker").drift_ppm == pytest.approx(35.0, abs=1e-3)
    assert aligner.fit("tracker").n_pulses == 20


def test_mismatch_raises_a_clear_error_and_keeps_the_fit():
    ref, other = pulse_train(n=10, jitter_s=0.0)
    aligner = ClockAligner("ephys", tolerance_s=0.002)
    feed(aligner, ref, other)
    before = aligner.fit("tracker")
    next_other = other[-1] + 1.0
    aligner.add_pulse("ephys", 10, OFFSET_S + (1 + DRIFT_PPM * 1e-6) * next_other)
    # The tracker stamps pulse 10 five milliseconds early.
    with pytest.raises(ClockMismatchError, match=r"'tracker' lands 5\.000 ms away .*'ephys'.*tolerance of 2\.000 ms"):
        aligner.add_pulse("tracker", 10, next_other - 0.005)
    assert aligner.fit("tracker") == before
    assert aligner.counters["mismatch"] == 1
    assert isinstance(ClockMismatchError("x"), ValueError)


def test_implausible_drift_is_a_mismatch():
    aligner = ClockAligner("ephys")
    aligner.add_pulse("ephys", 0, 10.0)
    aligner.add_pulse("tracker", 0, 300.0)
    aligner.add_pulse("ephys", 1, 11.0)
    # A tracker stamping frames at 30 Hz instead of seconds: slope 1/30.
    with pytest.raises(ClockMismatchError, match="ppm off the reference 'ephys'"):
        aligner.add_pulse("tracker", 1, 330.0)
    assert not aligner.is_aligned("tracker")


def test_unmatched_and_duplicate_pulses_are_counted():
    aligner = ClockAligner("ephys", max_pending=4)
    for pulse_id in range(10):
        aligner.add_pulse("tracker", pulse_id, float(pulse_id))
    assert aligner.counters["unmatched"] == 6
    aligner.add_pulse("tracker", 9, 9.0)
    assert aligner.counters["duplicate"] == 1
    feed(aligner, [106.0, 107.0], [6.0, 7.0], ids=[6, 7])
    assert aligner.counters["duplicate"] == 3  # the tracker repeated 6 and 7 in feed
    assert aligner.status()["sources"]["tracker"]["n_matched"] == 2


def test_forget_lets_a_restarted_clock_align_again():
    aligner = ClockAligner("ephys")
    feed(aligner, [101.0, 102.0, 103.0], [1.0, 2.0, 3.0])
    aligner.forget("tracker")
    assert aligner.to_reference("tracker", 1.0) is None
    feed(aligner, [104.0, 105.0], [0.0, 1.0], ids=[3, 4])
    assert aligner.to_reference("tracker", 0.5) == pytest.approx(104.5)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"reference_source": ""}, "reference_source"),
        ({"tolerance_s": 0.0}, "tolerance_s"),
        ({"min_pulses": 0}, "min_pulses"),
        ({"max_pulses": 1}, "max_pulses"),
        ({"min_pulses": 5, "max_pulses": 4}, "at least min_pulses"),
    ],
)
def test_aligner_rejects_bad_settings(kwargs, message):
    with pytest.raises(ValueError, match=message):
        ClockAligner(**{"reference_source": "ephys", **kwargs})


def test_add_pulse_rejects_bad_input():
    aligner = ClockAligner("ephys")
    with pytest.raises(ValueError, match="non-finite time"):
        aligner.add_pulse("tracker", 0, float("nan"))
    with pytest.raises(ValueError, match="pulse_id"):
        aligner.add_pulse("tracker", -1, 0.0)


@pytest.mark.parametrize("jump_s", [-100.0, 100.0])
def test_a_clock_that_jumps_and_stays_is_fitted_afresh(jump_s):
    # Issue 17: a tracker clock set back (or forward) mismatched every later pulse, and its
    # frames stayed unaligned for the rest of the session. Like the spike stream's watermark,
    # the aligner follows a jump once enough pulses in a row agree on it.
    ref, other = pulse_train(n=30, jitter_s=0.0)
    aligner = ClockAligner("ephys", tolerance_s=0.002)
    feed(aligner, ref[:10], other[:10], ids=range(10))
    for i in range(10, 10 + REFIT_AFTER_PULSES):
        aligner.add_pulse("ephys", i, ref[i])
        with pytest.raises(ClockMismatchError):
            aligner.add_pulse("tracker", i, other[i] + jump_s)
    assert aligner.counters["refit"] == 1 and aligner.counters["mismatch"] == REFIT_AFTER_PULSES
    # The pulses after the jump match the new fit, and frames map to the reference clock again.
    feed(aligner, ref[15:], other[15:] + jump_s, ids=range(15, 30))
    assert aligner.counters["mismatch"] == REFIT_AFTER_PULSES
    assert aligner.to_reference("tracker", other[29] + jump_s) == pytest.approx(ref[29], abs=1e-6)


def test_mismatches_that_disagree_with_one_another_are_never_followed():
    ref, other = pulse_train(n=40, jitter_s=0.0)
    aligner = ClockAligner("ephys", tolerance_s=0.002)
    feed(aligner, ref[:10], other[:10], ids=range(10))
    before = aligner.fit("tracker")
    rng = np.random.default_rng(5)
    for i in range(10, 40):
        aligner.add_pulse("ephys", i, ref[i])
        with pytest.raises(ClockMismatchError):
            aligner.add_pulse("tracker", i, other[i] + rng.uniform(-50.0, 50.0))  # corrupt stamps, scattered
    assert aligner.counters["refit"] == 0 and aligner.fit("tracker") == before
