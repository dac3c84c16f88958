"""Tests of decoder.inference.decoding: BayesDecoder and RandomWalk against outside references.

References used: scipy.stats.poisson (likelihood), hmmlearn.hmm.PoissonHMM
(forward pass of the state-space filter), closed-form posteriors, and the
reference filter ``decoder.inference.filtering.filter_posteriors`` (itself
checked against hmmlearn and brute-force Bayes in tests/test_filtering.py)
for the uniform jump and the temperature. Rate maps
here are small hand-made or random arrays, not data.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hmmlearn.hmm import PoissonHMM
from scipy import stats

from decoder.inference import _kernels
from decoder.inference.decoding import BayesDecoder, DecodedStep
from decoder.inference.filtering import filter_posteriors
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Arena, LinearTrack, TrackGraph

BACKENDS = ["numba", "numpy"]


@pytest.fixture(autouse=True)
def strict_floats():
    """Every test runs with numpy floating-point errors raised and warnings as errors."""
    with np.errstate(all="raise"), warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


def _random_rates(seed: int, n_units: int, n_bins: int) -> np.ndarray:
    return np.random.default_rng(seed).gamma(0.8, 5.0, (n_units, n_bins)) + 0.05


def _hmm(startprob: np.ndarray, transmat: np.ndarray, lambdas: np.ndarray) -> PoissonHMM:
    model = PoissonHMM(n_components=startprob.size, init_params="", params="")
    model.startprob_ = startprob
    model.transmat_ = transmat
    model.lambdas_ = lambdas
    return model


# -- uniform prior ----------------------------------------------------------------


@pytest.mark.parametrize("backend", BACKENDS)
def test_uniform_prior_posterior_is_normalised_poisson_product(backend):
    track = LinearTrack((0, 0), (120, 0), bin_cm=5)
    rates = _random_rates(1, 8, track.n_bins)
    visited = np.ones(track.n_bins, bool)
    visited[[0, 1, 17]] = False
    dec = BayesDecoder(rates, track, visited, window_s=0.3, backend=backend)
    counts_all = np.array([0, 2, 0, 1, 3, 0, 0, 1])
    rows = np.flatnonzero(counts_all)
    step = dec.decode(rows, counts_all[rows])
    direct = np.prod(stats.poisson.pmf(counts_all[:, None], 0.3 * rates), axis=0) * visited
    # Source: Bayes' rule with a flat prior over scipy.stats.poisson.pmf products (Zhang et al. 1998,
    # J Neurophysiol 79:1017).
    np.testing.assert_allclose(step.posterior, direct / direct.sum(), rtol=1e-10)
    # Source: common practice — never-visited bins are excluded: probability exactly 0.
    assert np.all(step.posterior[~visited] == 0.0)
    assert step.n_spikes == 7
    assert step.map_bin == int(np.argmax(direct))
    np.testing.assert_array_equal(step.map_xy_cm, track.bin_centers_cm[step.map_bin])
    # Source: posterior mean = sum_j p_j c_j (definition of an expectation), numpy.average as reference.
    mean = np.average(track.bin_centers_cm, axis=0, weights=direct)
    np.testing.assert_allclose(step.mean_xy_cm, mean, rtol=1e-10)
    assert step.peak_prob == pytest.approx(direct.max() / direct.sum(), rel=1e-10)
    # The default point estimate is the MAP.
    np.testing.assert_array_equal(step.decoded_xy_cm, step.map_xy_cm)


@pytest.mark.parametrize("backend", BACKENDS)
def test_the_decoded_position_is_the_point_estimate_asked_for(backend):
    track = LinearTrack((0, 0), (120, 0), bin_cm=5)
    rates = _random_rates(2, 8, track.n_bins)
    counts_all = np.array([1, 0, 2, 0, 0, 1, 0, 0])
    rows = np.flatnonzero(counts_all)
    steps = {
        how: BayesDecoder(rates, track, track.valid_mask, window_s=0.3, point_estimate=how, backend=backend).decode(
            rows, counts_all[rows])
        for how in ("map", "mean")
    }
    # Source: the parameter's definition — the same posterior, reported as its MAP or its mean.
    np.testing.assert_array_equal(steps["map"].posterior, steps["mean"].posterior)
    np.testing.assert_array_equal(steps["map"].decoded_xy_cm, steps["map"].map_xy_cm)
    np.testing.assert_array_equal(steps["mean"].decoded_xy_cm, steps["mean"].mean_xy_cm)
    with pytest.raises(ValueError, match="point_estimate must be one of"):
        BayesDecoder(rates, track, track.valid_mask, window_s=0.3, point_estimate="median")


@pytest.mark.parametrize("backend", BACKENDS)
def test_flat_maps_give_a_uniform_posterior_and_an_hpd_of_the_whole_arena(backend):
    arena = Arena.rectangle(60, 40, bin_cm=5)
    rates = np.full((3, arena.n_bins), 2.0)
    visited = np.ones(arena.n_bins, bool)
    visited[:10] = False
    dec = BayesDecoder(rates, arena, visited, window_s=0.2, backend=backend)
    step = dec.decode(np.array([0, 2]), np.array([1, 4]))
    n_valid = int(visited.sum())
    # Source: closed form — identical rate maps carry no information, the posterior is flat.
    np.testing.assert_allclose(step.posterior[visited], 1.0 / n_valid, rtol=1e-12)
    # Source: closed form — the 95% HPD region of a flat posterior is its support, n bins x bin area.
    assert step.hpd95_size == pytest.approx(n_valid * 25.0)


def test_zone_mass_is_posterior_inside_each_zone():
    arena = Arena.rectangle(50, 50, bin_cm=5)
    rates = _random_rates(2, 5, arena.n_bins)
    zones = np.zeros((2, arena.n_bins), bool)
    zones[0, :30] = True
    zones[1, 45:60] = True
    dec = BayesDecoder(rates, arena, arena.valid_mask, window_s=0.25, zone_masks=zones)
    step = dec.decode(np.array([1, 3]), np.array([2, 1]))
    # Source: numpy boolean-mask sum as reference (mass of a set = sum of its bins' probabilities).
    inside = [step.posterior[zones[0]].sum(), step.posterior[zones[1]].sum()]
    np.testing.assert_allclose(step.zone_mass, inside, rtol=1e-12)


# -- state-space prior ---------------------------------------------------------------


@pytest.mark.parametrize("backend", BACKENDS)
def test_state_space_filter_matches_hmmlearn_forward_pass_on_a_grid(backend):
    arena = Arena.rectangle(50, 40, bin_cm=10)  # 4 x 5 bins
    rng = np.random.default_rng(3)
    n_units, window_s, steps = 6, 0.5, 12
    rates = _random_rates(4, n_units, arena.n_bins)
    visited = np.ones(arena.n_bins, bool)
    visited[[0, 7, 19]] = False
    dec = BayesDecoder(
        rates, arena, visited, window_s, prior="state_space", random_walk_sd_cm=9.0, backend=backend
    )
    transmat = dec.transition.dense_matrix()
    # Rows of never-visited bins are zero in our matrix; hmmlearn wants stochastic rows, and these
    # bins are unreachable (zero start probability, zero columns), so a self-loop changes nothing.
    transmat[~visited, ~visited] = 1.0
    hmm = _hmm(visited / visited.sum(), transmat, window_s * rates.T)
    counts = rng.poisson(0.8, (steps, n_units))
    for t in range(steps):
        rows = np.flatnonzero(counts[t])
        step = dec.decode(rows, counts[t, rows])
        filtered = hmm.predict_proba(counts[: t + 1])[-1]
        # Source: hmmlearn.hmm.PoissonHMM; at the last observation forward-backward equals the
        # forward (filtered) posterior, so predict_proba(X[:t+1])[-1] is the causal filter at t.
        np.testing.assert_allclose(step.posterior, filtered, rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("backend", BACKENDS)
def test_state_space_filter_matches_hmmlearn_forward_pass_on_a_track_graph(backend):
    maze = TrackGraph([[0, 0], [0, 40], [-30, 40], [30, 40]], [(0, 1), (1, 2), (1, 3)], bin_cm=10)
    rng = np.random.default_rng(5)
    n_units, window_s, steps = 5, 0.4, 10
    rates = _random_rates(6, n_units, maze.n_bins)
    dec = BayesDecoder(
        rates, maze, maze.valid_mask, window_s, prior="state_space", random_walk_sd_cm=12.0, backend=backend
    )
    hmm = _hmm(np.full(maze.n_bins, 1.0 / maze.n_bins), dec.transition.dense_matrix(), window_s * rates.T)
    counts = rng.poisson(1.0, (steps, n_units))
    for t in range(steps):
        rows = np.flatnonzero(counts[t])
        step = dec.decode(rows, counts[t, rows])
        # Source: hmmlearn.hmm.PoissonHMM forward pass, as in the grid test.
        np.testing.assert_allclose(step.posterior, hmm.predict_proba(counts[: t + 1])[-1], rtol=1e-8, atol=1e-12)


def test_track_transition_is_a_truncated_gaussian_of_along_track_distance():
    maze = TrackGraph([[0, 0], [0, 40], [-30, 40], [30, 40]], [(0, 1), (1, 2), (1, 3)], bin_cm=10)
    sd = 12.0
    t = RandomWalk(maze, maze.valid_mask, sd).dense_matrix()
    d = maze.bin_distance_matrix_cm()
    k = np.where(d <= 4 * sd, np.exp(-0.5 * (d / sd) ** 2), 0.0)
    # Source: Gaussian random walk, transition proportional to exp(-d^2 / 2 sd^2) and row-normalised
    # (Brown et al. 1998, J Neurosci 18:7411, random-walk state model), d along the track.
    np.testing.assert_allclose(t, k / k.sum(axis=1, keepdims=True), rtol=1e-12)


def _flat_evidence_decoder(environment, sd_cm, backend):
    """A filter whose silent windows carry no evidence: two units whose rate maps add up to 10 Hz everywhere.

    A silent window's likelihood is exp(-W sum_i lambda_i(x)) (Poisson pmf at n = 0), the same in every
    bin here, so the posterior after it is the prediction of the previous posterior, p T.
    """
    a = np.random.default_rng(7).uniform(1.0, 9.0, environment.n_bins)
    rates = np.vstack([a, 10.0 - a])
    return BayesDecoder(rates, environment, environment.valid_mask, 0.2, prior="state_space",
                        random_walk_sd_cm=sd_cm, backend=backend)


@pytest.mark.parametrize("backend", BACKENDS)
def test_grid_prediction_equals_dense_matrix_product(backend):
    arena = Arena.circle((0, 0), 30, bin_cm=4)
    dec = _flat_evidence_decoder(arena, 6.0, backend)
    p = np.array(dec.decode(np.array([0]), np.array([3])).posterior)
    predicted = dec.decode(np.zeros(0, np.int64), np.zeros(0)).posterior
    t = dec.transition.dense_matrix()
    # Source: Markov chain prediction p T (definition); T is row-stochastic on valid bins.
    np.testing.assert_allclose(predicted, p @ t, rtol=1e-11, atol=1e-16)
    np.testing.assert_allclose(t[arena.valid_mask].sum(axis=1), 1.0, rtol=1e-12)
    assert np.all(t[:, ~arena.valid_mask] == 0.0)


@pytest.mark.parametrize(
    "environment",
    [Arena.rectangle(20, 20, bin_cm=5), LinearTrack((0, 0), (40, 0), bin_cm=5)],
    ids=["grid", "track"],
)
def test_a_walk_much_narrower_than_a_bin_stays_put(environment):
    dec = _flat_evidence_decoder(environment, 0.1, "numba")
    p = dec.decode(np.array([1]), np.array([2])).posterior
    # Source: closed form — with the kernel cut at 4 s.d. (0.4 cm here) no neighbouring bin centre
    # (5 cm away) is reachable, so the transition is the identity.
    np.testing.assert_allclose(dec.decode(np.zeros(0, np.int64), np.zeros(0)).posterior, p, rtol=1e-13)
    np.testing.assert_array_equal(RandomWalk(environment, environment.valid_mask, 0.1).dense_matrix(),
                                  np.eye(environment.n_bins))


def test_reset_returns_to_the_uniform_prior():
    track = LinearTrack((0, 0), (100, 0), bin_cm=5)
    rates = _random_rates(8, 4, track.n_bins)
    dec = BayesDecoder(rates, track, track.valid_mask, 0.2, prior="state_space", random_walk_sd_cm=5.0)
    fresh = BayesDecoder(rates, track, track.valid_mask, 0.2, prior="uniform")
    dec.decode(np.array([0]), np.array([5]))
    second = dec.decode(np.array([2]), np.array([1]))
    dec.reset()
    after_reset = dec.decode(np.array([2]), np.array([1]))
    # Source: definition of the filter — the first step after a reset uses the uniform prior.
    first_of_fresh = fresh.decode(np.array([2]), np.array([1]))
    np.testing.assert_allclose(after_reset.posterior, first_of_fresh.posterior, rtol=1e-12)
    assert not np.allclose(second.posterior, after_reset.posterior)


def test_numba_and_numpy_backends_agree_over_a_run():
    arena = Arena.rectangle(80, 60, bin_cm=4)
    rates = _random_rates(9, 30, arena.n_bins)
    zones = arena.bin_centers_cm[:, 0][None, :] < 20
    kw = dict(prior="state_space", random_walk_sd_cm=6.0, zone_masks=zones)
    fast = BayesDecoder(rates, arena, arena.valid_mask, 0.1, **kw)
    slow = BayesDecoder(rates, arena, arena.valid_mask, 0.1, backend="numpy", **kw)
    rng = np.random.default_rng(10)
    for _ in range(30):
        counts = rng.poisson(0.3, 30)
        rows = np.flatnonzero(counts)
        a, b = fast.decode(rows, counts[rows]), slow.decode(rows, counts[rows])
        # Source: the numpy twins as reference; rtol explained in tests/test_kernels.py.
        np.testing.assert_allclose(a.posterior, b.posterior, rtol=1e-9, atol=1e-300)
        assert (a.map_bin, a.hpd95_size) == (b.map_bin, b.hpd95_size)
        np.testing.assert_allclose(a.zone_mass, b.zone_mass, rtol=1e-9)


# -- edge cases -----------------------------------------------------------------------


@pytest.mark.parametrize("backend", BACKENDS)
def test_silent_window_weights_the_prior_by_the_expected_count(backend):
    track = LinearTrack((0, 0), (60, 0), bin_cm=5)
    rates = _random_rates(11, 5, track.n_bins)
    dec = BayesDecoder(
        rates, track, track.valid_mask, 0.2, prior="state_space", random_walk_sd_cm=6.0, backend=backend
    )
    first = dec.decode(np.array([1, 4]), np.array([2, 1]))
    silent = dec.decode(np.zeros(0, np.int64), np.zeros(0))
    predicted = np.array(first.posterior) @ dec.transition.dense_matrix()
    expected = predicted * np.exp(-0.2 * rates.sum(axis=0))
    # Source: Poisson pmf at n = 0 is exp(-W lambda) for every unit, so a silent window multiplies the
    # prior by exp(-W sum_i lambda_i(x)) (Zhang et al. 1998).
    np.testing.assert_allclose(silent.posterior, expected / expected.sum(), rtol=1e-10)
    assert silent.n_spikes == 0


@pytest.mark.parametrize("backend", BACKENDS)
def test_a_unit_with_zero_rate_everywhere_changes_nothing(backend):
    track = LinearTrack((0, 0), (60, 0), bin_cm=5)
    rates = _random_rates(12, 4, track.n_bins)
    rates[2] = 0.0
    dec = BayesDecoder(rates, track, track.valid_mask, 0.25, rate_floor_hz=0.01, backend=backend)
    with_spike = dec.decode(np.array([0, 2]), np.array([1, 3]))
    without = dec.decode(np.array([0]), np.array([1]))
    # Source: common practice (rate floor) — a unit floored to a constant rate multiplies every bin
    # by the same factor, which normalisation removes.
    np.testing.assert_allclose(with_spike.posterior, without.posterior, rtol=1e-12)
    assert np.all(np.isfinite(with_spike.posterior))


@pytest.mark.parametrize("backend", BACKENDS)
def test_one_unit_model_and_nan_rates_outside_the_valid_bins(backend):
    track = LinearTrack((0, 0), (50, 0), bin_cm=5)
    rates = np.linspace(0.0, 9.0, track.n_bins)[None, :].copy()
    visited = np.arange(track.n_bins) >= 3
    rates[0, :3] = np.nan
    dec = BayesDecoder(rates, track, visited, 0.5, backend=backend)
    step = dec.decode(np.array([0]), np.array([4]))
    floored = np.maximum(rates[0, 3:], 0.01)
    direct = stats.poisson.pmf(4, 0.5 * floored)
    # Source: scipy.stats.poisson.pmf normalised over the visited bins.
    np.testing.assert_allclose(step.posterior[3:], direct / direct.sum(), rtol=1e-10)
    assert np.all(step.posterior[:3] == 0.0)


@pytest.mark.parametrize("backend", BACKENDS)
def test_underflowing_state_space_prior_falls_back_to_uniform_and_is_counted(backend):
    track = LinearTrack((0, 0), (200, 0), bin_cm=2)
    x = track.bin_centers_cm[:, 0]
    rates = np.vstack([np.where(x < 10, 50.0, 0.0), np.where(x > 190, 50.0, 0.0)])
    dec = BayesDecoder(
        rates, track, track.valid_mask, 1.0, prior="state_space", random_walk_sd_cm=2.0, backend=backend
    )
    uniform = BayesDecoder(rates, track, track.valid_mask, 1.0, backend=backend)
    dec.decode(np.array([0]), np.array([120]))
    far = dec.decode(np.array([1]), np.array([120]))
    # Source: IEEE 754 float64 — 120 spikes from a 50 Hz field against a 0.01 Hz floor put the two
    # ends exp(120 * log(5000)) ~ e^1022 apart, beyond the ~e^709 range of a double, so the prior
    # carried no mass where the spikes point; the decoder must start again from the flat prior.
    assert dec.underflow_resets == 1
    np.testing.assert_allclose(far.posterior, uniform.decode(np.array([1]), np.array([120])).posterior, rtol=1e-12)
    assert np.all(np.isfinite(far.posterior)) and far.map_xy_cm[0] > 180


# -- uniform jump and temperature ---------------------------------------------------------


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize(
    "environment",
    [Arena.rectangle(120, 80, bin_cm=4), TrackGraph([[0, 0], [0, 60], [-40, 60]], [(0, 1), (1, 2)], bin_cm=5)],
    ids=["grid", "graph"],
)
@pytest.mark.parametrize("eps, temperature", [(1e-3, 1.0), (5e-3, 2.5)])
def test_jump_and_temperature_follow_the_reference_filter(environment, backend, eps, temperature):
    n_units, step_s, steps = 30, 0.02, 300
    rng = np.random.default_rng(21)
    # Narrow random fields on a low background (not data), so the posterior lives on a few rows.
    centres = environment.bin_centers_cm
    field = centres[rng.integers(0, environment.n_bins, n_units)]
    dist2 = ((centres[None, :, :] - field[:, None, :]) ** 2).sum(axis=2)
    rates = 0.2 + 40.0 * np.exp(-0.5 * dist2 / 8.0**2)
    visited = environment.valid_mask.copy()
    visited[np.flatnonzero(visited)[:3]] = False
    dec = BayesDecoder(
        rates, environment, visited, window_s=step_s, prior="state_space", random_walk_sd_cm=4.0,
        uniform_weight=eps, likelihood_temperature=temperature, backend=backend,
    )
    # The spikes come from a bin that wanders, then jumps across the environment at step 150.
    path = np.concatenate([np.full(150, np.flatnonzero(visited)[5]), np.full(150, np.flatnonzero(visited)[-5])])
    counts = rng.poisson(step_s * rates[:, path].T)
    post = filter_posteriors(counts, rates, step_s, dec.transition, uniform_weight=eps, temperature=temperature)
    worst = 0.0
    for t in range(steps):
        rows = np.flatnonzero(counts[t])
        step = dec.decode(rows, counts[t, rows])
        worst = max(worst, float(np.abs(step.posterior - post[t]).sum()))
    # Source: the reference filter (Brown et al. 1998 with a uniform jump, tested against hmmlearn).
    # The live step stores values below c * eps / n_valid as 0 (c = UNIFORM_CUTOFF). Every valid
    # bin's prior holds at least eps / n_valid, and what was dropped adds at most c * eps / n_valid
    # times a column sum of the walk (about 1) to it, so each prior value, and each posterior
    # value, is off by a relative ~c: an L1 distance of about 2c at most, reached when the spikes
    # jump to where the posterior had been cut (step 150; observed 2.3e-4 there, 1e-8 elsewhere).
    assert worst < _kernels.UNIFORM_CUTOFF
    assert dec.underflow_resets == 0


@pytest.mark.parametrize("backend", BACKENDS)
def test_a_jump_lets_the_prior_follow_spikes_that_point_far_away(backend):
    track = LinearTrack((0, 0), (200, 0), bin_cm=2)
    x = track.bin_centers_cm[:, 0]
    rates = np.vstack([np.where(x < 10, 50.0, 0.0), np.where(x > 190, 50.0, 0.0)])
    dec = BayesDecoder(
        rates, track, track.valid_mask, 1.0, prior="state_space", random_walk_sd_cm=2.0, uniform_weight=1e-3,
        backend=backend,
    )
    dec.decode(np.array([0]), np.array([120]))
    far = dec.decode(np.array([1]), np.array([120]))
    # Source: the filter's definition — with a uniform jump every valid bin keeps prior mass
    # 1e-3 / 100, so the spikes that underflowed the plain walk (test above) are followed
    # without a fallback: the posterior is the reference filter's.
    assert dec.underflow_resets == 0 and far.map_xy_cm[0] > 180
    counts = np.array([[120, 0], [0, 120]])
    with np.errstate(under="ignore"):  # the reference's far tail is e^-1022, below a double's range
        reference = filter_posteriors(counts, rates, 1.0, dec.transition, uniform_weight=1e-3)
    np.testing.assert_allclose(far.posterior, reference[1], rtol=1e-9, atol=1e-12)


def test_temperature_one_and_no_jump_change_no_bit():
    arena = Arena.rectangle(60, 40, bin_cm=4)
    rates = _random_rates(22, 8, arena.n_bins)
    plain = BayesDecoder(rates, arena, arena.valid_mask, 0.2, prior="state_space")
    explicit = BayesDecoder(
        rates, arena, arena.valid_mask, 0.2, prior="state_space", uniform_weight=0.0, likelihood_temperature=1.0
    )
    for counts in np.random.default_rng(23).poisson(0.5, (40, 8)):
        rows = np.flatnonzero(counts)
        # Source: IEEE 754 — dividing by 1.0 and adding no jump leave every number as it was.
        np.testing.assert_array_equal(plain.decode(rows, counts[rows]).posterior,
                                      explicit.decode(rows, counts[rows]).posterior)


@pytest.mark.parametrize("temperature", [1.0, 1.7])
@pytest.mark.parametrize("layout", ["C float64", "F float64", "float32", "int"])
@pytest.mark.parametrize("all_valid", [True, False])
def test_tempered_log_rates_and_expected_counts_are_the_formula_bit_for_bit(temperature, layout, all_valid):
    arena = Arena.rectangle(60, 40, bin_cm=4)
    valid = arena.valid_mask.copy()
    if not all_valid:
        valid[::5] = False
    rates = _random_rates(31, 7, arena.n_bins) * 3
    rates[:, ::7] = 0.0  # below the floor
    given = {"C float64": rates, "F float64": np.asfortranarray(rates), "float32": rates.astype(np.float32),
             "int": np.round(rates).astype(np.int64)}[layout]
    decoder = BayesDecoder(given, arena, valid, 0.2, likelihood_temperature=temperature, rate_floor_hz=0.05)
    # The Poisson log-likelihood's two terms (Zhang et al. 1998), tempered: log of the floored
    # rate over T, and the window's expected count over T; the floor fills the invalid bins.
    floored = np.full(given.shape, 0.05)
    floored[:, valid] = np.maximum(np.asarray(given, np.float64)[:, valid], 0.05)
    np.testing.assert_array_equal(decoder._log_rate, np.log(floored) / temperature)
    np.testing.assert_array_equal(decoder._expected_total, 0.2 * floored.sum(axis=0) / temperature)
    assert decoder._log_rate.flags.c_contiguous


# -- validation ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("rows", "counts", "message"),
    [
        (np.array([[0]]), np.array([[1]]), "one-dimensional"),
        (np.array([0, 1]), np.array([1]), "2 entries"),
        (np.array([0.0]), np.array([1]), "integer model rows"),
        (np.array([3]), np.array([1]), "row 3, outside"),
        (np.array([-1]), np.array([1]), "row -1, outside"),
        (np.array([0]), np.array([-2]), "negative count"),
        (np.array([0]), np.array([np.nan]), "NaN or infinite"),
        (np.array([0]), np.array([1.5]), "whole numbers"),
        (np.array([0]), np.array([1e7]), "more than"),
        (np.array([0, 2, 1]), np.array([1, 2, -1]), "negative count \\(-1\\) for row 1"),
        (np.array([0, 2**40]), np.array([1, 1]), "row 1099511627776, outside"),
        (np.array([0]), np.array(["a"]), "numeric"),
    ],
)
@pytest.mark.parametrize("backend", BACKENDS)
def test_bad_counts_are_refused_with_a_clear_message_and_no_state_change(rows, counts, message, backend):
    track = LinearTrack((0, 0), (50, 0), bin_cm=5)
    rates = _random_rates(13, 3, track.n_bins)
    refused, untouched = (
        BayesDecoder(rates, track, track.valid_mask, 0.2, prior="state_space", backend=backend) for _ in range(2)
    )
    for dec in (refused, untouched):
        dec.decode(np.array([1]), np.array([2]))
    with pytest.raises(ValueError, match=message):
        refused.decode(rows, counts)
    a = refused.decode(np.array([0]), np.array([1])).posterior
    b = untouched.decode(np.array([0]), np.array([1])).posterior
    # Source: common practice — a refused input leaves the filter exactly where it was.
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (dict(rate_maps_hz=np.ones((2, 5))), r"shape \(n_units, 10\)"),
        (dict(rate_maps_hz=-np.ones((2, 10))), "row 0 holds a negative"),
        (dict(rate_maps_hz=np.array([[1.0] * 10, [1.0] * 9 + [np.nan]])), "row 1 holds a negative, NaN or infinite"),
        (dict(rate_maps_hz=np.array([[1.0] * 9 + [np.inf], [1.0] * 10])), "row 0 holds a negative, NaN or infinite"),
        (dict(valid_mask=np.zeros(10, bool)), "no bin is valid"),
        (dict(valid_mask=np.ones(9, bool)), r"shape \(10,\)"),
        (dict(window_s=0.0), "window_s must be a positive"),
        (dict(prior="smooth"), "prior must be one of"),
        (dict(zone_masks=np.ones((1, 9), bool)), "zone_masks must be"),
        (dict(rate_floor_hz=-1.0), "rate_floor_hz must be a positive"),
        (dict(backend="gpu"), "backend must be one of"),
        (dict(uniform_weight=1.0), r"uniform_weight must be a probability in \[0, 1\)"),
        (dict(uniform_weight=-0.1), "uniform_weight must be a probability"),
        (dict(likelihood_temperature=0.0), "likelihood_temperature must be a positive"),
        (dict(rate_maps_hz=np.full((2, 10), 1e308)), "infinite expected spike count"),
    ],
)
def test_bad_settings_are_refused_with_a_clear_message(change, message):
    track = LinearTrack((0, 0), (50, 0), bin_cm=5)
    kw = dict(rate_maps_hz=np.ones((2, 10)), environment=track, valid_mask=track.valid_mask, window_s=0.2)
    kw.update(change)
    with pytest.raises(ValueError, match=message):
        BayesDecoder(**kw)


def test_decoded_step_is_frozen():
    track = LinearTrack((0, 0), (50, 0), bin_cm=5)
    step = BayesDecoder(np.ones((1, 10)), track, track.valid_mask, 0.2).decode(np.array([0]), np.array([1]))
    assert isinstance(step, DecodedStep)
    with pytest.raises(AttributeError):
        step.map_bin = 3
    with pytest.raises(ValueError):
        step.posterior[0] = 1.0


# -- overlapping windows, kept steps, determinism -----------------------------------------


def _overlapping_windows(seed: int, rates: np.ndarray, n_steps: int, per_window: int = 10):
    """Windows of ``per_window`` sub-steps moved by one sub-step (90% overlap, as 200 ms moved by 20 ms)."""
    rng = np.random.default_rng(seed)
    n_units, n_bins = rates.shape
    place = np.abs(np.cumsum(rng.integers(-1, 2, n_steps + per_window))) % n_bins
    sub = rng.poisson(0.02 * rates[:, place].T)
    cum = np.vstack([np.zeros((1, n_units), np.int64), np.cumsum(sub, axis=0)])
    for k in range(n_steps):
        counts = cum[k + per_window] - cum[k]
        rows = np.flatnonzero(counts)
        yield rows, counts[rows]


def test_numba_backend_updating_its_likelihood_agrees_with_numpy_over_a_long_run():
    arena = Arena.rectangle(60, 40, bin_cm=2)
    rates = _random_rates(14, 80, arena.n_bins)
    zones = arena.bin_centers_cm[:, 0][None, :] < 15
    kw = dict(prior="state_space", random_walk_sd_cm=3.0, zone_masks=zones)
    fast = BayesDecoder(rates, arena, arena.valid_mask, 0.2, **kw)
    slow = BayesDecoder(rates, arena, arena.valid_mask, 0.2, backend="numpy", **kw)
    for rows, counts in _overlapping_windows(15, rates, 1200):
        a, b = fast.decode(rows, counts), slow.decode(rows, counts)
        # Source: the numpy twins (log-likelihood afresh at every window); tolerances explained in
        # tests/test_kernels.py (incremental log-likelihood drift below 1e-10).
        np.testing.assert_allclose(a.posterior, b.posterior, rtol=1e-9, atol=2e-300)
        assert (a.map_bin, a.hpd95_size, a.n_spikes) == (b.map_bin, b.hpd95_size, b.n_spikes)
        np.testing.assert_allclose(a.zone_mass, b.zone_mass, rtol=1e-9)
        np.testing.assert_allclose(a.mean_xy_cm, b.mean_xy_cm, rtol=1e-9)


@pytest.mark.parametrize("backend", BACKENDS)
def test_a_kept_step_is_never_changed_by_later_steps(backend):
    arena = Arena.rectangle(40, 30, bin_cm=2)
    rates = _random_rates(16, 20, arena.n_bins)
    dec = BayesDecoder(rates, arena, arena.valid_mask, 0.2, prior="state_space", backend=backend,
                       zone_masks=arena.bin_centers_cm[:, 1][None, :] < 10)
    windows = list(_overlapping_windows(17, rates, 20))
    kept = dec.decode(*windows[0])
    copies = [np.array(x) for x in (kept.posterior, kept.map_xy_cm, kept.mean_xy_cm, kept.zone_mass)]
    for rows, counts in windows[1:]:
        dec.decode(rows, counts)
    # Source: common practice — a result handed to a caller (a replay keeps every step) is its own.
    for now, then in zip((kept.posterior, kept.map_xy_cm, kept.mean_xy_cm, kept.zone_mass), copies):
        np.testing.assert_array_equal(now, then)
        with pytest.raises(ValueError):
            now[0] = 1.0


@pytest.mark.parametrize("backend", BACKENDS)
def test_same_windows_give_the_same_bits_and_reset_leaves_no_trace(backend):
    arena = Arena.rectangle(40, 30, bin_cm=2)
    rates = _random_rates(18, 30, arena.n_bins)

    def new():
        return BayesDecoder(rates, arena, arena.valid_mask, 0.2, prior="state_space", backend=backend)

    windows = list(_overlapping_windows(19, rates, 120))
    first, second, reset = new(), new(), new()
    for rows, counts in windows[:50]:
        reset.decode(rows, counts)
    reset.reset()
    for rows, counts in windows[50:]:
        a, b, c = first.decode(rows, counts), second.decode(rows, counts), reset.decode(rows, counts)
        # Source: common practice (live runs and replays are compared by a digest of every step) —
        # identical inputs in identical order give identical bits, and a reset decoder is a new one.
        for x, y in ((a, b), (a, c)):
            np.testing.assert_array_equal(x.posterior, y.posterior)
            assert (x.map_bin, x.peak_prob, x.hpd95_size) == (y.map_bin, y.peak_prob, y.hpd95_size)


@pytest.mark.parametrize("backend", BACKENDS)
def test_underflowing_prior_on_a_grid_arena_falls_back_to_uniform(backend):
    arena = Arena.rectangle(200, 4, bin_cm=2)
    x = arena.bin_centers_cm[:, 0]
    rates = np.vstack([np.where(x < 10, 50.0, 0.0), np.where(x > 190, 50.0, 0.0)])
    dec = BayesDecoder(rates, arena, arena.valid_mask, 1.0, prior="state_space", random_walk_sd_cm=2.0,
                       backend=backend)
    uniform = BayesDecoder(rates, arena, arena.valid_mask, 1.0, backend=backend)
    dec.decode(np.array([0]), np.array([120]))
    far = dec.decode(np.array([1]), np.array([120]))
    # Source: IEEE 754 float64, as in the track test above: the two ends are ~e^1022 apart.
    assert dec.underflow_resets == 1
    np.testing.assert_allclose(far.posterior, uniform.decode(np.array([1]), np.array([120])).posterior, rtol=1e-12)
    assert far.map_xy_cm[0] > 180


@pytest.mark.parametrize("backend", BACKENDS)
def test_decoding_held_spikes_equals_counting_them_first(backend):
    # Source: the decoder's contract (decode_held is decode of the window's counts), checked bit for bit,
    # against windows counted with numpy.bincount, over a run long enough to take the incremental path.
    arena = Arena.rectangle(40, 30, bin_cm=2)
    rates = _random_rates(21, 30, arena.n_bins)
    rng = np.random.default_rng(22)
    t = np.sort(rng.uniform(0.0, 8.0, 6000))
    rows = rng.integers(0, 30, t.size).astype(np.int64)
    by_counts = BayesDecoder(rates, arena, arena.valid_mask, 0.2, prior="state_space", backend=backend)
    held = BayesDecoder(rates, arena, arena.valid_mask, 0.2, prior="state_space", backend=backend)
    start = 0
    for k in range(10, 400):
        t_end = k * 0.02
        inside = (t > t_end - 0.2) & (t <= t_end)
        binned = np.bincount(rows[inside], minlength=30)
        fired = np.flatnonzero(binned)
        a = by_counts.decode(fired, binned[fired])
        b, first = held.decode_held(t, rows, start, t.size, t_end)
        assert first == int(np.searchsorted(t, t_end - 0.2, side="right"))
        start = first
        np.testing.assert_array_equal(a.posterior, b.posterior)
        np.testing.assert_array_equal(a.zone_mass, b.zone_mass)
        assert (a.map_bin, a.peak_prob, a.hpd95_size, a.n_spikes) == (b.map_bin, b.peak_prob, b.hpd95_size, b.n_spikes)


@pytest.mark.parametrize("backend", BACKENDS)
def test_a_held_spike_with_a_row_out_of_range_is_refused_without_a_state_change(backend):
    track = LinearTrack((0, 0), (40, 0), bin_cm=5)
    rates = _random_rates(23, 3, track.n_bins)
    decoder = BayesDecoder(rates, track, track.valid_mask, 0.2, prior="state_space", backend=backend)
    t = np.array([0.05, 0.1, 0.15])
    decoder.decode_held(t, np.array([0, 1, 2]), 0, 3, 0.15)
    state = decoder._state.copy()
    with pytest.raises(ValueError, match="row 3, outside the model's rows 0..2"):
        decoder.decode_held(t, np.array([0, 3, 2]), 0, 3, 0.2)
    np.testing.assert_array_equal(decoder._state, state)
    # A bad row outside the window is not looked at.
    assert decoder.decode_held(t, np.array([7, 1, 2]), 0, 3, 0.26)[0].n_spikes == 2
