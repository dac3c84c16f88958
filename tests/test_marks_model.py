"""The mark encoding model and its kernel against outside references.

References: scikit-learn's ``KernelDensity`` (the Gaussian kernel density in
mark space), a brute-force evaluation of the marked point-process likelihood
as published (Kloosterman et al. 2014, J Neurophysiol 111:217, eq. for
lambda(a, x) = mu p(a, x) / pi(x); Deng et al. 2015, Neural Comput 27:1438),
and the sorted-unit Poisson decoder (Zhang et al. 1998), which the
clusterless posterior must match when the clusters are perfectly separated.
The spikes here are drawn at random for each check; they are test inputs,
not a claim about real recordings.
"""

import math

import numpy as np
import pytest
from sklearn.neighbors import KernelDensity

from decoder.encoding.mark_model import MarkModel
from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Arena, LinearTrack


def _fitted(env, rng, n_groups=2, n_spikes=400, channels=4, bandwidth_uv=15.0, smooth_cm=6.0, cutoff_sd=4.0,
            cap=20_000):
    model = MarkModel(env, bandwidth_uv=bandwidth_uv, smooth_cm=smooth_cm, cutoff_sd=cutoff_sd,
                      max_spikes_per_group=cap)
    centers = env.bin_centers_cm[env.valid_mask]
    for g in range(n_groups):
        model.add_group(10 + g, channels)
        xy = centers[rng.integers(0, len(centers), n_spikes)]
        marks = (60 + 40 * rng.random((n_spikes, channels))).astype(np.float32)
        model.update(np.full(n_spikes, 10 + g), marks, xy, np.full(n_spikes, 10.0))
    occupancy = np.where(env.valid_mask, 1.0 + rng.random(env.n_bins), 0.0)
    return model.fit(occupancy, env.valid_mask), occupancy


@pytest.mark.parametrize("env, by_grid", [
    (LinearTrack((0, 0), (200, 0), bin_cm=5), False),
    (Arena.rectangle(40, 32, bin_cm=4), False),     # too small for the kernel's reach: spread bin by bin
    (Arena.rectangle(100, 80, bin_cm=4), True),     # separable convolution on the grid
    (Arena.circle((50, 50), 50, bin_cm=4), True),
], ids=["track", "small-arena", "arena", "round-arena"])
def test_compiled_kernel_matches_its_numpy_twin(env, by_grid):
    rng = np.random.default_rng(1)
    model, _ = _fitted(env, rng)
    assert (model.grid_nx_ > 0) == by_grid
    rows = rng.integers(0, 2, 30)
    marks = (60 + 40 * rng.random((30, 4))).astype(np.float32)
    fast, slow = np.empty(env.n_bins), np.empty(env.n_bins)
    scratch = model.scratch()
    n_fast = model.log_intensity_sum(rows, marks, fast, scratch)
    n_slow = model.log_intensity_sum(rows, marks, slow, scratch, backend="numpy")
    assert n_fast == n_slow
    # The compiled kernel weighs and smooths in float32 (the marks' own precision): ~1e-7 relative per weight and
    # per smoothed value, up to ~1e-6 where d2 is large; our bound, 1e-6 per spike on the log scale (measured:
    # at most 5e-6 over these 30 spikes). The twin is float64 throughout.
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-6 * rows.size)
    # The buffers that must start clean are left as they were found, so the next call starts clean: histogram,
    # spread, product, the grid's box (weights, smoothed along x) and the spread flags.
    clean = model.scratch()
    for i in (0, 1, 2, 3, 4, 10):
        np.testing.assert_array_equal(scratch[i], clean[i])


def test_mark_density_of_one_bin_matches_sklearn_kernel_density():
    """With a vanishing position smoothing, lambda(x, m) * occ(x) is n_x times the KDE of bin x's marks."""
    env = LinearTrack((0, 0), (50, 0), bin_cm=5)
    rng = np.random.default_rng(2)
    model, occupancy = _fitted(env, rng, n_groups=1, n_spikes=300, bandwidth_uv=12.0, smooth_cm=0.05, cutoff_sd=40.0)
    query = (60 + 40 * rng.random((1, 4))).astype(np.float32)
    out = np.empty(env.n_bins)
    model.log_intensity_sum(np.zeros(1, np.int64), query, out, model.scratch())
    spread_self = model.spread_[2][model.spread_[0][:-1]]   # each bin's own weight (G at distance 0)
    for b in range(env.n_bins):
        in_bin = model._marks[0][model._bins[0] == b].astype(np.float64)
        if len(in_bin) < 5:
            continue
        # scikit-learn's Gaussian KernelDensity with the same isotropic bandwidth, normalised density.
        kde = KernelDensity(bandwidth=12.0, kernel="gaussian").fit(in_bin)
        density = math.exp(kde.score_samples(query.astype(np.float64))[0])
        expected = len(in_bin) * density * spread_self[b] / (spread_self[b] * occupancy[b])
        assert out[b] == pytest.approx(math.log(expected), rel=1e-6)  # float32 marks


def test_window_likelihood_matches_brute_force_published_formula():
    """log L(x) = sum_k log lambda(m_k, x) - dt sum_g Lambda_g(x), lambda = sum_i K_m K_x / sum_t K_x occ (Kloosterman 2014)."""
    env = LinearTrack((0, 0), (100, 0), bin_cm=10)
    rng = np.random.default_rng(3)
    bw, sx, dt = 15.0, 12.0, 0.02
    model, occupancy = _fitted(env, rng, n_groups=2, n_spikes=60, channels=3, bandwidth_uv=bw, smooth_cm=sx,
                               cutoff_sd=50.0)
    x = env.bin_centers_cm[:, 0]
    gx = np.exp(-0.5 * ((x[:, None] - x[None, :]) / sx) ** 2)  # position kernel between bin centres
    occ_smooth = gx @ occupancy
    spikes_g = np.array([0, 1, 1])
    spikes_m = (60 + 40 * rng.random((3, 3))).astype(np.float32)
    brute = np.zeros(env.n_bins)
    for g, m in zip(spikes_g, spikes_m):
        enc_m = model._marks[g].astype(np.float64)
        enc_x = x[model._bins[g]]
        km = np.exp(-0.5 * (((enc_m - m.astype(np.float64)) / bw) ** 2).sum(axis=1)) / (2 * np.pi * bw * bw) ** 1.5
        for j in range(env.n_bins):
            brute[j] += math.log(np.sum(km * np.exp(-0.5 * ((x[j] - enc_x) / sx) ** 2)) / occ_smooth[j])
    ground = np.zeros(env.n_bins)
    for g in range(2):
        ground += np.array([np.sum(np.exp(-0.5 * ((x[j] - x[model._bins[g]]) / sx) ** 2)) for j in range(env.n_bins)])
    brute -= dt * ground / occ_smooth
    ours = np.empty(env.n_bins)
    model.log_intensity_sum(spikes_g, spikes_m, ours, model.scratch())
    ours -= dt * model.ground_total_hz_
    np.testing.assert_allclose(ours, brute, rtol=1e-6)  # float32 marks, float64 sums


def test_separated_clusters_give_the_sorted_units_posterior():
    """Each unit alone on its own far-apart cluster: the clusterless posterior is the sorted-unit posterior."""
    env = LinearTrack((0, 0), (150, 0), bin_cm=5)
    rng = np.random.default_rng(4)
    x = env.bin_centers_cm[:, 0]
    rates = np.stack([0.5 + 20 * np.exp(-0.5 * ((x - c) / 12) ** 2) for c in (30, 75, 120)])
    occupancy = np.full(env.n_bins, 4.0)
    counts = rng.poisson(rates * occupancy)
    model = MarkModel(env, bandwidth_uv=5.0, smooth_cm=0.05, cutoff_sd=6.0)
    model.add_group(1, 4)
    cluster = np.array([[50, 200, 50, 50], [200, 50, 50, 50], [50, 50, 200, 50]], np.float32)
    for u in range(3):
        bins = np.repeat(np.arange(env.n_bins), counts[u])
        marks = cluster[u] + rng.normal(0, 1.0, (bins.size, 4)).astype(np.float32)
        model.update(np.ones(bins.size, np.int64), marks, env.bin_centers_cm[bins], np.full(bins.size, 10.0))
    model.fit(occupancy, env.valid_mask)
    empirical = counts / occupancy
    sorted_dec = BayesDecoder(empirical, env, env.valid_mask, window_s=0.25, rate_floor_hz=1e-3)
    marks_dec = BayesDecoder(np.zeros((0, env.n_bins)), env, env.valid_mask, window_s=0.25)
    fired = np.array([0, 0, 1])
    spike_marks = cluster[fired] + rng.normal(0, 1.0, (3, 4)).astype(np.float32)
    ll = np.empty(env.n_bins)
    model.log_intensity_sum(np.zeros(3, np.int64), spike_marks, ll, model.scratch())
    clusterless = marks_dec.decode([], [], ll, 0.25 * model.ground_total_hz_).posterior
    sorted_post = sorted_dec.decode(np.array([0, 1]), np.array([2, 1])).posterior
    # Within a cluster every kernel weight is ~ the same, so lambda(x, m) ~ c * rate(x): the
    # constants cancel in the posterior, up to each cluster's own spread in mark space.
    np.testing.assert_allclose(clusterless, sorted_post, atol=0.02)


def test_reservoir_keeps_a_bounded_reproducible_sample_and_counts_every_spike():
    env = LinearTrack((0, 0), (100, 0), bin_cm=10)
    runs = []
    for _ in range(2):
        model = MarkModel(env, max_spikes_per_group=50, seed=5)
        model.add_group(2, 4)
        rng = np.random.default_rng(6)
        for _ in range(10):
            xy = np.column_stack([rng.uniform(0, 100, 40), np.zeros(40)])
            model.update(np.full(40, 2), rng.random((40, 4)).astype(np.float32), xy, np.full(40, 10.0))
        runs.append(model)
    a, b = runs
    assert a._kept[0] == 50 and a._placed_counts[0].sum() == 400
    np.testing.assert_array_equal(a._marks[0], b._marks[0])  # same seed, same messages: same sample


def test_mark_model_file_round_trip(tmp_path):
    env = Arena.rectangle(40, 40, bin_cm=5)
    model, occupancy = _fitted(env, np.random.default_rng(7))
    model.save(tmp_path / "marks.npz")
    again = MarkModel.load(tmp_path / "marks.npz").fit(occupancy, env.valid_mask)
    np.testing.assert_array_equal(again.enc_marks_, model.enc_marks_)
    np.testing.assert_array_equal(again.ground_total_hz_, model.ground_total_hz_)


def test_a_saved_and_loaded_model_keeps_the_sample_of_an_uninterrupted_session(tmp_path):
    """Reservoir sampling (Vitter 1985) goes on after a restart: the generators' states are in the file."""
    env = LinearTrack((0, 0), (100, 0), bin_cm=10)
    rng = np.random.default_rng(9)
    batches = [(rng.random((40, 4)).astype(np.float32), np.column_stack([rng.uniform(0, 100, 40), np.zeros(40)]))
               for _ in range(10)]

    def learn(model, part):
        for marks, xy in part:
            model.update(np.full(40, 2), marks, xy, np.full(40, 10.0))
        return model

    whole = MarkModel(env, max_spikes_per_group=50, seed=5)
    whole.add_group(2, 4)
    learn(whole, batches)
    first = MarkModel(env, max_spikes_per_group=50, seed=5)
    first.add_group(2, 4)
    learn(first, batches[:5]).save(tmp_path / "marks.npz")
    resumed = learn(MarkModel.load(tmp_path / "marks.npz"), batches[5:])
    assert resumed._placed_counts[0].sum() == whole._placed_counts[0].sum() == 400
    np.testing.assert_array_equal(resumed._marks[0], whole._marks[0])
    np.testing.assert_array_equal(resumed._bins[0], whole._bins[0])


def test_decoder_takes_mark_terms_and_tempers_them():
    env = LinearTrack((0, 0), (100, 0), bin_cm=10)
    ll = np.linspace(0, 3, 10)
    expected = np.full(10, 0.5)
    hot = BayesDecoder(np.zeros((0, 10)), env, env.valid_mask, 0.1, likelihood_temperature=2.0)
    post = hot.decode([], [], ll, expected).posterior
    ref = np.exp(ll / 2 - ll.max() / 2)
    np.testing.assert_allclose(post, ref / ref.sum(), rtol=1e-12)  # softmax of the tempered log-likelihood
    for backend in ("numba", "numpy"):
        dec = BayesDecoder(np.ones((1, 10)), env, env.valid_mask, 0.1, backend=backend)
        with pytest.raises(ValueError, match="mark_expected"):
            dec.decode([], [], ll, None)
        with pytest.raises(ValueError, match="NaN or infinite"):
            dec.decode([], [], np.full(10, np.nan), expected)


def test_compression_matches_its_twin_and_keeps_the_likelihood_close():
    """Kernel density compression (Sodkomkham et al. 2016): fewer kernels, the same total weight, a close likelihood."""
    from decoder.inference import _mark_kernels as MK
    env = Arena.rectangle(100, 80, bin_cm=4)
    rng = np.random.default_rng(8)
    plain, _ = _fitted(env, rng, n_spikes=3000)
    merged = MarkModel(env, bandwidth_uv=15.0, smooth_cm=6.0, merge_sd=0.5)
    for g in range(2):
        merged.add_group(10 + g, 4)
        merged._marks[g], merged._bins[g], merged._kept[g] = plain._marks[g], plain._bins[g], plain._kept[g]
        merged._placed_counts[g] = plain._placed_counts[g]
    occupancy = np.where(env.valid_mask, 1.0, 0.0)
    plain.fit(occupancy, env.valid_mask)
    merged.fit(occupancy, env.valid_mask)
    assert merged.enc_weights_.sum() == plain.enc_weights_.sum() == 6000
    assert merged.enc_marks_.shape[1] < plain.enc_marks_.shape[1]
    order = np.argsort(plain._bins[0], kind="stable")
    marks, bins = plain._marks[0][order], plain._bins[0][order]
    outs = []
    for kernel in (MK.merge_marks, MK.merge_marks_numpy):
        c, b, w = np.empty_like(marks), np.empty_like(bins), np.empty(len(bins))
        m = kernel(marks, bins, 1 / 15.0, 0.5, c, b, w)
        outs.append((c[:m], b[:m], w[:m]))
    for a, b in zip(*outs):
        np.testing.assert_allclose(a, b, rtol=1e-6)  # float32 centres
    rows = np.array([0, 1, 0])
    query = (60 + 40 * rng.random((3, 4))).astype(np.float32)
    ll_plain, ll_merged = np.empty(env.n_bins), np.empty(env.n_bins)
    plain.log_intensity_sum(rows, query, ll_plain, plain.scratch())
    merged.log_intensity_sum(rows, query, ll_merged, merged.scratch())
    # Merging within half a kernel width moves each kernel by at most that: a bound of our own choosing.
    assert np.max(np.abs(ll_merged - ll_plain)) < 0.3
