"""Tests of decoder.inference._kernels: each kernel against an outside reference and against its numpy twin.

The likelihood, normalisation and summary steps exist in numpy only (production runs them fused inside
decode_step); they are checked here against outside references, and decode_step against their composition.

Twin tolerance: the compiled kernels add the same terms in a different order
(blocked sums, two-pass convolution), so results agree to a few units in the
last place of the largest term; rtol=1e-12 leaves a wide margin above that
(about 1e-15 per addition times at most a few hundred additions).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage, stats
from scipy.special import gammaln

from decoder.inference import _kernels as K

TWIN_RTOL = 1e-12

def _rates(rng: np.random.Generator, n_units: int, n_bins: int) -> np.ndarray:
    return rng.gamma(0.7, 4.0, (n_units, n_bins)) + 0.01


# -- Poisson log-likelihood ----------------------------------------------------


def test_log_likelihood_equals_scipy_poisson_logpmf():
    rng = np.random.default_rng(1)
    n_units, n_bins, window_s = 13, 37, 0.25
    rates = _rates(rng, n_units, n_bins)
    counts_all = rng.poisson(2.0, n_units) * (rng.random(n_units) < 0.6)
    rows = np.flatnonzero(counts_all).astype(np.int64)
    counts = counts_all[rows].astype(np.float64)
    out = K.poisson_log_likelihood_numpy(rows, counts, np.log(rates), window_s * rates.sum(axis=0), np.empty(n_bins))
    # Constant dropped by the kernel: sum_i (n_i log W - log n_i!), over every unit.
    constant = float(np.sum(counts_all * math.log(window_s) - gammaln(counts_all + 1)))
    reference = stats.poisson.logpmf(counts_all[:, None], window_s * rates).sum(axis=0)
    # Source: scipy.stats.poisson.logpmf; independent-Poisson likelihood of Zhang et al. (1998),
    # J Neurophysiol 79:1017, eq. for P(n|x) as a product over units.
    np.testing.assert_allclose(out + constant, reference, rtol=1e-12, atol=1e-9)


def test_log_likelihood_of_repeated_rows_adds_up():
    rng = np.random.default_rng(2)
    n_units, n_bins = 40, 2500
    log_rate = np.log(_rates(rng, n_units, n_bins))
    expected = rng.random(n_bins) * 5
    rows = rng.integers(0, n_units, 23).astype(np.int64)  # repeats included, odd length
    counts = rng.integers(0, 4, 23).astype(np.float64)
    a = K.poisson_log_likelihood_numpy(rows, counts, log_rate, expected, np.empty(n_bins))
    merged = np.bincount(rows, weights=counts, minlength=n_units)
    fired = np.flatnonzero(merged)
    c = K.poisson_log_likelihood_numpy(fired.astype(np.int64), merged[fired], log_rate, expected, np.empty(n_bins))
    # Source: the log-likelihood is linear in the counts (Zhang et al. 1998), so split counts add up.
    np.testing.assert_allclose(a, c, rtol=TWIN_RTOL, atol=1e-12)


def test_log_likelihood_of_a_silent_window_is_minus_expected_count():
    expected = np.array([0.5, 1.0, 2.0])
    out = K.poisson_log_likelihood_numpy(np.zeros(0, np.int64), np.zeros(0), np.zeros((2, 3)), expected, np.empty(3))
    # Source: Poisson pmf at n = 0 is exp(-mu) (definition of the Poisson distribution).
    np.testing.assert_array_equal(out, -expected)


# -- normalisation -------------------------------------------------------------


def test_posterior_equals_direct_normalisation_of_poisson_pmf():
    rng = np.random.default_rng(3)
    n_units, n_bins, window_s = 6, 30, 0.5
    rates = _rates(rng, n_units, n_bins)
    counts_all = rng.poisson(1.5, n_units)
    rows = np.flatnonzero(counts_all).astype(np.int64)
    valid = rng.random(n_bins) < 0.8
    prior = rng.random(n_bins) + 0.1
    counts = counts_all[rows].astype(float)
    ll = K.poisson_log_likelihood_numpy(rows, counts, np.log(rates), window_s * rates.sum(0), np.empty(n_bins))
    out = np.empty(n_bins)
    assert K.posterior_from_log_numpy(ll, prior, valid, out)
    direct = np.prod(stats.poisson.pmf(counts_all[:, None], window_s * rates), axis=0) * prior * valid
    # Source: Bayes' rule with scipy.stats.poisson.pmf, normalised directly (no logs).
    np.testing.assert_allclose(out, direct / direct.sum(), rtol=1e-10, atol=1e-300)
    # Source: common practice — bins outside the valid set carry exactly zero probability.
    assert np.all(out[~valid] == 0.0)


def test_posterior_reports_underflow():
    b = np.empty(500)
    far = np.zeros(500)
    far[:10] = 1.0  # the prior lives where the likelihood is e^-800 below its best bin
    ll = np.zeros(500)
    ll[:10] = -800.0
    valid = np.ones(500, bool)
    # Source: exp(-800) ~ 1e-348 is below the smallest float64 (IEEE 754), so the product underflows.
    assert not K.posterior_from_log_numpy(ll, far, valid, b)


# -- random-walk prediction ------------------------------------------------------


def _gauss_kernel(sd_bins: float, reach: int) -> np.ndarray:
    return np.exp(-0.5 * (np.arange(-reach, reach + 1) / sd_bins) ** 2)


@pytest.mark.parametrize("convolve", [K.convolve_separable, K.convolve_separable_numpy], ids=["numba", "numpy"])
def test_separable_convolution_equals_scipy_ndimage(convolve):
    rng = np.random.default_rng(5)
    ny, nx = 17, 23
    kernel = _gauss_kernel(1.7, 6)
    values = rng.random(ny * nx)
    out = convolve(values.copy(), ny, nx, kernel, np.empty(ny * nx), np.empty(ny * nx))
    reference = ndimage.correlate(values.reshape(ny, nx), np.outer(kernel, kernel), mode="constant", cval=0.0)
    # Source: scipy.ndimage.correlate with zero padding (the kernel is symmetric, so correlation = convolution).
    np.testing.assert_allclose(out, reference.ravel(), rtol=1e-12)
    in_place = values.copy()
    convolve(in_place, ny, nx, kernel, in_place, np.empty(ny * nx))
    # Source: the same reference; the kernel is documented to accept out is values.
    np.testing.assert_allclose(in_place, reference.ravel(), rtol=1e-12)


def _predict_grid_compiled(p, ny, nx, kernel, mask_f, inv_norm, out, scratch=None):
    """The compiled grid prediction as decode_step runs it: only the rows within reach of p's support."""
    y0, y1 = K._support_rows(p, nx, 0, ny - 1)
    reach = kernel.size // 2
    grid_scratch = np.zeros((2 * ny + 2 * reach) * (nx + 2 * reach))
    y0, y1 = K._predict_grid_rows(p, ny, nx, kernel, kernel, True, mask_f, inv_norm, y0, y1, out, grid_scratch)
    out[: y0 * nx] = 0.0
    out[(y1 + 1) * nx :] = 0.0
    return out


def _masked_transition(ny: int, nx: int, kernel: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """T[i, j] = K(i, j) m_j / sum_k K(i, k) m_k, written out bin by bin."""
    reach = kernel.size // 2
    n = ny * nx
    k_full = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            dy, dx = j // nx - i // nx, j % nx - i % nx
            if abs(dy) <= reach and abs(dx) <= reach:
                k_full[i, j] = kernel[dy + reach] * kernel[dx + reach]
    weighted = k_full * mask[None, :]
    t = np.zeros((n, n))
    t[mask] = weighted[mask] / weighted[mask].sum(axis=1, keepdims=True)
    return t


@pytest.mark.parametrize("predict", [_predict_grid_compiled, K.predict_grid_numpy], ids=["numba", "numpy"])
def test_grid_prediction_applies_the_masked_row_normalised_transition(predict):
    rng = np.random.default_rng(6)
    ny, nx = 6, 7
    kernel = _gauss_kernel(1.2, 4)
    mask = rng.random(ny * nx) < 0.75
    t = _masked_transition(ny, nx, kernel, mask)
    mask_f = mask.astype(float)
    norm = ndimage.correlate(mask_f.reshape(ny, nx), np.outer(kernel, kernel), mode="constant").ravel()
    inv_norm = np.where(mask, 1.0 / np.where(mask, norm, 1.0), 0.0)
    p = rng.random(ny * nx) * mask
    p /= p.sum()
    out = predict(p, ny, nx, kernel, mask_f, inv_norm, np.empty(ny * nx), np.empty(ny * nx))
    # Source: Markov chain prediction p_{t+1} = p_t T (any probability text); T built entry by entry above.
    np.testing.assert_allclose(out, p @ t, rtol=1e-12, atol=1e-15)
    # Source: a row-stochastic T preserves total probability (definition of a Markov transition matrix).
    assert math.isclose(out.sum(), 1.0, rel_tol=1e-12)
    assert np.all(out[~mask] == 0.0)


def test_dense_prediction_twins_agree_with_numpy_matmul():
    rng = np.random.default_rng(7)
    t = rng.random((50, 50))
    t /= t.sum(axis=1, keepdims=True)
    p = rng.random(50)
    p[::3] = 0.0
    a = K.predict_dense(p, t, np.empty(50))
    b = K.predict_dense_numpy(p, t, np.empty(50))
    # Source: numpy.matmul as the reference product.
    np.testing.assert_allclose(a, p @ t, rtol=TWIN_RTOL)
    np.testing.assert_allclose(b, p @ t, rtol=TWIN_RTOL)


# -- highest-posterior-density region --------------------------------------------

HPD = [pytest.param(K.hpd_size, id="numba"), pytest.param(K.hpd_size_numpy, id="numpy")]


@pytest.mark.parametrize("hpd", HPD)
@pytest.mark.parametrize("m", [1, 7, 31, 32, 33, 1000, 9000])
def test_hpd_of_a_uniform_posterior_is_its_support(hpd, m):
    p = np.zeros(10_000)
    p[np.random.default_rng(m).choice(10_000, m, replace=False)] = 1.0 / m
    # Source: closed form — a flat density's highest-density region at any mass is its whole
    # support (the superlevel set at the flat value), m bins.
    assert hpd(p, 0.95, np.empty(p.size)) == m


@pytest.mark.parametrize("hpd", HPD)
def test_hpd_of_a_discretised_normal_is_the_1_96_sigma_band(hpd):
    bin_cm, sd_cm = 0.05, 10.0
    x = (np.arange(4000) - 2000 + 0.5) * bin_cm
    p = np.exp(-0.5 * (x / sd_cm) ** 2)
    p /= p.sum()
    width_cm = hpd(p, 0.95, np.empty(p.size)) * bin_cm
    # Source: 95% of a normal lies within +/-1.96 sd (from memory; equals scipy.stats.norm.ppf(0.975)).
    assert abs(width_cm - 2 * stats.norm.ppf(0.975) * sd_cm) <= 2 * bin_cm


@pytest.mark.parametrize("hpd", HPD)
def test_hpd_of_a_discretised_2d_normal_is_the_chi2_disc(hpd):
    bin_cm, sd_cm = 0.5, 8.0
    c = (np.arange(200) - 100 + 0.5) * bin_cm
    xx, yy = np.meshgrid(c, c)
    p = np.exp(-0.5 * (xx**2 + yy**2) / sd_cm**2).ravel()
    p /= p.sum()
    area = hpd(p, 0.95, np.empty(p.size)) * bin_cm**2
    expected = math.pi * sd_cm**2 * stats.chi2.ppf(0.95, df=2)
    # Source: for an isotropic 2-D normal, r^2/sd^2 is chi-square with 2 d.o.f.; the 95% region is the
    # disc of radius^2 = sd^2 chi2.ppf(0.95, 2) (scipy.stats.chi2). Tolerance: bins cut by the circle.
    assert abs(area - expected) / expected < 0.01


def test_hpd_twins_agree_on_random_and_tied_posteriors():
    rng = np.random.default_rng(8)
    for trial in range(40):
        n = int(rng.integers(1, 5000))
        p = rng.dirichlet(np.full(n, rng.choice([0.05, 1.0, 50.0])))
        if trial % 3 == 0:
            p = np.round(p * 50) / 50  # many exact ties
            if p.sum() == 0:
                continue
            p /= p.sum()
        p[rng.random(n) < 0.1] = 0.0
        if p.sum() == 0:
            continue
        mass = float(rng.choice([0.5, 0.95, 0.999]))
        # Source: the numpy twin (full sort + cumulative sum) as reference.
        assert K.hpd_size(p, mass, np.empty(n)) == K.hpd_size_numpy(p, mass, np.empty(n)), trial


@pytest.mark.parametrize("hpd", HPD)
def test_hpd_of_values_too_close_for_buckets_falls_back_to_sorting(hpd):
    p = 1e-300 * (1.0 + np.arange(100) * np.finfo(float).eps)
    # Their spread (2e-314) makes the bucket scale 256 / spread overflow to inf.
    n = hpd(p, 0.95, np.empty(100))
    # Source: the full-sort twin as reference, and closed form — 100 masses equal to 1e-14 relative
    # need 95 of them (96 if rounding leaves the 95 a hair short) to reach 95%.
    assert n == K.hpd_size_numpy(p, 0.95, None) and n in (95, 96)


# -- summaries ------------------------------------------------------------------


def test_posterior_summary_and_zone_mass_agree_with_numpy():
    rng = np.random.default_rng(9)
    p = rng.dirichlet(np.ones(300))
    cx, cy = rng.random(300) * 100, rng.random(300) * 50
    best, peak, mx, my = K.posterior_summary_numpy(p, cx, cy)
    # Source: numpy.argmax and numpy.average as reference.
    assert best == int(np.argmax(p)) and peak == p.max()
    np.testing.assert_allclose([mx, my], [np.average(cx, weights=p), np.average(cy, weights=p)], rtol=1e-12)
    masks = rng.random((3, 300)) < 0.2
    start = np.concatenate([[0], np.cumsum(masks.sum(1))]).astype(np.int64)
    bins = np.nonzero(masks)[1].astype(np.int64)
    for zone_mass in (K.zone_mass, K.zone_mass_numpy):
        # Source: numpy matrix product of the boolean masks with the posterior.
        np.testing.assert_allclose(zone_mass(p, start, bins, np.empty(3)), masks @ p, rtol=1e-12)


def test_vectorisable_exp_matches_numpy_exp():
    rng = np.random.default_rng(10)
    edges = [0.0, -1e-300, K.LOG_WEIGHT_FLOOR, -0.5 * math.log(2)]
    d = np.concatenate([rng.random(5000) * K.LOG_WEIGHT_FLOOR, edges])
    ours = np.array([K._exp_nonpositive(x) for x in d])
    # Source: numpy.exp as reference; 2 ulp allowed (range reduction plus polynomial rounding).
    np.testing.assert_allclose(ours, np.exp(d), rtol=2 * np.finfo(float).eps, atol=0)


def test_first_bad_entry_twins_agree():
    rng = np.random.default_rng(11)
    specials = np.array([np.nan, np.inf, -np.inf, -1.0, 0.5, 1e6, 3.0, 0.0])
    for trial in range(200):
        k = int(rng.integers(0, 12))
        rows = rng.integers(-1, 6, k).astype(np.int64) if trial % 2 else rng.integers(0, 5, k).astype(np.int64)
        counts = rng.choice(specials, k) if trial % 3 == 0 else rng.integers(0, 4, k).astype(np.float64)
        # Source: the numpy twin (vectorised comparisons) as reference; both return the first offender.
        assert K.first_bad_entry(rows, counts, 5, 1e6) == K.first_bad_entry_numpy(rows, counts, 5, 1e6), trial


# -- fused decoding step ------------------------------------------------------------

_GRID = (60, 16)


def _sliding_windows(rng: np.random.Generator, rates: np.ndarray, n_steps: int, per_window: int = 10):
    """Counts of overlapping windows, each ``per_window`` sub-steps long, moved by one sub-step.

    Consecutive windows share 90% of their spikes, as a 200 ms window moved by 20 ms does,
    which is what the incremental log-likelihood of decode_step exploits. The spikes follow
    the rates at a bin that wanders by at most one row or column per sub-step.
    """
    ny, nx = _GRID
    n_units = rates.shape[0]
    moves = rng.integers(-1, 2, (n_steps + per_window, 2)) * (rng.random((n_steps + per_window, 1)) < 0.1)
    yx = np.abs(np.cumsum(moves, axis=0) + [ny // 2, nx // 2])
    yx = np.minimum(yx % (2 * np.array([ny, nx])), 2 * np.array([ny, nx]) - 1 - yx % (2 * np.array([ny, nx])))
    place = yx[:, 0] * nx + yx[:, 1]
    sub = rng.poisson(0.02 * rates[:, place].T)  # 20 ms of spikes
    cum = np.vstack([np.zeros((1, n_units), np.int64), np.cumsum(sub, axis=0)])
    for k in range(n_steps):
        counts = cum[k + per_window] - cum[k]
        rows = np.flatnonzero(counts).astype(np.int64)
        yield rows, counts[rows].astype(np.float64)


def _step_arguments(rng: np.random.Generator, n_units: int, kind: int, uniform_weight: float = 0.0):
    ny, nx = _GRID
    n_bins = ny * nx
    # Random bumps on a random background (not data): a posterior that covers a few rows.
    cy, cx = np.divmod(np.arange(n_bins), nx)
    fy, fx = rng.uniform(0, ny, n_units), rng.uniform(0, nx, n_units)
    bumps = np.exp(-0.5 * ((cy[None, :] - fy[:, None]) ** 2 + (cx[None, :] - fx[:, None]) ** 2) / 2.0**2)
    rates = _rates(rng, n_units, n_bins) * 0.3 + 60.0 * bumps
    valid = np.ones(n_bins, bool)
    valid[rng.choice(n_bins, 25, replace=False)] = False
    mask_f = valid.astype(float)
    kernel = _gauss_kernel(1.5, 6)
    norm = ndimage.correlate(mask_f.reshape(ny, nx), np.outer(kernel, kernel), mode="constant").ravel()
    inv_norm = np.where(valid, 1.0 / np.where(valid, norm, 1.0), 0.0)
    zones = np.zeros((2, n_bins), bool)
    zones[0, :40] = True
    zones[1, 200:230] = True
    model = (
        1e6,
        np.log(rates),
        0.2 * rates.sum(axis=0),
        valid,
        mask_f.copy(),
        uniform_weight,
        uniform_weight / valid.sum(),
        kind,
        ny,
        nx,
        kernel,
        mask_f,
        inv_norm,
        np.zeros(n_bins, bool),
        np.zeros((1, 1)),
        cx * 2.0 + 1.0,
        cy * 2.0 + 1.0,
        np.array([0, 40, 70], np.int64),
        np.nonzero(zones)[1].astype(np.int64),
        0.95,
    )
    return rates, model


class _StepState:
    """The arrays decode_step keeps between calls, as BayesDecoder holds them."""

    def __init__(self, n_units: int, n_bins: int, grid_len: int, n_zones: int):
        self.state = np.array([-1, 0, 0, 0], np.int64)
        self.drift = np.zeros(K.DRIFT_SIZE)
        self.unit_counts = np.zeros((3, n_units))
        self.unit_rows = np.empty(n_units, np.int64)
        self.log_like = np.empty(n_bins)
        self.previous = np.zeros(n_bins + 4 + n_zones)
        self.no_marks = np.zeros((0, n_bins))
        self.after = (np.empty(n_bins), np.empty(n_bins), np.zeros(grid_len))
        self.out_size = n_bins + 4 + n_zones

    def step(self, kernel, rows, counts, model):
        out = np.empty(self.out_size)
        result = kernel(
            rows, counts, *model, self.state, self.drift, self.unit_counts, self.unit_rows, self.log_like,
            self.previous, self.no_marks, *self.after, out,
        )  # fmt: skip
        if result[0] < 0:
            self.previous = out
        return result, out


def _new_state(model) -> _StepState:
    ny, nx = _GRID
    r = model[10].size // 2
    return _StepState(model[1].shape[0], ny * nx, (2 * ny + 2 * r) * (nx + 2 * r), 2)


@pytest.mark.parametrize(
    "kind, uniform_weight",
    [(K.NO_TRANSITION, 0.0), (K.GRID_TRANSITION, 0.0), (K.GRID_TRANSITION, 1e-3)],
    ids=["uniform", "grid", "grid-with-jump"],
)
def test_decode_step_with_incremental_likelihood_matches_the_exact_numpy_twin_over_a_long_run(kind, uniform_weight):
    rng = np.random.default_rng(12)
    n_units = 200
    rates, model = _step_arguments(rng, n_units, kind, uniform_weight)
    floor = K._prob_floor(uniform_weight, model[6])
    fast, slow = _new_state(model), _new_state(model)
    updates_seen = 0
    worst_drift = 0.0
    fewest_rows = _GRID[0]
    for rows, counts in _sliding_windows(rng, rates, 3000):
        (status_a, map_a, hpd_a, spikes_a, peak_a), a = fast.step(K.decode_step, rows, counts, model)
        (status_b, map_b, hpd_b, spikes_b, peak_b), b = slow.step(K.decode_step_numpy, rows, counts, model)
        updates_seen = max(updates_seen, int(fast.state[K.STATE_UPDATES]))
        fewest_rows = min(fewest_rows, int(fast.state[K.STATE_Y1] - fast.state[K.STATE_Y0] + 1))
        # The twin recomputes the log-likelihood afresh each window; the kernel mostly updates
        # the previous one. Drift bound: between two exact computations at most
        # LIKELIHOOD_REFRESH_STEPS updates, each adding at most n_units products to every bin, each
        # addition rounding by at most eps times the largest partial sum, itself at most
        # sum_i n_i |log rate_i| + expected count (Higham 2002, Accuracy and Stability of Numerical
        # Algorithms, 2nd ed., SIAM, eq. 4.4: |error of a sum| <= (n - 1) eps sum |terms|).
        scale = float(np.max(counts @ np.abs(model[1][rows]) + model[2])) if rows.size else float(model[2].max())
        bound = K.LIKELIHOOD_REFRESH_STEPS * (n_units + 1) * np.finfo(float).eps * 2 * scale
        drift = float(np.max(np.abs(fast.log_like - slow.log_like)))
        worst_drift = max(worst_drift, drift)
        assert drift <= bound
        # Source: the numpy twin. A log-likelihood off by d changes each normalised posterior
        # value by a factor within exp(+-2d), d < 1e-11 here, so rtol=1e-9 is generous; values
        # within that of the floor (PROB_FLOOR, or UNIFORM_CUTOFF of the uniform jump's level)
        # may be floored in one and not the other, hence atol.
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=2 * floor)
        assert (status_a, map_a, spikes_a) == (status_b, map_b, spikes_b)
        # The HPD count changes only if a cumulative sum lands within ~1e-11 of 95%.
        assert hpd_a == hpd_b
        assert peak_a == pytest.approx(peak_b, rel=1e-9)
    # The run did take the incremental path, and the drift stayed far below what a posterior shows;
    # with the random walk, the posterior was confined to a band of rows at times.
    assert updates_seen == K.LIKELIHOOD_REFRESH_STEPS
    assert worst_drift < 1e-10
    if kind == K.GRID_TRANSITION:
        assert fewest_rows + 2 * (model[10].size // 2) < _GRID[0]


def test_decode_step_is_deterministic_and_refuses_bad_entries_without_touching_its_state():
    rng = np.random.default_rng(13)
    rates, model = _step_arguments(rng, 40, K.GRID_TRANSITION)
    windows = list(_sliding_windows(rng, rates, 300))
    runs = []
    for _ in range(2):
        st = _new_state(model)
        outs = []
        for i, (rows, counts) in enumerate(windows):
            if i == 150:
                before = (st.state.copy(), st.unit_counts[0].copy(), st.log_like.copy())
                bad_counts = counts.copy()
                bad_counts[-1] = 0.5
                (status, *_), _ = st.step(K.decode_step, rows, bad_counts, model)
                # Source: the kernel's contract — the index of the first bad entry, state untouched.
                assert status == rows.size - 1
                np.testing.assert_array_equal(st.state, before[0])
                np.testing.assert_array_equal(st.unit_counts[0], before[1])
                np.testing.assert_array_equal(st.log_like, before[2])
            outs.append(st.step(K.decode_step, rows, counts, model)[1])
        runs.append(np.array(outs))
    # Source: common practice (live runs and replays are compared by a digest of every step) —
    # the same windows in the same order give the same bits.
    np.testing.assert_array_equal(runs[0], runs[1])


def test_decode_step_starts_afresh_when_asked():
    rng = np.random.default_rng(14)
    rates, model = _step_arguments(rng, 40, K.GRID_TRANSITION)
    windows = list(_sliding_windows(rng, rates, 60))
    st = _new_state(model)
    for rows, counts in windows[:40]:
        st.step(K.decode_step, rows, counts, model)
    st.state[K.STATE_UPDATES] = -1
    st.state[K.STATE_HAS_PREVIOUS] = 0
    fresh = _new_state(model)
    for rows, counts in windows[40:]:
        a = st.step(K.decode_step, rows, counts, model)[1]
        b = fresh.step(K.decode_step, rows, counts, model)[1]
        # Source: the kernel's contract — after a restart the history before it leaves no trace.
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("hpd", HPD)
def test_hpd_of_concentrated_posteriors_needs_several_passes_and_agrees_with_the_sort(hpd):
    rng = np.random.default_rng(15)
    for trial in range(30):
        n = int(rng.integers(50, 3000))
        # Values spread over hundreds of decades, as a decoded posterior's are, so that
        # reaching 99.9999% takes several passes of 2**8 each.
        p = np.exp(-rng.exponential(rng.choice([5.0, 50.0, 400.0]), n))
        p /= p.sum()
        mass = float(rng.choice([0.5, 0.95, 0.999999]))
        # Source: the numpy twin (full sort + cumulative sum).
        assert hpd(p, mass, np.empty(n)) == K.hpd_size_numpy(p, mass, None), trial


def test_grid_prediction_on_a_posterior_confined_to_a_few_rows():
    rng = np.random.default_rng(16)
    ny, nx = 20, 15
    kernel = _gauss_kernel(1.3, 5)
    mask = rng.random(ny * nx) < 0.9
    t = _masked_transition(ny, nx, kernel, mask)
    mask_f = mask.astype(float)
    norm = ndimage.correlate(mask_f.reshape(ny, nx), np.outer(kernel, kernel), mode="constant").ravel()
    inv_norm = np.where(mask, 1.0 / np.where(mask, norm, 1.0), 0.0)
    for rows in [(0, 1), (7, 9), (18, 20), (0, 20)]:
        p = np.zeros((ny, nx))
        p[rows[0] : rows[1]] = rng.random((rows[1] - rows[0], nx))
        p = p.ravel() * mask
        p /= p.sum()
        out = _predict_grid_compiled(p, ny, nx, kernel, mask_f, inv_norm, np.full(ny * nx, np.nan))
        # Source: Markov chain prediction p T with T written out entry by entry (as above); the
        # kernel's taps are summed in another order than the product's, hence rtol.
        np.testing.assert_allclose(out, p @ t, rtol=1e-12, atol=1e-18)
        in_place = p.copy()
        _predict_grid_compiled(in_place, ny, nx, kernel, mask_f, inv_norm, in_place)
        np.testing.assert_allclose(in_place, p @ t, rtol=1e-12, atol=1e-18)


def test_integer_keyed_maxima_equal_numpy_max():
    rng = np.random.default_rng(17)
    for n in (1, 7, 8, 9, 1000):
        a = rng.normal(0, 300, n)
        a[rng.random(n) < 0.1] = -0.0
        keep = rng.random(n) < 0.7
        keep[rng.integers(n)] = True
        # Source: numpy.max as reference (IEEE 754 ordering of doubles).
        assert K._max_where(a, keep) == a[keep].max()
        assert K._max_where(np.full(n, -np.inf), np.ones(n, bool)) == -np.inf
        b = np.abs(a)
        assert K._max_nonnegative(b) == b.max()
