"""Content decoding of candidate replay events: short bins, the uniform prior, causal sequence measures, content rules."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from decoder.config import ConfigError, RippleSettings, SafetyCaps, TriggerRule
from decoder.session.replay_content import ReplayContent, SequenceMeasures, zone_distances_cm
from decoder.session.triggers import TriggerBank
from decoder.space.environments import LinearTrack

TRACK = LinearTrack((0, 0), (100, 0), bin_cm=5)
N_BINS = TRACK.n_bins  # 20
END = np.zeros((1, N_BINS), bool)
END[0, -2:] = True  # the zone: the last 10 cm of the track


def _place_maps(n_units: int = 20, peak_hz: float = 40.0, sigma_cm: float = 6.0) -> np.ndarray:
    centres = np.linspace(2.5, 97.5, n_units)
    x = TRACK.bin_centers_cm[:, 0]
    return 0.5 + peak_hz * np.exp(-0.5 * ((x[None, :] - centres[:, None]) / sigma_cm) ** 2)


def _direct_line(times: np.ndarray, posteriors: np.ndarray, distance: np.ndarray) -> tuple[float, float]:
    """Weighted Pearson correlation and weighted least-squares slope, straight from their definitions."""
    t = np.repeat(times, posteriors.shape[1])
    d = np.tile(distance, times.size)
    w = posteriors.ravel()
    mt, md = np.sum(w * t) / w.sum(), np.sum(w * d) / w.sum()
    ctd = np.sum(w * (t - mt) * (d - md)) / w.sum()
    ctt = np.sum(w * (t - mt) ** 2) / w.sum()
    cdd = np.sum(w * (d - md) ** 2) / w.sum()
    return ctd / math.sqrt(ctt * cdd), ctd / ctt


def _weighted_median(values: np.ndarray, weights: np.ndarray) -> float:
    """numpy's weighted quantile at 1/2, inverted CDF: the lower weighted median."""
    return float(np.quantile(values, 0.5, method="inverted_cdf", weights=weights))


def test_the_median_distance_is_numpys_weighted_median():
    rng = np.random.default_rng(5)
    dist = zone_distances_cm(TRACK, END)
    m = SequenceMeasures(END, dist)
    for post in rng.dirichlet(np.full(N_BINS, 0.3), 50):
        # numpy.quantile(method="inverted_cdf", weights=...): the reference weighted median.
        assert m.median_distance(post)[0] == _weighted_median(dist[0], post)
    # A posterior with 60% of its mass 15 cm from the zone and 40% at the far end, 87.5 cm away:
    # the median stays with the bulk, where the mean (44 cm) would sit between the two.
    post = np.zeros(N_BINS)
    post[[15, 0]] = 0.6, 0.4
    assert m.median_distance(post)[0] == pytest.approx(dist[0][15])


def test_running_measures_equal_the_definitions_at_every_bin():
    rng = np.random.default_rng(3)
    n_t = 8
    post = rng.dirichlet(np.full(N_BINS, 0.3), n_t)
    dist = zone_distances_cm(TRACK, END)
    times = 0.0075 + 0.015 * np.arange(n_t) + 12.0
    m = SequenceMeasures(END, dist)
    for k in range(n_t):
        m.add(times[k], post[k])
        r, slope = m.line()
        if k == 0:
            assert np.isnan(r[0]) and np.isnan(slope[0])
            continue
        want_r, want_slope = _direct_line(times[:k + 1], post[:k + 1], dist[0])
        # The definition of the weighted correlation (Davidson et al. 2009, Neuron 63:497 use it on
        # posterior-weighted time and position), computed directly; agreement to rounding.
        assert r[0] == pytest.approx(want_r, abs=1e-9)
        assert slope[0] == pytest.approx(want_slope, rel=1e-9)
        # numpy's weighted covariance (np.cov with aweights), an independent implementation.
        c = np.cov(np.vstack([np.repeat(times[:k + 1], N_BINS), np.tile(dist[0], k + 1)]),
                   aweights=post[:k + 1].ravel())
        assert r[0] == pytest.approx(c[0, 1] / math.sqrt(c[0, 0] * c[1, 1]), abs=1e-9)
        # numpy.polyfit's weighted least squares (weights on residuals, hence the square root).
        fit = np.polyfit(np.repeat(times[:k + 1], N_BINS), np.tile(dist[0], k + 1), 1,
                         w=np.sqrt(post[:k + 1].ravel()))
        assert slope[0] == pytest.approx(fit[0], rel=1e-7)
        np.testing.assert_allclose(m.mean_mass, [post[:k + 1, -2:].sum(axis=1).mean()], rtol=1e-12)
        # Kendall's tau-b of time and each bin's median distance: scipy.stats.kendalltau (tau-b by
        # default) on medians from numpy's weighted quantile (inverted CDF: the least value whose
        # cumulative weight reaches one half, the lower weighted median).
        medians = [_weighted_median(dist[0], p) for p in post[:k + 1]]
        want_tau = stats.kendalltau(times[:k + 1], medians).statistic
        assert m.rank_correlation()[0] == pytest.approx(want_tau, abs=1e-12)


def test_rank_correlation_counts_ties_as_tau_b_does_and_shrugs_off_one_far_bin():
    dist = zone_distances_cm(TRACK, END)
    m = SequenceMeasures(END, dist)
    # One-hot posteriors: a sweep towards the zone (the last 10 cm) that ends inside it (two bins at
    # distance 0: a tie), its fifth bin decoded at the track's far end, 90 cm from the zone.
    bins = [8, 11, 14, 17, 0, 18, 19]
    times = 0.0075 + 0.015 * np.arange(len(bins))
    for t, b in zip(times, bins):
        m.add(t, np.eye(N_BINS)[b])
    d = dist[0][bins]
    # scipy.stats.kendalltau's tau-b, ties included.
    assert m.rank_correlation()[0] == pytest.approx(stats.kendalltau(times, d).statistic, abs=1e-12)
    # The far bin pulls the least-squares correlation to -0.35; the rank correlation stays at -0.59.
    assert m.rank_correlation()[0] < -0.55 and m.line()[0][0] > -0.4


def test_zone_distances_follow_the_track():
    d = zone_distances_cm(TRACK, END)[0]
    x = TRACK.bin_centers_cm[:, 0]
    # Along a straight track, the distance to the nearest zone bin centre is the difference in x (geometry).
    np.testing.assert_allclose(d, np.maximum(92.5 - x, 0.0), atol=1e-9)


def test_one_bin_is_the_poisson_posterior_with_a_uniform_prior():
    maps = _place_maps()
    content = ReplayContent.for_model(maps, TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.1)
    t = np.array([0.101, 0.104, 0.109, 0.112])
    units = np.array([3, 4, 4, 17])
    content.take_spikes(t, units)
    content.begin(0.1)
    (b,) = content.due(0.115)
    counts = np.bincount(units, minlength=maps.shape[0])
    # Zhang et al. 1998 (J Neurophysiol 79:1017): P(x | n) ∝ prod_i Poisson(n_i; tau lambda_i(x)),
    # with scipy.stats.poisson as the reference pmf and a flat prior.
    log_post = stats.poisson.logpmf(counts[:, None], 0.015 * maps).sum(axis=0)
    want = np.exp(log_post - log_post.max())
    np.testing.assert_allclose(b.posterior, want / want.sum(), rtol=1e-9, atol=1e-15)
    assert b.n_spikes == 4 and b.index == 0 and b.t_s == pytest.approx(0.115)


def test_the_resting_animals_own_place_is_a_background_not_the_content():
    maps = _place_maps()
    content = ReplayContent.for_model(maps, TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.1,
                                      rate_floor_hz=0.01)
    # The animal rests at 12 cm (bin 2): units 2 and 3 fire there; the replay's units 15 and 16 at 80 cm.
    t = np.array([0.101, 0.103, 0.104, 0.106, 0.108, 0.109, 0.111])
    units = np.array([2, 15, 3, 16, 15, 2, 16])
    content.take_spikes(t, units)
    content.begin(0.1, resting_xy_cm=np.array([12.0, 0.0]))
    (b,) = content.due(0.115)
    counts = np.bincount(units, minlength=maps.shape[0])
    # Poisson processes superpose with their intensities added (common practice): each unit's rate is
    # r(x) + r(a) with a the animal's bin; scipy.stats.poisson the reference pmf, flat prior.
    rates = np.maximum(maps, 0.01)
    log_post = stats.poisson.logpmf(counts[:, None], 0.015 * (rates + rates[:, 2:3])).sum(axis=0)
    want = np.exp(log_post - log_post.max())
    np.testing.assert_allclose(b.posterior, want / want.sum(), rtol=1e-9, atol=1e-15)
    # The replayed place (unit 15's and 16's fields, 77.5 and 82.5 cm) carries the bin; without the
    # background the resting animal's spikes pull it towards a place between the two.
    assert abs(b.map_xy_cm[0] - 80.0) <= 5.0


def _sweep(content: ReplayContent, onset_s: float, forward: bool, speed_cm_s: float = 600.0) -> None:
    """Units fire in the order of their fields along the track, forwards or backwards, from ``onset_s``."""
    t = onset_s + np.arange(0.0005, 100.0 / speed_cm_s, 0.0025)
    x = (t - onset_s) * speed_cm_s
    unit = np.clip(np.round(x / 100.0 * 19).astype(np.int64), 0, 19)
    content.take_spikes(t, unit if forward else 19 - unit)


def test_a_sweep_towards_the_zone_has_a_negative_slope_and_strong_correlation():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.15)
    _sweep(content, 5.0, forward=True)
    content.begin(5.0)
    assert content.due(5.01) == []  # no bin closes before the spike stream passes its end
    bins = content.due(5.2)
    assert len(bins) == 10 and not content.active  # 0.15 s of 15 ms bins, then the event ends
    last = bins[-1]
    assert last.correlation[0] < -0.9
    assert -800.0 < last.slope_cm_s[0] < -400.0  # the sweep's 600 cm/s, to within the bins' blur
    content.begin(6.0)
    _sweep(content, 6.0, forward=False)
    away = content.due(6.2)[-1]
    assert away.correlation[0] > 0.9 and away.slope_cm_s[0] > 0


def test_the_event_ends_at_its_lfp_offset_not_with_a_lull_in_the_spikes():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.3,
                                      min_spikes=4)
    t = np.concatenate([np.arange(2.0005, 2.015, 0.002), np.arange(2.0305, 2.06, 0.002)])  # bin 1 silent
    content.take_spikes(t, np.full(t.size, 5))
    content.begin(2.0)
    # Until the offset is known, a bin waits for the LFP to pass its start with the event still on.
    assert [b.index for b in content.due(2.2, lfp_s=2.01)] == [0]
    assert [b.index for b in content.due(2.2, lfp_s=2.031)] == [1, 2]
    assert content.active  # the silent bin (below min_spikes) left the event running
    content.close(2.061)
    bins = content.due(2.2)
    # Bins that begin before the offset are decoded (bin 4 starts at 2.060); none begins at or after it.
    assert [b.index for b in bins] == [3, 4] and not content.active
    assert bins[-1].n_used == 3  # bins 0, 2 and 3 have spikes enough: the measures cover them


def test_bins_start_their_lead_before_the_onset_and_those_before_it_are_decoded_at_once():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.3,
                                      lead_s=0.02)
    burst = np.arange(9.9805, 10.03, 0.001)  # 1 spike per ms from 19.5 ms before the onset
    content.take_spikes(burst, np.full(burst.size, 3))
    content.begin(10.0)
    (first,) = content.due(10.0)  # the bin before the onset is complete when the ripple is detected
    assert first.start_s == pytest.approx(9.98) and first.onset_s == 10.0
    assert first.t_s == pytest.approx(9.995) and first.n_spikes == 15
    with pytest.raises(ValueError, match="lead_s"):
        ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.03,
                                lead_s=0.05)


def test_spikes_before_the_onset_and_of_unknown_units_stay_out():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.03,
                                      unit_ids=np.arange(100, 120))
    content.take_spikes(np.array([0.995, 1.001, 1.002, 1.003]), np.array([100, 101, 7, 119]))
    content.begin(1.0)
    (first, second) = content.due(1.05)
    assert first.n_spikes == 2 and second.n_spikes == 0


def test_a_state_space_decoder_is_refused():
    from decoder.inference.decoding import BayesDecoder
    dec = BayesDecoder(_place_maps(), TRACK, TRACK.valid_mask, window_s=0.015, prior="state_space")
    with pytest.raises(ValueError, match="uniform prior"):
        ReplayContent(dec, np.arange(20), END, zone_distances_cm(TRACK, END), 0.1)


# -- content rules ------------------------------------------------------------------------------------


def _bank(*rules: TriggerRule, caps: SafetyCaps | None = None) -> TriggerBank:
    bank = TriggerBank(rules, ["goal"], caps or SafetyCaps(refractory_s=0.5))
    bank.arm(0.0)
    return bank


def _judge(bank: TriggerBank, t: float, index: int, mass: float = 0.0, towards: float = float("nan"),
           away: float = float("nan"), speed: float = 0.0):
    return bank.content(t, index, index + 1, np.array([mass]), np.array([[towards], [away]]), np.array([1.0, 1.0]),
                        speed, 0.0)


def test_mass_rule_fires_once_per_event_after_min_bins():
    bank = _bank(TriggerRule("well", zone="goal", kind="replay_mass", min_mass=0.6, min_bins=3))
    assert _judge(bank, 1.015, 0, mass=0.9) == []
    assert _judge(bank, 1.030, 1, mass=0.9) == []
    (ev,) = _judge(bank, 1.045, 2, mass=0.9)
    assert ev.rule == "well" and ev.zone == "goal" and ev.zone_mass == pytest.approx(0.9)
    assert _judge(bank, 1.060, 3, mass=0.9) == []  # spent for this event
    assert len(_judge(bank, 3.045, 2, mass=0.9)) == 0  # still the same event: no index 0 seen
    _judge(bank, 5.015, 0, mass=0.1)  # a new event clears the rule
    _judge(bank, 5.030, 1, mass=0.1)
    assert _judge(bank, 5.045, 2, mass=0.5) == []
    assert len(_judge(bank, 5.060, 3, mass=0.7)) == 1


def test_towards_and_away_rules_read_their_row_of_the_log_odds():
    towards = TriggerRule("to", zone="goal", kind="replay_towards", min_log_odds=2.0, min_bins=2)
    away = TriggerRule("from", zone="goal", kind="replay_away", min_log_odds=2.0, min_bins=2)
    bank = _bank(towards, away)
    _judge(bank, 1.015, 0, towards=9.0, away=9.0)  # one bin: below min_bins
    assert [e.rule for e in _judge(bank, 1.030, 1, towards=2.5, away=-4.0)] == ["to"]
    _judge(bank, 3.015, 0)
    assert [e.rule for e in _judge(bank, 3.030, 1, towards=-4.0, away=2.5)] == ["from"]
    _judge(bank, 5.015, 0)
    # The threshold is strict, and NaN satisfies no rule.
    assert _judge(bank, 5.030, 1, towards=2.0, away=2.0) == [] and _judge(bank, 5.045, 2) == []


def test_content_rules_sit_beneath_the_caps_and_speed_bounds():
    rule = TriggerRule("well", zone="goal", kind="replay_mass", min_mass=0.5, min_bins=1, max_speed_cm_s=4.0)
    bank = _bank(rule, caps=SafetyCaps(refractory_s=2.0, max_per_session=2))
    assert _judge(bank, 1.0, 0, mass=0.9, speed=10.0) == []  # moving: the speed bound fails
    assert _judge(bank, 1.2, 0, mass=0.9, speed=float("nan")) == []  # unknown speed satisfies no bound
    assert len(_judge(bank, 1.4, 0, mass=0.9)) == 1
    assert _judge(bank, 2.0, 0, mass=0.9) == [] and bank.counters["refractory"] == 1
    assert len(_judge(bank, 4.0, 0, mass=0.9)) == 1
    assert not bank.armed and bank.disarm_reason == "session_cap"
    assert _judge(bank, 7.0, 0, mass=0.9) == [] and bank.counters["session_cap"] == 1
    stalled = _bank(rule)
    assert stalled.content(1.0, 0, 1, np.array([0.9]), np.zeros((2, 1)), np.array([1.0, 1.0]), 0.0,
                            5.0) == []
    assert stalled.disarm_reason == "stall"


def test_content_rule_settings_are_checked():
    with pytest.raises(ValueError, match="zone"):
        TriggerRule("x", kind="replay_towards")
    with pytest.raises(ValueError, match="min_log_odds"):
        TriggerRule("x", zone="goal", kind="replay_away", min_log_odds=-0.5)
    with pytest.raises(TypeError, match="min_correlation"):  # no longer a rule's setting (the config names it)
        TriggerRule("x", zone="goal", kind="replay_away", min_correlation=0.5)
    with pytest.raises(ValueError, match="min_bins"):
        TriggerRule("x", zone="goal", kind="replay_mass", min_bins=0)
    with pytest.raises(ValueError, match="not among the zones"):
        TriggerBank([TriggerRule("x", zone="elsewhere", kind="replay_mass")], ["goal"])
    with pytest.raises(ConfigError, match="content_bin_s"):
        RippleSettings(content_bin_s=0.5)
    with pytest.raises(ConfigError, match="content_max_s"):
        RippleSettings(content_bin_s=0.02, content_max_s=0.01)
    with pytest.raises(ConfigError, match="content_lead_s"):
        RippleSettings(content_lead_s=-0.01)
    assert "content_bin_s" not in RippleSettings().detector_kwargs()


# -- the ripple stream: detections start events, spikes fill their bins, content rules judge them ------


def _run_stream(seed: int = 2):
    from decoder.session.ripples import ContentOutput, RippleStream
    from decoder.session.tracking import TrackHistory
    from decoder.signals.lfp_chunk import LfpChunk
    from rig_adapters.sim.lfp import LfpSettings, LfpSynth

    rate, duration = 1500.0, 40.0
    synth = LfpSynth(LfpSettings(rate_hz=rate, n_channels=4, ripple_rate_hz=1.0, ripple_duration_s=(0.06, 0.1)), seed)
    speed = np.zeros(int(rate * duration))
    speed[:int(rate)] = 10.0  # a short run first: ripples come once the animal has come to rest
    x = synth.block(speed)
    settings = RippleSettings(source="lfp", warm_up_s=5.0, baseline_window_s=20.0, content_max_s=0.1)
    bank = TriggerBank([TriggerRule("to", zone="goal", kind="replay_towards", min_log_odds=3.0, min_bins=3)],
                       ["goal"], SafetyCaps(refractory_s=0.25, max_per_minute=200))
    bank.arm(0.0)
    tracked = TrackHistory(keep_s=duration + 1)
    frames = np.arange(0.0, duration, 0.05)
    tracked.add(frames.tolist(), [[50.0, 0.0]] * frames.size)
    stream = RippleStream(settings, bank, tracked)
    stream.content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=settings.content_bin_s,
                                             max_event_s=settings.content_max_s, lead_s=settings.content_lead_s)
    # Every other ripple's place cells sweep towards the zone (the track's far end), the others away from it.
    spike_t, spike_u, forward = [], [], []
    for i, r in enumerate(synth.ripples):
        t = r.start_s + np.arange(0.0005, r.end_s - r.start_s, 0.0025)
        x_cm = 100.0 * (i % 2) + (1 - 2 * (i % 2)) * (t - r.start_s) * 600.0
        spike_t.append(t)
        spike_u.append(np.clip(np.round(x_cm / 100.0 * 19), 0, 19).astype(np.int64))
        forward.append(i % 2 == 0)
    t_all, u_all = np.concatenate(spike_t), np.concatenate(spike_u)
    step = 3  # 2 ms chunks
    fed = 0
    ripples, bins = [], []
    for i in range(0, x.shape[0] - step + 1, step):
        end_s = (i + step) / rate
        upto = int(np.searchsorted(t_all, end_s))
        stream.take_spikes(t_all[fed:upto], u_all[fed:upto])
        fed = upto
        chunk = LfpChunk("lfp", i // step, i / rate, rate, x[i:i + step].astype(np.float32))
        for out in stream.take(chunk, end_s):
            (bins if isinstance(out, ContentOutput) else ripples).append(out)
        bins.extend(stream.content_due(end_s))
    return synth.ripples, forward, ripples, bins, stream


def test_the_stream_decodes_each_ripple_and_fires_on_sequences_towards_the_zone():
    truth, forward, ripples, bins, stream = _run_stream()
    assert len(ripples) >= 10
    fired = [e for b in bins for e in b.events]
    hits = wrong = 0
    for r, fwd in zip(truth, forward):
        here = [e for e in fired if r.start_s <= e.t_s <= r.end_s + 0.1]
        if fwd:
            hits += bool(here)
        else:
            wrong += bool(here)
    n_fwd = sum(1 for r, f in zip(truth, forward) if f and r.start_s > 6.0)
    assert hits >= 0.8 * n_fwd and wrong == 0
    assert stream.counters["content_bins"] == len(bins) and stream.counters["events"] == len(fired)
    # Bins start at each event's start and close in order, 15 ms apart; none begins after the
    # event's LFP offset.
    offsets = {r.detection.onset_s: r for r in ripples}
    assert offsets
    for b in bins:
        assert b.content.t_s == pytest.approx(b.content.start_s + 0.015 * (b.content.index + 1))
        # Bins start [ripples] content_lead_s before the onset.
        assert b.content.start_s == pytest.approx(b.content.onset_s - stream.settings.content_lead_s, abs=1e-12)
        # A content event is stamped when it could be known: the bin's end, or the ripple's detection
        # for a bin that ended before it (the bins before the onset are decoded at the detection).
        for e in b.events:
            assert e.t_s == max(b.content.t_s, offsets[b.content.onset_s].t_s)
    ends = {e.onset_s: e.offset_s for e in stream.events_}
    assert len(ends) == len(offsets) and all(np.isfinite(list(ends.values())))
    for b in bins:
        assert b.content.t_s - 0.015 < ends.get(b.content.onset_s, np.inf)


def test_a_second_run_of_the_same_data_reproduces_the_digest():
    assert _run_stream()[4].digest == _run_stream()[4].digest
