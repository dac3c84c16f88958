"""Online ripple detection against the offline filtfilt + Hilbert reference and textbook facts.

The simulated LFP (rig_adapters.sim.lfp) is test data here only in the sense
of a signal to run both detectors on: each check compares the online detector
with an outside reference (scipy.signal.filtfilt and scipy.signal.hilbert on
the whole signal; the Rayleigh distribution's median and MAD, its tail from
scipy.stats.rayleigh; Rice's mean duration of the envelope's excursions).
"""

import math

import numpy as np
import pytest
from scipy import signal, stats

from decoder.signals._kernels import ripple_chunk_numpy
from decoder.signals.ripple_detector import RippleDetection, RippleDetector, RippleOffset
from decoder.signals.ripple_reference import offline_ripples
from rig_adapters.sim.lfp import LfpSettings, LfpSynth

RATE_HZ = 1500.0


def _run(det, x, chunk=3):
    out = []
    for i in range(0, x.shape[0], chunk):
        out.extend(det.process(i / RATE_HZ, x[i:i + chunk]))
    return out


@pytest.fixture(scope="module")
def session_and_offsets():
    synth = LfpSynth(LfpSettings(rate_hz=RATE_HZ, n_channels=8), [5, 14])
    speed = np.zeros(int(RATE_HZ * 120))
    speed[int(RATE_HZ * 30):int(RATE_HZ * 40)] = 20.0
    speed[int(RATE_HZ * 80):int(RATE_HZ * 85)] = 20.0
    x = synth.block(speed)
    det = RippleDetector(RATE_HZ, 8)
    return x, det, _run(det, x), synth.ripples


@pytest.fixture(scope="module")
def session(session_and_offsets):
    x, det, out, _ = session_and_offsets
    return x, det, [d for d in out if isinstance(d, RippleDetection)]


def test_every_offline_event_is_found_and_none_is_completed_before_it_began(session):
    x, det, detections = session
    ref = offline_ripples(x, RATE_HZ)  # filtfilt band-pass, Hilbert envelope, 3 s.d., 15 ms
    # The offline envelope (zero-phase, whole session) z-scored with the online detector's own
    # baseline: where, with hindsight, each ripple crossed the online threshold.
    b, a = signal.butter(3, (150.0, 250.0), btype="bandpass", fs=RATE_HZ)
    env = np.abs(signal.hilbert(signal.filtfilt(b, a, x, axis=0), axis=0))
    hindsight_z = ((env - det.centre_) / det.spread_).mean(axis=1)
    events = [(on, off) for on, off in zip(ref.onset_s, ref.offset_s) if on >= 10.0]  # after the warm-up
    assert len(events) >= 20
    lags = []
    for on, off in events:
        found = [d for d in detections if on - 0.05 <= d.detected_s <= off]
        assert found, f"the offline event at {on:.3f} s was not detected online"
        i0 = int((on - 0.06) * RATE_HZ)
        crossed_s = (i0 + np.flatnonzero(hindsight_z[i0:int(off * RATE_HZ)] >= det.threshold_sd)[0]) / RATE_HZ
        # Causality: no detection is complete before the ripple crossed the level in hindsight.
        assert found[0].detected_s >= crossed_s
        lags.append(found[0].onset_s - crossed_s)
    # The causal filter's group delay: online onsets follow the zero-phase ones. The three-sample
    # envelope is noisier than the Hilbert one, so a single onset may precede by a few samples.
    assert np.median(lags) > 0.002
    assert min(lags) > -0.004


def test_each_detection_ends_at_its_offset_where_the_envelope_falls_back(session_and_offsets):
    x, det, out, ripples = session_and_offsets
    kinds = [type(d) for d in out]
    # Detections and offsets alternate, each offset naming the onset it ends.
    assert kinds[0::2] == [RippleDetection] * len(kinds[0::2]) and kinds[1::2] == [RippleOffset] * len(kinds[1::2])
    for d, o in zip(out[0::2], out[1::2]):
        assert o.onset_s == d.onset_s and d.detected_s <= o.detected_s
        assert d.onset_s < o.offset_s <= o.detected_s
        assert o.peak_sd >= d.peak_sd
    # The envelope falls back below end_sd at the offset: the causal envelope, z-scored with the
    # detector's own baseline, recomputed here with scipy.signal.sosfilt on the whole signal and the
    # quadrature of a central difference (as ripple_chunk_numpy does), is below end_sd there.
    band = signal.sosfilt(det.band.sos_, x, axis=0)
    centre = np.pi * 400.0 / RATE_HZ
    quad = np.zeros_like(band)
    quad[1:-1] = (band[2:] - band[:-2]) / (2 * np.sin(centre))
    env = np.hypot(band, quad)
    z = ((env - det.centre_) / det.spread_).mean(axis=1)
    for o in out[1::2]:
        k = int(round(o.offset_s * RATE_HZ))
        # The baseline moves a little after each event; one sample of leeway either side.
        assert z[k - 1:k + 2].min() < det.end_sd
    # A sanity bound on invented data: most offsets fall within 30 ms of a simulated ripple's end.
    ends = np.array([r.end_s for r in ripples])
    near = [np.min(np.abs(ends - o.offset_s)) <= 0.03 for o in out[1::2]]
    assert np.mean(near) >= 0.8


def test_latency_is_onset_to_the_end_of_the_detecting_chunk(session):
    _, det, detections = session
    assert detections
    for d in detections:
        assert d.latency_s == pytest.approx(d.detected_s - d.onset_s)
        assert d.latency_s >= 0.004  # min_duration_s (its default), common to every detection
        # A detection completes at the end of a chunk of 3 samples.
        samples = d.detected_s * RATE_HZ
        assert samples == pytest.approx(3 * round(samples / 3), abs=1e-6)


def test_baseline_of_band_passed_noise_is_the_rayleigh_median_and_mad():
    # Textbook: the envelope of narrow-band Gaussian noise of s.d. sigma is Rayleigh distributed;
    # its median is sigma * sqrt(2 ln 2) = 1.1774 sigma and its MAD about 0.448 sigma (value
    # from memory, checked here against a direct numerical quantile below).
    rng = np.random.default_rng(0)
    x = rng.standard_normal((int(RATE_HZ * 40), 4)) * 10
    det = RippleDetector(RATE_HZ, 4, warm_up_s=20.0)
    _run(det, x)
    sigma = signal.sosfilt(det.band.sos_, x, axis=0)[3000:].std(axis=0)
    np.testing.assert_allclose(det.centre_ / sigma, math.sqrt(2 * math.log(2)), rtol=0.05)
    r = np.sqrt(-2 * np.log(1 - (np.arange(1, 200_000) / 200_000)))  # Rayleigh quantiles, sigma = 1
    mad = np.median(np.abs(r - np.median(r)))
    assert mad == pytest.approx(0.448, abs=0.002)
    np.testing.assert_allclose(det.spread_ / sigma, 1.4826 * mad, rtol=0.06)


def test_threshold_in_sd_is_a_rayleigh_tail_and_noise_leaves_it_sooner_than_the_minimum_duration():
    # What the default threshold and minimum duration mean in band-passed Gaussian noise, the
    # background a false detection is made of:
    # * the share of envelope samples above a channel's threshold (median + 3.5 robust s.d.) is
    #   the Rayleigh tail there, scipy.stats.rayleigh.sf, about 2.2e-3: ten times a normal's
    #   scipy.stats.norm.sf(3.5) = 2.3e-4, although the z-score is a correct robust z;
    # * the envelope of noise behind a filter of RMS bandwidth B (about its centroid) stays above a
    #   level u (in the band's s.d.) for 1 / (sqrt(2 pi) B u) on average (S. O. Rice 1944-45, Bell
    #   System Technical Journal 23:282 and 24:46, from memory; the Hilbert envelope matches it to 1 %
    #   here, the detector's three-sample envelope runs about 10 % shorter), B from
    #   scipy.signal.sosfreqz: about 2.6 ms at the threshold, below the default minimum duration.
    rng = np.random.default_rng(6)
    x = rng.standard_normal((int(RATE_HZ * 60), 4)) * 10
    det = RippleDetector(RATE_HZ, 4, warm_up_s=20.0)
    _run(det, x)
    sos = det.band.sos_
    y, env, z = np.empty_like(x), np.empty_like(x), np.empty(x.shape[0])
    # The detector's envelope computed by its numpy twin on scipy.signal.sosfilt, the filter settled.
    ripple_chunk_numpy(x, sos, np.zeros((sos.shape[0], 2, 4)), np.zeros((2, 4)),
                       1 / (2 * math.sin(math.pi * 400.0 / RATE_HZ)), det.centre_, 1 / det.spread_, y, env, z)
    y, env = y[3000:], env[3000:]
    sigma = y.std(axis=0)
    u = det.threshold_uv / sigma
    np.testing.assert_allclose(u, 1.1774 + 1.4826 * 0.4482 * 3.5, rtol=0.06)  # the Rayleigh median and MAD
    above = env >= det.threshold_uv
    # Pooled over the channels: each channel's share rests on about 50 excursions.
    assert above.mean() == pytest.approx(stats.rayleigh.sf(u).mean(), rel=0.2)
    assert above.mean() > 5 * stats.norm.sf(det.threshold_sd)
    f, h = signal.sosfreqz(sos, worN=1 << 14, fs=RATE_HZ)
    power = np.abs(h) ** 2
    centroid = np.sum(f * power) / np.sum(power)
    rms_bandwidth_hz = math.sqrt(np.sum((f - centroid) ** 2 * power) / np.sum(power))
    rice_s = 1 / (math.sqrt(2 * math.pi) * rms_bandwidth_hz * u.mean())
    edges = np.diff(np.concatenate([np.zeros((1, 4)), above, np.zeros((1, 4))]).astype(np.int8), axis=0)
    runs = np.concatenate([np.flatnonzero(edges[:, c] == -1) - np.flatnonzero(edges[:, c] == 1) for c in range(4)])
    assert runs.size > 150
    assert runs.mean() / RATE_HZ == pytest.approx(rice_s, rel=0.25)
    default = RippleDetector(RATE_HZ, 4)
    assert default._min_samples / RATE_HZ > 1.4 * rice_s


def test_no_detection_before_the_warm_up_nor_in_noise():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((int(RATE_HZ * 30), 4)) * 10
    det = RippleDetector(RATE_HZ, 4, warm_up_s=5.0)
    # A strong 200 Hz burst at 2 s, before the baseline is learned, is not acted on.
    x[3000:3075] += 200 * np.sin(2 * np.pi * 200 * np.arange(75) / RATE_HZ)[:, None]
    assert _run(det, x) == []
    assert det.ready_


def test_after_a_gap_the_filter_settles_before_it_detects():
    rng = np.random.default_rng(4)
    x = rng.standard_normal((int(RATE_HZ * 20), 4)) * 10
    det = RippleDetector(RATE_HZ, 4, warm_up_s=5.0, settle_s=0.05)
    assert _run(det, x) == []
    det.restart()
    # A step of 5 mV right after the gap rings the band-pass; the settling time hides it.
    step = np.full((int(RATE_HZ * 0.04), 4), 5000.0)
    assert _run(det, step) == []


def test_bad_settings_are_refused_with_a_reason():
    with pytest.raises(ValueError, match="min_channels"):
        RippleDetector(RATE_HZ, 4, min_channels=5)
    with pytest.raises(ValueError, match="end_sd"):
        RippleDetector(RATE_HZ, 4, threshold_sd=2.0, end_sd=2.0)
