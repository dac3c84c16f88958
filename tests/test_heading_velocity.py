"""The joint state of heading and angular velocity: its discretisation, its compiled step and its fit.

References used: the Ornstein-Uhlenbeck process's exact one-step transition
and stationary variance (Uhlenbeck and Ornstein 1930; from memory), the
forward pass of a hidden Markov model with an explicit transition matrix
(Rabiner 1989) and hmmlearn.hmm.PoissonHMM's, and the variance of an
integrated Ornstein-Uhlenbeck velocity over a lag (Uhlenbeck and Ornstein
1930, eq. for the mean square displacement; from memory). Rate maps and
counts are small random arrays, not data.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hmmlearn.hmm import PoissonHMM

from decoder.inference import _kernels as K
from decoder.inference.decoding import BayesDecoder
from decoder.inference.heading_velocity import N_VELOCITY_BINS, HeadingVelocity
from decoder.space.environments import LinearTrack
from decoder.space.headings import HeadingRing


def _joint_matrix(transition: np.ndarray, shift_bins: np.ndarray, n: int) -> np.ndarray:
    """The joint state's transition as one explicit matrix, states ``i * m + a`` (velocity first, then the turn)."""
    m = shift_bins.size
    big = np.zeros((n * m, n * m))
    for i in range(n):
        for a in range(m):
            for b in range(m):
                k = math.floor(shift_bins[b])
                f = shift_bins[b] - k
                big[i * m + a, ((i + k) % n) * m + b] += transition[a, b] * (1 - f)
                big[i * m + a, ((i + k + 1) % n) * m + b] += transition[a, b] * f
    return big


def test_velocity_transition_is_the_exact_ornstein_uhlenbeck_step():
    model = HeadingVelocity(sd_deg_s=90.0, time_constant_s=0.3)
    velocity, transition, prior, shift = model.discretised(step_s=0.02, bin_deg=6.0)
    assert velocity.size == transition.shape[0] == N_VELOCITY_BINS
    np.testing.assert_allclose(transition.sum(axis=1), 1.0, rtol=1e-12)
    # Source: Uhlenbeck & Ornstein 1930 (from memory): one step's mean is exp(-dt/tau) w, and the
    # stationary s.d. is the process's; on 21 bins over +-3 s.d. both hold to a few percent.
    middle = slice(5, 16)
    mean_next = transition @ velocity
    np.testing.assert_allclose(mean_next[middle], math.exp(-0.02 / 0.3) * velocity[middle], atol=0.05 * 90.0)
    np.testing.assert_allclose(math.sqrt(prior @ velocity**2), 90.0, rtol=0.05)
    np.testing.assert_allclose(prior @ transition, prior, atol=1e-12)
    np.testing.assert_allclose(shift, velocity * 0.02 / 6.0)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize("uniform_weight", [0.0, 2e-3])
def test_joint_filter_matches_an_explicit_matrix_forward_pass_and_hmmlearn(backend, uniform_weight):
    ring = HeadingRing(bin_deg=30.0)  # 12 bins: a joint state of 12 x 21
    n, step_s, steps = ring.n_bins, 0.05, 25
    rng = np.random.default_rng(5)
    rates = rng.gamma(2.0, 4.0, (5, n))
    counts = rng.poisson(0.5, (steps, 5))
    model = HeadingVelocity(sd_deg_s=200.0, time_constant_s=0.3)
    _, transition, prior, shift = model.discretised(step_s, ring.bin_cm)
    dec = BayesDecoder(rates, ring, np.ones(n, bool), step_s, prior="state_space", uniform_weight=uniform_weight,
                       heading_velocity=model, backend=backend)
    m = prior.size
    big = _joint_matrix(transition, shift, n)
    start = np.repeat(np.full(n, 1.0 / n), m) * np.tile(prior, n)
    mixed = (1 - uniform_weight) * big + uniform_weight * start[np.newaxis, :]
    hmm = PoissonHMM(n_components=n * m, init_params="", params="")
    hmm.startprob_ = start
    hmm.transmat_ = mixed
    hmm.lambdas_ = np.repeat(step_s * np.fmax(rates, 0.01).T, m, axis=0)
    alpha = start.copy()
    for t in range(steps):
        fired = np.flatnonzero(counts[t])
        got = dec.decode(fired, counts[t, fired].astype(np.float64)).posterior
        # Source: the forward pass with the explicit joint matrix (Rabiner 1989), marginalised over velocity.
        if t > 0:
            alpha = alpha @ mixed
        lam = step_s * np.fmax(rates, 0.01)
        like = np.exp(counts[t] @ np.log(lam) - lam.sum(axis=0))
        alpha = alpha * np.repeat(like, m)
        alpha /= alpha.sum()
        np.testing.assert_allclose(got, alpha.reshape(n, m).sum(axis=1), rtol=1e-9, atol=1e-13)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # Source: hmmlearn.hmm.PoissonHMM forward pass; its posterior at the last observation is the filter's.
            reference = hmm.predict_proba(counts[: t + 1])[-1]
        np.testing.assert_allclose(got, reference.reshape(n, m).sum(axis=1), rtol=1e-7, atol=1e-12)


def test_compiled_joint_step_matches_its_numpy_twin_over_a_long_run_and_after_a_reset():
    ring = HeadingRing(bin_deg=6.0)
    rng = np.random.default_rng(9)
    rates = 0.5 + 30.0 * np.exp(4.0 * (np.cos(np.radians(ring.bin_centers_deg)[None, :]
                                               - rng.uniform(0, 2 * np.pi, (20, 1))) - 1.0))
    model = HeadingVelocity(sd_deg_s=90.0, time_constant_s=0.3)
    common = dict(prior="state_space", uniform_weight=1e-3, heading_velocity=model)
    fast = BayesDecoder(rates, ring, np.ones(ring.n_bins, bool), 0.02, **common)
    slow = BayesDecoder(rates, ring, np.ones(ring.n_bins, bool), 0.02, backend="numpy", **common)
    for t in range(400):
        if t == 200:
            fast.reset()
            slow.reset()
        counts = rng.poisson(0.1, 20)
        fired = np.flatnonzero(counts)
        a = fast.decode(fired, counts[fired].astype(np.float64))
        b = slow.decode(fired, counts[fired].astype(np.float64))
        # Source: the numpy twin (the same arithmetic in another order).
        np.testing.assert_allclose(a.posterior, b.posterior, rtol=1e-9, atol=1e-14)
        assert a.map_bin == b.map_bin


def test_joint_state_is_refused_where_it_has_no_meaning():
    ring = HeadingRing(bin_deg=6.0)
    track = LinearTrack((0, 0), (100, 0), bin_cm=10)
    model = HeadingVelocity(sd_deg_s=90.0, time_constant_s=0.3)
    with pytest.raises(ValueError, match="heading ring"):
        BayesDecoder(np.ones((2, 10)), track, track.valid_mask, 0.02, prior="state_space", heading_velocity=model)
    with pytest.raises(ValueError, match="state-space prior"):
        BayesDecoder(np.ones((2, 60)), ring, ring.valid_mask, 0.02, heading_velocity=model)
    with pytest.raises(ValueError, match="no drift"):
        BayesDecoder(np.ones((2, 60)), ring, ring.valid_mask, 0.02, prior="state_space", drift_gain=0.5,
                     heading_velocity=model)
    with pytest.raises(ValueError, match="sd_deg_s"):
        HeadingVelocity(sd_deg_s=0.0, time_constant_s=0.3)
    assert K.VELOCITY_TRANSITION not in (K.NO_TRANSITION, K.GRID_TRANSITION, K.DENSE_TRANSITION)
