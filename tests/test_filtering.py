"""Tests of decoder.inference.filtering: the reference causal filter against outside references.

References used: hmmlearn.hmm.PoissonHMM (forward pass of a hidden Markov
model, Rabiner 1989), brute-force Bayes over every path of a tiny chain with
scipy.stats.poisson, and the live decoder's fused step (decoding.BayesDecoder)
for the special case it covers. Rate maps are small random arrays, not data.
"""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
from hmmlearn.hmm import PoissonHMM
from scipy import stats

from decoder.inference.decoding import BayesDecoder
from decoder.inference.filtering import (
    filter_posteriors,
    hpd_contains,
    hpd_mass,
    tempered_log_likelihood,
)
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Arena, LinearTrack, TrackGraph


@pytest.fixture(autouse=True)
def strict_floats():
    """Every test runs with numpy floating-point errors raised (but underflow) and warnings as errors."""
    with np.errstate(all="raise", under="ignore"), warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


def _random_rates(seed: int, n_units: int, n_bins: int) -> np.ndarray:
    return np.random.default_rng(seed).gamma(0.8, 5.0, (n_units, n_bins)) + 0.05


class _TemperedPoissonHMM(PoissonHMM):
    """hmmlearn's Poisson HMM with its emission log-likelihood divided by a temperature."""

    def __init__(self, temperature: float, **kwargs):
        super().__init__(**kwargs)
        self.temperature = temperature

    def _compute_log_likelihood(self, X):
        return super()._compute_log_likelihood(X) / self.temperature


def _mixed(transmat: np.ndarray, valid: np.ndarray, eps: float) -> np.ndarray:
    """(1 - eps) T + eps / n_valid on valid columns; invalid bins self-loop (unreachable)."""
    out = (1 - eps) * transmat + eps * valid[np.newaxis, :] / valid.sum()
    out[~valid] = 0.0
    out[~valid, ~valid] = 1.0
    return out


@pytest.mark.parametrize("eps, temperature", [(0.0, 1.0), (0.01, 1.0), (0.002, 2.5)])
def test_filter_matches_hmmlearn_forward_pass_on_a_grid(eps, temperature):
    arena = Arena.rectangle(50, 40, bin_cm=10)  # 4 x 5 bins
    visited = np.ones(arena.n_bins, bool)
    visited[[0, 7, 19]] = False
    n_units, step_s, steps = 6, 0.1, 15
    rates = _random_rates(4, n_units, arena.n_bins)
    walk = RandomWalk(arena, visited, 9.0, backend="numpy")
    counts = np.random.default_rng(3).poisson(0.6, (steps, n_units))
    post = filter_posteriors(counts, rates, step_s, walk, uniform_weight=eps, temperature=temperature)
    hmm = _TemperedPoissonHMM(temperature, n_components=arena.n_bins, init_params="", params="")
    hmm.startprob_ = visited / visited.sum()
    hmm.transmat_ = _mixed(walk.dense_matrix(), visited, eps)
    hmm.lambdas_ = step_s * np.fmax(rates, 0.01).T
    for t in range(steps):
        # Source: hmmlearn.hmm.PoissonHMM forward pass; at the last observation forward-backward
        # equals the filtered posterior, so predict_proba(X[:t+1])[-1] is the causal filter at t.
        np.testing.assert_allclose(post[t], hmm.predict_proba(counts[: t + 1])[-1], rtol=1e-8, atol=1e-13)


def test_filter_matches_hmmlearn_on_a_track_graph_with_mixing():
    maze = TrackGraph([[0, 0], [0, 40], [-30, 40], [30, 40]], [(0, 1), (1, 2), (1, 3)], bin_cm=10)
    n_units, step_s, steps, eps = 5, 0.05, 12, 0.005
    rates = _random_rates(6, n_units, maze.n_bins)
    walk = RandomWalk(maze, maze.valid_mask, 12.0, backend="numpy")
    counts = np.random.default_rng(5).poisson(0.5, (steps, n_units))
    post = filter_posteriors(counts, rates, step_s, walk, uniform_weight=eps, temperature=1.7)
    hmm = _TemperedPoissonHMM(1.7, n_components=maze.n_bins, init_params="", params="")
    hmm.startprob_ = np.full(maze.n_bins, 1 / maze.n_bins)
    hmm.transmat_ = _mixed(walk.dense_matrix(), maze.valid_mask, eps)
    hmm.lambdas_ = step_s * rates.T
    # Source: hmmlearn.hmm.PoissonHMM forward pass, as on the grid.
    for t in range(steps):
        np.testing.assert_allclose(post[t], hmm.predict_proba(counts[: t + 1])[-1], rtol=1e-8, atol=1e-13)


def test_filter_matches_brute_force_bayes_over_every_path():
    track = LinearTrack((0, 0), (40, 0), bin_cm=10)  # 4 bins
    n_units, step_s, steps, eps, temperature = 3, 0.2, 4, 0.05, 1.6
    rates = _random_rates(7, n_units, track.n_bins)
    walk = RandomWalk(track, track.valid_mask, 8.0, backend="numpy")
    counts = np.random.default_rng(8).poisson(1.0, (steps, n_units))
    post = filter_posteriors(counts, rates, step_s, walk, uniform_weight=eps, temperature=temperature)
    n = track.n_bins
    move = (1 - eps) * walk.dense_matrix() + eps / n
    # Tempered likelihood of each step and bin, from scipy's Poisson pmf.
    like = np.prod(stats.poisson.pmf(counts[:, :, None], step_s * rates[None]), axis=1) ** (1 / temperature)
    for t in range(steps):
        marginal = np.zeros(n)
        for path in itertools.product(range(n), repeat=t + 1):
            p = 1.0 / n * like[0, path[0]]
            for k in range(1, t + 1):
                p *= move[path[k - 1], path[k]] * like[k, path[k]]
            marginal[path[-1]] += p
        # Source: Bayes' rule over all (n^(t+1)) paths of the Markov chain, p(x_t | n_1..n_t) by
        # enumeration, likelihood from scipy.stats.poisson.pmf raised to 1/T.
        np.testing.assert_allclose(post[t], marginal / marginal.sum(), rtol=1e-10)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize(
    "environment",
    [Arena.circle((0, 0), 25, bin_cm=5), TrackGraph([[0, 0], [0, 60], [-40, 60]], [(0, 1), (1, 2)], bin_cm=5)],
    ids=["grid", "graph"],
)
def test_the_live_decoder_is_this_filter_without_mixing_or_temperature(environment, backend):
    n_units, step_s, steps = 12, 0.02, 120
    rates = _random_rates(9, n_units, environment.n_bins) * 3
    visited = environment.valid_mask.copy()
    visited[np.flatnonzero(visited)[:3]] = False
    dec = BayesDecoder(
        rates, environment, visited, window_s=step_s, prior="state_space", random_walk_sd_cm=6.0, backend=backend
    )
    counts = np.random.default_rng(10).poisson(0.3, (steps, n_units))
    post = filter_posteriors(counts, rates, step_s, dec.transition)
    for t in range(steps):
        rows = np.flatnonzero(counts[t])
        step = dec.decode(rows, counts[t, rows])
        # Source: the filter's definition (Brown et al. 1998): with window_s == step_s each spike is
        # counted once, and the fused step agrees with the reference to rounding.
        np.testing.assert_allclose(step.posterior, post[t], rtol=1e-9, atol=1e-14)
    assert dec.underflow_resets == 0


def test_temperature_divides_the_poisson_log_likelihood():
    rates = _random_rates(11, 4, 6)
    counts = np.array([[0, 2, 1, 0], [3, 0, 0, 1]])
    ll = tempered_log_likelihood(counts, rates, 0.25, temperature=2.0)
    exact = stats.poisson.logpmf(counts[:, :, None], 0.25 * rates[None]).sum(axis=1)
    # Source: scipy.stats.poisson.logpmf; equal up to a constant per step, which the posterior drops.
    np.testing.assert_allclose(ll - ll[:, :1], (exact - exact[:, :1]) / 2.0, rtol=1e-12, atol=1e-12)


def test_hpd_membership_and_mass_follow_the_sorted_posterior():
    rng = np.random.default_rng(12)
    post = rng.dirichlet(np.full(30, 0.3), 200)
    bins = rng.integers(0, 30, 200)
    bins[:5] = -1
    inside = hpd_contains(post, bins)
    masses = hpd_mass(post)
    for p, b, got, m in zip(post, bins, inside, masses):
        order = np.argsort(-p)
        k = int(np.searchsorted(np.cumsum(p[order]), 0.95)) + 1
        # Source: definition of the HPD region — the most probable bins until their mass reaches 0.95.
        assert got == (b >= 0 and b in order[:k])
        assert m == pytest.approx(p[order[:k]].sum(), rel=1e-12)
        assert m >= 0.95


def test_bad_arguments_say_what_is_wrong():
    track = LinearTrack((0, 0), (40, 0), bin_cm=10)
    walk = RandomWalk(track, track.valid_mask, 5.0, backend="numpy")
    rates = np.ones((2, 4))
    with pytest.raises(ValueError, match="rate_maps_hz"):
        filter_posteriors(np.zeros((3, 2)), np.ones((2, 5)), 0.02, walk)
    with pytest.raises(ValueError, match="counts"):
        filter_posteriors(np.zeros((3, 3)), rates, 0.02, walk)
    with pytest.raises(ValueError, match="uniform_weight"):
        filter_posteriors(np.zeros((3, 2)), rates, 0.02, walk, uniform_weight=1.0)
    with pytest.raises(ValueError, match="temperature"):
        filter_posteriors(np.zeros((3, 2)), rates, 0.02, walk, temperature=0.0)
    with pytest.raises(ValueError, match="step_s"):
        filter_posteriors(np.zeros((3, 2)), rates, -0.02, walk)
    narrow = RandomWalk(track, track.valid_mask, 0.1, backend="numpy")  # stays put
    sharp = np.array([[1e3, 0.01, 0.01, 0.01], [0.01, 0.01, 0.01, 1e3]])
    with pytest.raises(ValueError, match="uniform_weight > 0"):
        filter_posteriors(np.array([[200, 0], [0, 200]]), sharp, 0.01, narrow)
