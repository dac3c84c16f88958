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

import dataclasses
import math
import warnings

import numpy as np
import pytest
from hmmlearn.hmm import PoissonHMM

from decoder.encoding.calibration import fit_temperature, point_estimate_of
from decoder.encoding.heading_motion import (
    MIN_GAIN,
    choose_heading_velocity,
    fit_heading_velocity,
    heading_velocity_of,
)
from decoder.inference import _kernels as K
from decoder.inference.decoding import BayesDecoder
from decoder.inference.filtering import hpd_contains
from decoder.inference.heading_velocity import N_VELOCITY_BINS, HeadingVelocity
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import LinearTrack
from decoder.space.headings import HeadingRing, heading_points_cm


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


def _ou_heading(rng: np.random.Generator, sd_deg_s: float, tau_s: float, n: int, frame_s: float) -> np.ndarray:
    """A heading (degrees, unwrapped) whose velocity is the exact discretisation of an Ornstein-Uhlenbeck process."""
    phi = math.exp(-frame_s / tau_s)
    omega = np.empty(n)
    omega[0] = rng.normal(0.0, sd_deg_s)
    kicks = rng.normal(0.0, sd_deg_s * math.sqrt(1 - phi**2), n)
    for i in range(1, n):
        omega[i] = phi * omega[i - 1] + kicks[i]
    return np.cumsum(omega) * frame_s


@pytest.mark.parametrize("sd_deg_s, tau_s", [(90.0, 0.3), (40.0, 0.15)])
def test_turning_process_is_recovered_from_a_noisy_tracked_heading(sd_deg_s, tau_s):
    rng = np.random.default_rng(21)
    frame_s, n = 0.005, 200_000  # 1000 s sampled finely, so that the Euler integral is close to the process's
    heading = _ou_heading(rng, sd_deg_s, tau_s, n, frame_s)[::4]  # 50 Hz frames
    t = np.arange(heading.size) * 4 * frame_s
    tracked = np.mod(heading + rng.normal(0.0, 3.0, heading.size), 360.0)
    tracked[rng.random(heading.size) < 0.02] = np.nan
    fit, noise_sd_deg = fit_heading_velocity(t, tracked)
    # Source: the integrated Ornstein-Uhlenbeck displacement variance (Uhlenbeck & Ornstein 1930, from
    # memory) generated the data; 1000 s hold ~3,000-7,000 correlation times, so 10 % bounds the estimate.
    assert fit.sd_deg_s == pytest.approx(sd_deg_s, rel=0.1)
    assert fit.time_constant_s == pytest.approx(tau_s, rel=0.15)
    # The generator's 3-degree white tracker noise, from the variance's intercept (twice its variance),
    # the trimmed variances corrected by the truncated normal's second moment (from memory).
    assert noise_sd_deg == pytest.approx(3.0, rel=0.05)


def test_turning_fit_refuses_too_few_frames_or_a_still_head():
    t = np.arange(100) * 0.02
    with pytest.raises(ValueError, match="frames with a heading"):
        fit_heading_velocity(t, np.zeros(100))
    t = np.arange(5000) * 0.02
    with pytest.raises(ValueError, match="never turns"):
        fit_heading_velocity(t, np.full(5000, 45.0))
    with pytest.raises(ValueError, match="increasing"):
        fit_heading_velocity(t[::-1], np.zeros(5000))


def _turning_cells(seed: int, burst: int = 1):
    """Invented data: 12 von Mises cells on a head turning at 90 deg/s over 0.3 s, 6000 steps of 20 ms.

    Each spike is a burst of ``burst`` (at ``1 / burst`` of the rate). Returns the ring, the step, the
    cells' tuning on the bins, two folds' counts and headings (ring points), the walk, the plain walk's
    fit on them, and the generator for further draws.
    """
    ring = HeadingRing(6.0)
    rng = np.random.default_rng(seed)
    step_s = 0.02
    heading = _ou_heading(rng, 90.0, 0.3, 6000, step_s)
    preferred = np.linspace(0, 360, 12, endpoint=False)
    rates = 0.5 + 40.0 * np.exp(4.0 * (np.cos(np.radians(ring.bin_centers_deg[None, :] - preferred[:, None])) - 1))
    true_rates = 0.5 + 40.0 * np.exp(4.0 * (np.cos(np.radians(heading[:, None] - preferred[None, :])) - 1))
    counts = burst * rng.poisson(true_rates / burst * step_s)
    xy = heading_points_cm(np.radians(heading))
    walk = RandomWalk(ring, ring.valid_mask, 7.0)
    folds = [slice(0, 3000), slice(3000, 6000)]
    fold_counts, fold_xy = [counts[f] for f in folds], [xy[f] for f in folds]
    plain = fit_temperature([rates, rates], fold_counts, [ring.bin_index(p) for p in fold_xy], step_s, walk,
                            uniform_weight=1e-3, fold_true_xy_cm=fold_xy)
    return ring, step_s, rates, fold_counts, fold_xy, walk, plain, rng


def test_fit_time_choice_keeps_the_joint_state_only_where_it_wins():
    # Invented data (a sanity bound, not a reference): the joint state must beat the plain walk held
    # out, replace a drift it beats, and leave a fit it cannot beat as it came.
    _, step_s, rates, fold_counts, fold_xy, walk, plain, rng = _turning_cells(2)
    frames_t = np.arange(6000) * step_s
    tracked = np.concatenate(fold_xy) + rng.normal(0.0, 0.5, (6000, 2))

    def choose(fit):
        return choose_heading_velocity(fit, [rates, rates], fold_counts, fold_xy, step_s, walk, frames_t, tracked,
                                       uniform_weight=1e-3)

    chosen = choose(plain)
    assert chosen.angular_velocity_sd_deg_s > 0 and 0.5 < chosen.coverage <= 1.0
    assert min(chosen.map_median_cm, chosen.mean_median_cm) < (1 - MIN_GAIN) * min(plain.map_median_cm,
                                                                                   plain.mean_median_cm)
    assert heading_velocity_of(chosen) == HeadingVelocity(chosen.angular_velocity_sd_deg_s,
                                                          chosen.angular_velocity_time_constant_s)
    assert heading_velocity_of(plain) is None
    # A drifting walk is replaced by the joint state where that wins: the fit decodes without the drift.
    replaced = choose(dataclasses.replace(plain, drift_gain=0.5))
    assert replaced.drift_gain == 0 and replaced.angular_velocity_sd_deg_s > 0
    # ... and kept where the walk's held-out median is already out of reach.
    sharp = dataclasses.replace(plain, map_median_cm=0.01, mean_median_cm=0.01)
    assert choose(sharp) is sharp


def test_temperature_is_refitted_for_the_joint_state_and_its_coverage_is_what_it_decodes_with():
    # Invented data (a sanity bound, not a reference): the cells above, each spike a burst of three, so
    # that their counts are overdispersed (variance three times the mean) and the plain Poisson filter
    # is overconfident.
    ring, step_s, rates, fold_counts, fold_xy, walk, plain, _ = _turning_cells(5, burst=3)
    chosen = choose_heading_velocity(plain, [rates, rates], fold_counts, fold_xy, step_s, walk,
                                     np.arange(6000) * step_s, np.concatenate(fold_xy), uniform_weight=1e-3)
    assert plain.temperature > 1.0 and chosen.angular_velocity_sd_deg_s > 0
    assert chosen.temperature != plain.temperature
    # Source: the definition of a calibrated 95 % HPD region (common practice): at the refitted
    # temperature the held-out coverage meets the regions' own mass, to the bisection's resolution
    # (a few percent of T moves the coverage by about a hundredth here).
    assert chosen.coverage == pytest.approx(chosen.region_mass, abs=0.02)
    # The coverage reported is the joint filter's at that temperature, recounted with the reference
    # filter module's HPD rule (decoder.inference.filtering.hpd_contains, checked against hmmlearn's
    # forward pass with the joint state above), burn-in steps left out as the fit leaves them out.
    inside = []
    burn = round(1.0 / step_s)
    for counts_k, xy_k in zip(fold_counts, fold_xy):
        bins_k = ring.bin_index(xy_k)
        decoder = BayesDecoder(rates, ring, ring.valid_mask, step_s, prior="state_space", random_walk_sd_cm=7.0,
                               uniform_weight=1e-3, likelihood_temperature=chosen.temperature,
                               heading_velocity=heading_velocity_of(chosen))
        for i, row in enumerate(counts_k):
            post = decoder.decode(np.flatnonzero(row), row[row > 0].astype(np.float64)).posterior
            if i >= burn and bins_k[i] >= 0:
                inside.append(bool(hpd_contains(post[np.newaxis], np.array([bins_k[i]]))[0]))
    assert chosen.coverage == pytest.approx(np.mean(inside), abs=1e-12)


def test_a_live_heading_demo_with_the_joint_state_is_reproduced_by_its_replay(tmp_path):
    # A real demo of the heading scenario (simulated rig, decoder and stand-in as processes over loopback
    # ZeroMQ), learning for the scenario's three minutes; invented data, so only plumbing: the fit keeps
    # the joint state (as on seeds 7 and 8 of bench/heading.py) and the replay gives the live digest.
    import json
    import subprocess
    import sys
    from pathlib import Path

    from rig_adapters.sessions.replay import replay_session

    root = Path(__file__).resolve().parent.parent
    log_dir, summary = tmp_path / "session", tmp_path / "summary.json"
    proc = subprocess.run(
        [sys.executable, "-m", "rig_adapters.cli", "demo", "--config", "configs/heading_goal_arc.toml",
         "--speed", "10", "--decode-data-s", "30", "--log", str(log_dir),
         "--summary", str(summary)],
        cwd=root, capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    live = json.loads(summary.read_text())
    replay = replay_session(log_dir).summary
    assert live["decode"]["steps"] > 1000
    assert replay["decode"]["digest"] == live["decode"]["digest"]
    assert replay["decode"]["heading_median_error_deg"] == live["decode"]["heading_median_error_deg"]
    assert replay["triggers"]["count"] == live["triggers"]["count"]
    figures = replay["session"]["readiness"]["filter"]
    assert figures["angular_velocity_sd_deg_s"] > 0, figures


def test_a_heading_ring_takes_the_posterior_mean_without_the_arms_margin():
    # Source: the rule documented in decoder.encoding.calibration.point_estimate_of: the mean's 5 %
    # margin guards against a mean between two arms, off the track; a circular mean is always a heading.
    ring, track = HeadingRing(6.0), LinearTrack((0, 0), (40, 0), bin_cm=10)
    assert point_estimate_of(5.0, 4.9, ring) == "mean"
    assert point_estimate_of(5.0, 4.9, track) == point_estimate_of(5.0, 4.9) == "map"
    assert point_estimate_of(5.0, 4.7, track) == "mean"
    assert point_estimate_of(5.0, 5.0, ring) == "map"
