"""The walk tilted towards the decoded velocity, checked against outside references.

References used: the exponential tilting of a Gaussian (N(d; 0, s^2) exp(theta d),
renormalised, is N(d; s^2 theta, s^2): completing the square) with scipy.stats.norm
and scipy.stats.truncnorm for its mean and s.d.; the Markov prediction p T with T
written out entry by entry (any probability text); the forward pass of a hidden
Markov model with a transition that changes from step to step (Rabiner 1989, Proc
IEEE 77:257-286, eq. 19-20), written here in plain numpy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from decoder.inference import _kernels as K
from decoder.inference.decoding import MAX_DRIFT_SD, BayesDecoder
from decoder.inference.filtering import filter_posteriors, tempered_log_likelihood
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Arena, LinearTrack, TrackGraph
from decoder.space.headings import HeadingRing

TILTS = [pytest.param(K.tilt_kernels, id="numba"), pytest.param(K.tilt_kernels_numpy, id="numpy")]


@pytest.mark.parametrize("tilt", TILTS)
@pytest.mark.parametrize("mu_sd", [0.0, 0.3, -0.8, 1.5])
def test_tilted_kernel_has_the_closed_form_mean_and_sd(tilt, mu_sd):
    sd_cm, bin_cm = 2.0, 0.01
    reach = round(K_TRUNCATE * sd_cm / bin_cm)
    kernel = np.exp(-0.5 * ((np.arange(-reach, reach + 1) * bin_cm) / sd_cm) ** 2)
    mu_cm = mu_sd * sd_cm
    kx, ky = np.empty_like(kernel), np.empty_like(kernel)
    tilt(kernel, bin_cm, mu_cm / sd_cm**2, -mu_cm / sd_cm**2, kx, ky)
    moves = (reach - np.arange(kernel.size)) * bin_cm  # kernel[k] weighs a move of (r - k) bins
    for weights, mu in ((kx, mu_cm), (ky, -mu_cm)):
        w = weights / weights.sum()
        mean = float(w @ moves)
        sd = math.sqrt(float(w @ (moves - mean) ** 2))
        # Source: scipy.stats.truncnorm — the tilted kernel is N(mu, s^2) cut where the walk's kernel is
        # cut (+-4 s about 0); sampled every s/200 with both cut points in, so the sum differs from the
        # integral by about half a sample times the density at the cut: below 1e-3 s.
        cut = stats.truncnorm((-K_TRUNCATE * sd_cm - mu) / sd_cm, (K_TRUNCATE * sd_cm - mu) / sd_cm, mu, sd_cm)
        assert mean == pytest.approx(cut.mean(), abs=1e-3 * sd_cm)
        assert sd == pytest.approx(cut.std(), rel=1e-3)
        if abs(mu_sd) <= 0.3:
            # Source: scipy.stats.norm — the cut-off removes < 1e-3 of the mass at |mu| <= 0.3 s:
            # Gaussian tilting moves the mean to s^2 theta = mu and keeps the s.d.
            assert mean == pytest.approx(stats.norm(mu, sd_cm).mean(), abs=2e-3 * sd_cm)
            assert sd == pytest.approx(stats.norm(mu, sd_cm).std(), rel=2e-3)


K_TRUNCATE = 4.0


def _tilted_matrix(walk: RandomWalk, theta: np.ndarray) -> np.ndarray:
    """T'[i, j] = T0[i, j] exp(theta . (c_j - c_i)) m_j, rows renormalised; T0 the walk's kernel written out."""
    t0 = walk.dense_matrix()
    c = np.asarray(walk.environment.bin_centers_cm, dtype=float)
    n = c.shape[0]
    out = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            if t0[i, j] > 0:
                out[i, j] = t0[i, j] * math.exp(theta[0] * (c[j, 0] - c[i, 0]) + theta[1] * (c[j, 1] - c[i, 1]))
        if out[i].sum() > 0:
            out[i] /= out[i].sum()
    return out


def _grid_compiled(walk: RandomWalk, p: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """The compiled grid prediction as decode_step runs it with a tilt."""
    ny, nx = walk.environment.grid_shape
    kernel = walk._kernel_1d
    r = kernel.size // 2
    kx, ky = np.empty_like(kernel), np.empty_like(kernel)
    K.tilt_kernels(kernel, walk.environment.bin_cm, theta[0], theta[1], kx, ky)
    y0, y1 = K._support_rows(p, nx, 0, ny - 1)
    inv = np.full(p.size, np.nan)  # whatever the buffer held must not leak in
    grid_scratch = np.zeros((2 * ny + 2 * r) * (nx + 2 * r))
    K._tilted_inv_norm(p, ny, nx, kx, ky, walk._mask_f, walk.interior, y0, y1, inv, grid_scratch)
    out = np.full(p.size, np.nan)
    y0, y1 = K._predict_grid_rows(p, ny, nx, kx, ky, False, walk._mask_f, inv, y0, y1, out, grid_scratch)
    out[: y0 * nx] = 0.0
    out[(y1 + 1) * nx :] = 0.0
    return out


@pytest.mark.parametrize("theta", [(0.3, -0.2), (-0.5, 0.0), (0.0, 0.45)])
def test_tilted_grid_prediction_is_the_reweighted_row_normalised_transition(theta):
    rng = np.random.default_rng(3)
    arena = Arena.circle((20, 20), 19, bin_cm=2.0)
    walk = RandomWalk(arena, arena.valid_mask & (rng.random(arena.n_bins) < 0.9), sd_cm=2.5, backend="numpy")
    theta = np.array(theta)
    t = _tilted_matrix(walk, theta)
    broad = rng.random(arena.n_bins) * walk.valid_mask  # every valid bin: a broad posterior
    broad /= broad.sum()
    p = broad.copy()
    p[: arena.n_bins // 3] = 0.0  # a support that ends inside the grid, and touches the wall
    p /= p.sum()
    expected = p @ t
    # Source: Markov prediction p T with T written out entry by entry (above).
    np.testing.assert_allclose(walk.predict(p, tuple(theta)), expected, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(_grid_compiled(walk, p, theta), expected, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(_grid_compiled(walk, broad, theta), broad @ t, rtol=1e-10, atol=1e-15)
    # Source: a row-stochastic T keeps total probability and puts none on invalid bins (definition).
    assert walk.predict(p, tuple(theta)).sum() == pytest.approx(1.0, rel=1e-12)
    assert np.all(walk.predict(p, tuple(theta))[~walk.valid_mask] == 0.0)


def _inv_norm_bin_by_bin(p, ny, nx, kx, ky, mask_f, interior):
    """1 / sum_j K_tilted(i -> j) m_j on the non-zero bins of p, each bin's reach summed on its own in plain Python.

    The terms in the order the compiled sum keeps: kx[k] ascending within a row of the reach, then the
    rows with ky[k] ascending (kernel[k] weighs a move of r - k bins); interior bins take the full kernels.
    """
    r = kx.size // 2
    full = 1.0 / (sum(kx.tolist()) * sum(ky.tolist()))
    inv = np.zeros(p.size)
    for iy in range(ny):
        for ix in range(nx):
            i = iy * nx + ix
            if p[i] == 0.0:
                continue
            if interior[i]:
                inv[i] = full
                continue
            total = 0.0
            for b in range(2 * r + 1):
                if not 0 <= iy + r - b < ny:
                    continue
                part = 0.0
                for a in range(2 * r + 1):
                    if 0 <= ix + r - a < nx:
                        part += float(kx[a]) * float(mask_f[(iy + r - b) * nx + ix + r - a])
                total += float(ky[b]) * part
            inv[i] = 1.0 / total
    return inv


@pytest.mark.parametrize("rows", [(0, None), (9, 14), (0, 4), (15, None)], ids=["all", "middle", "top", "bottom"])
def test_tilted_normalisers_are_the_bin_by_bin_sums_bit_for_bit(rows):
    # A broad posterior (a high likelihood temperature) on a ragged map of visited bins: most of
    # its bins lie near a wall, where the normaliser is not the full kernels' sum.
    rng = np.random.default_rng(5)
    arena = Arena.circle((20, 20), 19, bin_cm=2.0)
    walk = RandomWalk(arena, arena.valid_mask & (rng.random(arena.n_bins) < 0.8), sd_cm=2.5, backend="numpy")
    ny, nx = arena.grid_shape
    y0, y1 = rows[0], ny - 1 if rows[1] is None else rows[1]
    p = rng.random(arena.n_bins) * walk.valid_mask
    p[: y0 * nx] = 0.0
    p[(y1 + 1) * nx :] = 0.0
    kernel = walk._kernel_1d
    r = kernel.size // 2
    kx, ky = np.empty_like(kernel), np.empty_like(kernel)
    K.tilt_kernels(kernel, arena.bin_cm, 0.35, -0.2, kx, ky)
    inv = np.full(p.size, np.nan)
    grid_scratch = np.full((2 * ny + 2 * r) * (nx + 2 * r), np.nan)  # nothing it held may leak in
    K._tilted_inv_norm(p, ny, nx, kx, ky, walk._mask_f, walk.interior, y0, y1, inv, grid_scratch)
    expected = _inv_norm_bin_by_bin(p, ny, nx, kx, ky, walk._mask_f, walk.interior)
    assert np.count_nonzero((p > 0) & ~walk.interior) > 30
    # Source: definition of the tilted walk's row normaliser (sum of K exp(theta . d) m over the
    # reach), summed bin by bin in the compiled sum's order: equal bit for bit.
    np.testing.assert_array_equal(inv[y0 * nx : (y1 + 1) * nx], expected[y0 * nx : (y1 + 1) * nx])


@pytest.mark.parametrize(
    "environment",
    [LinearTrack((0, 0), (60, 0), bin_cm=2.5), TrackGraph([(0, 0), (0, 40), (30, 40), (30, 0)], [(0, 1), (1, 2), (2, 3)], 2.5),
     HeadingRing(6.0)],
    ids=["track", "graph", "ring"],
)
def test_tilted_dense_prediction_is_the_reweighted_row_normalised_transition(environment):
    rng = np.random.default_rng(4)
    walk = RandomWalk(environment, environment.valid_mask, sd_cm=4.0, backend="numpy")
    theta = np.array([0.15, -0.1])
    p = rng.random(environment.n_bins) * walk.valid_mask
    p /= p.sum()
    expected = p @ _tilted_matrix(walk, theta)
    compiled = K.predict_dense_tilted(p, walk._transition, walk._centers_x, walk._centers_y, *theta,
                                      np.empty(p.size), np.empty(p.size))
    # Source: Markov prediction p T with T written out entry by entry; moves the walk forbids stay forbidden.
    np.testing.assert_allclose(compiled, expected, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(walk.predict(p, tuple(theta)), expected, rtol=1e-10, atol=1e-15)
    assert compiled.sum() == pytest.approx(1.0, rel=1e-12)


def test_tilt_moves_the_mean_along_the_ring_by_the_drift():
    ring = HeadingRing(2.0)
    sd = 6.0
    walk = RandomWalk(ring, ring.valid_mask, sd_cm=sd, backend="numpy")
    p = np.zeros(ring.n_bins)
    p[45] = 1.0  # 90 deg, at (0, R): the tangent pointing to higher headings is -x
    mu_deg = 3.0
    after = walk.predict(p, (-mu_deg / sd**2, 0.0))
    heading = np.arange(ring.n_bins) * 2.0 + 1.0
    moved = float(after @ heading) - 91.0
    # Source: Gaussian tilting (mean s^2 theta = mu); along the ring the planar move is the arc to
    # first order (chord vs arc at 4 s = 24 deg: 0.7 %), sampled at 2-deg bins.
    assert moved == pytest.approx(mu_deg, rel=0.05)


def _forward_pass_with_drift(counts, rates, step_s, walk, uniform_weight, temperature, gain, tau_s):
    """Rabiner's forward pass, each step's transition matrix built in full from the velocity so far."""
    like = np.exp(tempered_log_likelihood(counts, rates, step_s, temperature))
    valid = walk.valid_mask
    c = np.asarray(walk.environment.bin_centers_cm, float)
    uniform = valid / valid.sum()
    cap = MAX_DRIFT_SD * walk.sd_cm
    a = 1.0 - math.exp(-step_s / tau_s)
    alpha = uniform * like[0] * valid
    alpha /= alpha.sum()
    out = [alpha]
    v, last = np.zeros(2), alpha @ c
    for t in range(1, len(counts)):
        mu = gain * v
        mu = mu * min(1.0, cap / max(np.hypot(*mu), 1e-300))
        trans = (1 - uniform_weight) * _tilted_matrix(walk, mu / walk.sd_cm**2) + uniform_weight * uniform
        alpha = (alpha @ trans) * like[t] * valid
        alpha /= alpha.sum()
        out.append(alpha)
        mean = alpha @ c
        d = mean - last
        d = d * min(1.0, cap / max(np.hypot(*d), 1e-300))
        v = v + a * (d - v)
        last = mean
    return np.array(out)


@pytest.mark.parametrize(
    "environment",
    [LinearTrack((0, 0), (50, 0), bin_cm=2.5), Arena.rectangle(24, 16, bin_cm=2.0)],
    ids=["track", "arena"],
)
def test_filter_with_drift_matches_a_forward_pass_with_explicit_transitions(environment):
    rng = np.random.default_rng(9)
    n = environment.n_bins
    centres = np.asarray(environment.bin_centers_cm, float)
    fields = centres[rng.choice(n, 12)]
    rates = 1.0 + 25.0 * np.exp(-0.5 * ((centres[None, :, :] - fields[:, None, :]) ** 2).sum(-1) / 6.0**2)
    path = centres[np.clip(np.arange(60) // 3, 0, n - 1)]  # a steady run, so the velocity builds up
    truth = environment.bin_index(path)
    counts = rng.poisson(0.05 * rates[:, truth].T)
    walk = RandomWalk(environment, environment.valid_mask, sd_cm=2.0, backend="numpy")
    kw = dict(uniform_weight=1e-3, temperature=1.5)
    ours = filter_posteriors(counts, rates, 0.05, walk, drift_gain=0.8, velocity_time_constant_s=0.2, **kw)
    reference = _forward_pass_with_drift(counts, rates, 0.05, walk, kw["uniform_weight"], kw["temperature"], 0.8, 0.2)
    # Source: Rabiner 1989 forward pass with the per-step transitions written out in full.
    np.testing.assert_allclose(ours, reference, rtol=1e-8, atol=1e-12)
    plain = filter_posteriors(counts, rates, 0.05, walk, **kw)
    assert np.abs(ours - plain).max() > 1e-3  # the drift did act

    for backend in ("numba", "numpy"):
        dec = BayesDecoder(rates, environment, environment.valid_mask, 0.05, prior="state_space",
                           random_walk_sd_cm=2.0, likelihood_temperature=1.5, uniform_weight=1e-3, drift_gain=0.8,
                           velocity_time_constant_s=0.2, backend=backend)
        steps = np.array([dec.decode(np.flatnonzero(row), row[row > 0].astype(float)).posterior for row in counts])
        # Source: the same reference; the decoder stores posterior values below UNIFORM_CUTOFF * eps / n_valid
        # as 0 (kernels docstring), which moves each prior value by a relative ~1e-3 at most.
        np.testing.assert_allclose(steps, reference, rtol=0, atol=5e-3)


def test_a_gain_of_zero_is_the_plain_walk_bit_for_bit():
    rng = np.random.default_rng(11)
    arena = Arena.rectangle(40, 30, bin_cm=2.5)
    rates = rng.random((20, arena.n_bins)) * 15
    a = BayesDecoder(rates, arena, arena.valid_mask, 0.02, prior="state_space", random_walk_sd_cm=1.5,
                     uniform_weight=1e-3)
    b = BayesDecoder(rates, arena, arena.valid_mask, 0.02, prior="state_space", random_walk_sd_cm=1.5,
                     uniform_weight=1e-3, drift_gain=0.0, velocity_time_constant_s=0.1)
    for _ in range(40):
        rows = np.arange(20)
        c = rng.poisson(0.4, 20).astype(float)
        # Source: definition — gain 0 takes the untilted branch, so the arithmetic is today's walk's.
        np.testing.assert_array_equal(a.decode(rows, c).posterior, b.decode(rows, c).posterior)


def test_reset_forgets_the_velocity():
    rng = np.random.default_rng(12)
    track = LinearTrack((0, 0), (100, 0), bin_cm=2.5)
    rates = 1 + 30 * np.exp(-0.5 * ((np.arange(track.n_bins)[None, :] - np.arange(0, 40, 2)[:, None]) / 1.5) ** 2)
    dec = BayesDecoder(rates, track, track.valid_mask, 0.02, prior="state_space", random_walk_sd_cm=1.5,
                       uniform_weight=1e-3, drift_gain=1.0, velocity_time_constant_s=0.2)
    fresh = BayesDecoder(rates, track, track.valid_mask, 0.02, prior="state_space", random_walk_sd_cm=1.5,
                         uniform_weight=1e-3, drift_gain=1.0, velocity_time_constant_s=0.2)
    for k in range(30):
        dec.decode(np.array([k % 20]), np.array([3.0]))
    dec.reset()
    rows, c = np.arange(20), rng.poisson(0.5, 20).astype(float)
    # Source: definition of reset (a reset decoder gives a new one's numbers).
    np.testing.assert_array_equal(dec.decode(rows, c).posterior, fresh.decode(rows, c).posterior)


@pytest.mark.parametrize("gain", [-0.1, 1.5, math.nan, True])
def test_a_gain_outside_zero_to_one_is_refused(gain):
    track = LinearTrack((0, 0), (20, 0), bin_cm=5)
    with pytest.raises(ValueError, match="drift_gain must be a number in"):
        BayesDecoder(np.ones((1, track.n_bins)), track, track.valid_mask, 0.02, drift_gain=gain)


def _run_on_track(rng, n_steps, speed_bins_per_step):
    """Counts of Gaussian place fields along a 100-cm track while the animal runs at a steady speed (sanity data)."""
    track = LinearTrack((0, 0), (100, 0), bin_cm=2.5)
    n = track.n_bins
    centres = np.asarray(track.bin_centers_cm, float)[:, 0]
    fields = np.linspace(0, 100, 25)
    rates = 0.5 + 20.0 * np.exp(-0.5 * ((centres[None, :] - fields[:, None]) / 6.0) ** 2)
    # Back and forth along the track, so the velocity changes sign at each end.
    phase = (np.arange(n_steps) * speed_bins_per_step) % (2 * (n - 1))
    bins = np.where(phase < n - 1, phase, 2 * (n - 1) - phase).astype(int)
    counts = rng.poisson(0.02 * rates[:, bins].T)
    xy = np.column_stack([centres[bins], np.zeros(n_steps)])
    return track, rates, counts, bins, xy


def test_fit_drift_keeps_the_plain_walk_for_an_animal_that_stays_put():
    from decoder.encoding.calibration import fit_drift

    rng = np.random.default_rng(21)
    track, rates, counts, _, xy = _run_on_track(rng, 400, 0)
    walk = RandomWalk(track, track.valid_mask, 2.0)
    fit = fit_drift([rates, rates], [counts[:200], counts[200:]], [xy[:200], xy[200:]], 0.02, walk,
                    uniform_weight=1e-3, temperature=1.0)
    # Common practice (sanity bound on invented data): with nothing moving there is no velocity to follow,
    # so no drift beats the plain walk by the margin, and the plain walk is kept.
    assert fit.gain == 0.0
    assert fit.median_cm == fit.median_without_cm


def test_fit_drift_follows_a_steady_run():
    from decoder.encoding.calibration import fit_drift

    rng = np.random.default_rng(22)
    track, rates, counts, _, xy = _run_on_track(rng, 1600, 0.2)  # 25 cm/s at 20 ms steps
    walk = RandomWalk(track, track.valid_mask, 1.2)
    fit = fit_drift([rates, rates], [counts[:800], counts[800:]], [xy[:800], xy[800:]], 0.02, walk,
                    uniform_weight=1e-3, temperature=1.0)
    # Common practice (sanity bound on invented data): a prior that moves with a steadily running animal
    # trails it less than one that waits for the spikes, so a drift is chosen and lowers the held-out error.
    assert fit.gain > 0.0
    assert fit.median_cm < fit.median_without_cm


def test_a_temperature_refit_near_a_known_one_finds_the_same_temperature():
    from decoder.encoding.calibration import fit_temperature

    rng = np.random.default_rng(23)
    track, rates, _, bins, _ = _run_on_track(rng, 1200, 0.2)
    # Overdispersed counts (a gamma gain per step shared by all units, CV 0.7): the Poisson model is
    # overconfident, so the fitted temperature is above 1 (invented data for a property of the fit).
    gain = rng.gamma(2.0, 0.5, (bins.size, 1))
    counts = rng.poisson(0.02 * rates[:, bins].T * gain)
    walk = RandomWalk(track, track.valid_mask, 1.2)
    args = ([rates, rates], [counts[:600], counts[600:]], [bins[:600], bins[600:]], 0.02, walk)
    full = fit_temperature(*args, uniform_weight=1e-3)
    assert full.temperature > 1.0
    near = fit_temperature(*args, uniform_weight=1e-3, near=full)
    # Source: definition of bisection — both brackets hold the same root, and each end is within its
    # final bracket (20^(1/64) ~ 4.8 % for the full fit, 1.25^(1/4) ~ 5.7 % near) of it.
    assert abs(math.log(near.temperature / full.temperature)) <= math.log(1.048) + math.log(1.057) + 1e-12
    assert near.coverage_at_1 == full.coverage_at_1


def test_the_drift_gain_setting_is_checked_and_overrides_the_fitted_gain():
    from decoder.config import ConfigError, DecoderSettings
    from decoder.encoding.place_model import PlaceModel
    from decoder.session.steps import build_decoder

    for bad in (-0.1, 1.5, math.nan, True, "1"):
        with pytest.raises(ConfigError, match="drift_gain must be a number from 0 to 1"):
            DecoderSettings(drift_gain=bad)
    track = LinearTrack((0, 0), (100, 0), bin_cm=2.5)
    t = np.arange(0, 120, 0.02)
    xy = np.column_stack([50 + 45 * np.sin(2 * np.pi * t / 8.0), np.zeros_like(t)])  # back and forth
    model = PlaceModel(track, unit_ids=[1, 2])
    model.update_frames(t, xy)
    model.fit()
    zones = np.zeros((0, track.n_bins), bool)
    # No spikes were learned, so nothing is fitted on held-out steps: the plain walk, unless the setting asks.
    assert build_decoder(model, track, DecoderSettings(), zones, 0.01).drift_gain == 0.0
    assert build_decoder(model, track, DecoderSettings(drift_gain=0.7), zones, 0.01).drift_gain == 0.7
