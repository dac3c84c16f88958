"""The mark model's cross-validation folds, behind the calibration of clusterless decoding.

References: a brute-force evaluation of the marked point-process likelihood
as published (Kloosterman et al. 2014, J Neurophysiol 111:217, lambda(a, x)
= mu p(a, x) / pi(x), with the kernel density over the encoding spikes;
Deng et al. 2015, Neural Comput 27:1438; the formula from memory), on the
encoding spikes of every fold but the held-out one; reservoir sampling
(Vitter 1985, ACM Trans Math Softw 11:37), whose kept sample must carry
each spike's own fold. The spikes are drawn at random for each check; they
are test inputs, not a claim about real recordings.
"""

import math

import numpy as np
import pytest

from decoder.encoding.mark_model import FILE_FORMAT, MarkModel
from decoder.encoding.model_file import read_model_file, write_model_file
from decoder.space.environments import LinearTrack

TRACK = LinearTrack((0, 0), (100, 0), bin_cm=10)


def _learned(rng, n_spikes=90, channels=3, bandwidth_uv=15.0, smooth_cm=12.0, cap=20_000, n_folds=3):
    model = MarkModel(TRACK, bandwidth_uv=bandwidth_uv, smooth_cm=smooth_cm, cutoff_sd=50.0,
                      max_spikes_per_group=cap)
    centers = TRACK.bin_centers_cm
    for g in range(2):
        model.add_group(10 + g, channels)
        xy = centers[rng.integers(0, TRACK.n_bins, n_spikes)]
        marks = (60 + 40 * rng.random((n_spikes, channels))).astype(np.float32)
        t = np.sort(rng.uniform(0, 30, n_spikes))
        model.update(np.full(n_spikes, 10 + g), marks, xy, np.full(n_spikes, 10.0), t_s=t,
                     folds=(t // 10).astype(np.int64) % n_folds)
    return model


@pytest.mark.parametrize("learned", [None, np.arange(TRACK.n_bins) < 7], ids=["every-bin-learned", "edge-unlearned"])
def test_a_fold_model_weighs_held_out_windows_as_the_published_formula_without_that_fold(learned):
    rng = np.random.default_rng(21)
    bw, sx, dt, fold = 15.0, 12.0, 0.02, 1
    model = _learned(rng, bandwidth_uv=bw, smooth_cm=sx)
    occupancy_without = np.where(TRACK.valid_mask, 1.0 + rng.random(TRACK.n_bins), 0.0)
    held_out = model.without_fold(fold, occupancy_without, TRACK.valid_mask, learned)
    learned = np.ones(TRACK.n_bins, bool) if learned is None else learned
    windows = [(np.array([0, 1, 1]), (60 + 40 * rng.random((3, 3))).astype(np.float32)),
               (np.zeros(0, np.int64), np.zeros((0, 3), np.float32)),
               (np.array([1]), (60 + 40 * rng.random((1, 3))).astype(np.float32))]
    index = np.concatenate([np.full(len(g), i) for i, (g, _) in enumerate(windows)])
    groups = np.concatenate([10 + g for g, _ in windows])
    marks = np.concatenate([m for _, m in windows])
    log_like, expected = held_out.step_terms(index, groups, marks, len(windows), dt)

    x = TRACK.bin_centers_cm[:, 0]
    gx = np.exp(-0.5 * ((x[:, None] - x[None, :]) / sx) ** 2)  # position kernel between bin centres
    occ_smooth = gx @ occupancy_without
    ground = np.zeros(TRACK.n_bins)
    for g in range(2):
        # The encoding spikes of the other folds, and the fold's own where the others learned nothing.
        others = (model._folds[g] != fold) | ~learned[model._bins[g]]
        enc_x = x[model._bins[g][others]]
        ground += np.array([np.exp(-0.5 * ((xj - enc_x) / sx) ** 2).sum() for xj in x])
    # Source: Lambda(x) = sum_i K_x(x - x_i) / sum_t K_x occ, the ground process of the same publication.
    np.testing.assert_allclose(expected, dt * ground / occ_smooth, rtol=1e-9)
    for i, (g_rows, m_rows) in enumerate(windows):
        brute = np.zeros(TRACK.n_bins)
        for g, m in zip(g_rows, m_rows):
            others = (model._folds[g] != fold) | ~learned[model._bins[g]]
            enc_m = model._marks[g][others].astype(np.float64)
            enc_x = x[model._bins[g][others]]
            km = np.exp(-0.5 * (((enc_m - m.astype(np.float64)) / bw) ** 2).sum(axis=1)) / (2 * np.pi * bw * bw) ** 1.5
            for j in range(TRACK.n_bins):
                brute[j] += math.log(np.sum(km * np.exp(-0.5 * ((x[j] - enc_x) / sx) ** 2)) / occ_smooth[j])
        # Source: sum_k log lambda(m_k, x) (Kloosterman et al. 2014), float32 marks and float64 sums.
        np.testing.assert_allclose(log_like[i], brute, rtol=1e-6, atol=1e-9)
    # The fold left out is the one asked for: its spikes were there, and the full model weighs them.
    assert all((model._folds[g] == fold).any() for g in range(2))
    assert held_out.group_scale_.tolist() == model.fit(occupancy_without, TRACK.valid_mask).group_scale_.tolist()
    assert not np.allclose(held_out.ground_total_hz_, model.ground_total_hz_)


def test_the_reservoir_keeps_each_spike_with_its_own_fold_and_counts_every_fold():
    model = MarkModel(TRACK, max_spikes_per_group=40, seed=3)
    model.add_group(1, 4)
    rng = np.random.default_rng(22)
    for batch in range(12):
        folds = rng.integers(0, 4, 30)
        marks = np.column_stack([folds * 100.0, rng.random((30, 3))]).astype(np.float32)   # the fold in the mark
        xy = np.column_stack([rng.uniform(0, 100, 30), np.zeros(30)])
        model.update(np.ones(30, np.int64), marks, xy, np.full(30, 10.0), folds=folds)
    # Source: Algorithm R (Vitter 1985) moves a spike with everything it carries; our check: the fold kept
    # beside each kept spike is the one written into its mark.
    assert model._kept[0] == 40
    np.testing.assert_array_equal(model._folds[0], (model._marks[0][:, 0] / 100).astype(np.int64))
    assert model._placed_counts[0].shape == (4, TRACK.n_bins) and model._placed_counts[0].sum() == 360


def test_folds_survive_the_model_file_and_an_older_file_reads_as_one_fold(tmp_path):
    model = _learned(np.random.default_rng(23))
    model.save(tmp_path / "marks.npz")
    again = MarkModel.load(tmp_path / "marks.npz")
    for g in range(2):
        np.testing.assert_array_equal(again._folds[g], model._folds[g])
        np.testing.assert_array_equal(again._placed_counts[g], model._placed_counts[g])
    # A file written before the folds were kept: one placed count per bin and no folds.
    header, arrays = read_model_file(tmp_path / "marks.npz", lambda h, a: (h, dict(a)), format_name=FILE_FORMAT)
    for g in range(2):
        arrays[f"placed_{g}"] = arrays[f"placed_{g}"].sum(axis=0)
        del arrays[f"folds_{g}"]
    write_model_file(tmp_path / "old.npz", header, arrays, format_name=FILE_FORMAT)
    old = MarkModel.load(tmp_path / "old.npz")
    assert old._placed_counts[0].shape == (1, TRACK.n_bins) and not old._folds[0].any()
    occupancy = np.full(TRACK.n_bins, 2.0)
    np.testing.assert_allclose(old.fit(occupancy, TRACK.valid_mask).ground_total_hz_,
                               model.fit(occupancy, TRACK.valid_mask).ground_total_hz_, rtol=1e-12)


def test_a_place_model_without_spikes_is_calibrated_on_the_marks_alone():
    """Units announced but never firing (a rig that sends marks only): the held-out steps are the marks'."""
    from decoder.encoding.place_model import PlaceModel

    rng = np.random.default_rng(24)
    track = LinearTrack((0, 0), (200, 0), bin_cm=5)
    step_s, dt = 0.02, 0.02
    t = np.arange(0.0, 160.0, dt)
    x = 100 + 95 * np.sin(2 * np.pi * t / 16.0)          # back and forth along the track, a lap in 16 s
    xy = np.column_stack([x, np.zeros(t.size)])
    place = PlaceModel(track, unit_ids=[7, 8], cv_folds=2, cv_block_s=20.0)
    place.update_frames(t, xy)
    marks = MarkModel(track, bandwidth_uv=10.0, smooth_cm=5.0)
    marks.add_group(1, 4)
    centres = np.linspace(15, 185, 8)
    amplitudes = rng.uniform(60, 250, (8, 4))
    for lo in range(0, t.size, 500):
        tt, xx = t[lo:lo + 500], x[lo:lo + 500]
        rate = 25 * np.exp(-0.5 * ((xx[:, None] - centres[None]) / 10) ** 2) * dt   # 8 place cells, one tetrode
        n = rng.poisson(rate)
        cell = np.concatenate([np.repeat(c, n[:, c].sum()) for c in range(8)])
        at = np.concatenate([np.repeat(np.arange(len(tt)), n[:, c]) for c in range(8)])
        order = np.argsort(tt[at], kind="stable")
        cell, at = cell[order], at[order]
        spike_t = tt[at] + rng.uniform(-dt, 0, at.size)
        m = (amplitudes[cell] + rng.normal(0, 8, (at.size, 4))).astype(np.float32)
        marks.update(np.ones(at.size, np.int64), m, xy[lo:lo + 500][at], np.full(at.size, 20.0), t_s=spike_t,
                     folds=place.fold_of(spike_t))
    place.fit()
    marks.fit(place.occupancy_s_, place.visited_mask_)
    fit = place.calibrate(step_s, marks)
    # Our own checks on invented data: the fit ran on the newest minute of marks (3,000 steps of 20 ms, less
    # the last partial step), decoded with them, and the decoded track position is far better than chance.
    assert fit.with_marks and fit.n_steps > 2500 and fit.temperature >= 1.0
    assert min(fit.map_median_cm, fit.mean_median_cm) < 15.0
    with pytest.raises(ValueError, match="held-out"):
        place.calibrate(step_s)   # the units alone hold nothing to fit on


def _stream(cap, counters):
    from decoder.config import MarkSettings, SessionSettings
    from decoder.messages import GroupAnnounce
    from decoder.session.marks import MarkStream

    stream = MarkStream(MarkSettings(enabled=True, max_spikes_per_step=cap), SessionSettings(), TRACK, 12.0, 3.0,
                        0.01, counters)
    stream.announce(GroupAnnounce("ephys", 0, [10, 11], [3, 3]))
    return stream


def test_a_held_out_step_weighs_the_marks_a_live_step_weighs_under_the_cap_per_step():
    rng = np.random.default_rng(5)
    model = _learned(rng).fit(np.full(TRACK.n_bins, 2.0), TRACK.valid_mask)
    step_s, cap, n_steps = 0.02, 3, 4
    # Steps of 0, 2, 5 and 7 spikes: the last two beyond the cap of [marks] max_spikes_per_step.
    per_step = [0, 2, 5, 7]
    index = np.repeat(np.arange(n_steps), per_step)
    t = (index + rng.uniform(0.05, 0.95, index.size)) * step_s
    order = np.lexsort((t, index))
    index, t = index[order], t[order]
    groups = 10 + rng.integers(0, 2, index.size)
    marks = (60 + 40 * rng.random((index.size, 3))).astype(np.float32)
    counters = {}
    live = _stream(cap, counters)
    live.install(model, step_s)
    live.take((t, groups, marks), -math.inf)
    held, _ = model.step_terms(index, groups, marks, n_steps, step_s, max_spikes_per_step=cap)
    for k in range(n_steps):
        log_like, _ = live.terms((k + 1) * step_s)
        # The same bound, the same spikes (the first in time order), the same terms.
        np.testing.assert_array_equal(held[k], log_like)
    assert counters["mark_spikes_over_cap"] == (5 - cap) + (7 - cap)
    every, _ = model.step_terms(index, groups, marks, n_steps, step_s)
    assert not np.allclose(every[3], held[3]) and np.array_equal(every[1], held[1])


def test_marks_dropped_while_waiting_for_the_tracker_still_reach_the_held_out_steps(monkeypatch):
    from decoder.session import marks as marks_module
    from decoder.session.tracking import TrackHistory

    monkeypatch.setattr(marks_module, "MAX_PENDING_MARKS", 10)
    counters = {}
    stream = _stream(2000, counters)
    stream.start_learning(lambda t: np.zeros(np.shape(t), np.int64))
    silent = TrackHistory()   # no frame: nothing is placed, everything waits
    rng = np.random.default_rng(8)
    t = np.sort(rng.uniform(0.0, 0.6, 18))
    for part in np.split(np.arange(18), 3):
        stream.learn((t[part], np.full(part.size, 10), np.full((part.size, 3), 80.0, np.float32)), silent)
    assert counters["mark_pending_dropped"] == 12 and stream.learning.counters_["spikes_placed"] == 0
    # A live step would have decoded the dropped spikes, so the held-out buffer has them (held_out.HeldOutSpikes).
    _, _, ids, _ = stream.learning.held_out.step_spikes(0.02)
    first, last = stream.learning.held_out.step_range(0.02)
    assert ids.size == int(np.count_nonzero((t[:12] > (first - 1) * 0.02) & (t[:12] <= last * 0.02)))
