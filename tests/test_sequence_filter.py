"""The sequence filter (decoder.inference.sequence_filter) against outside references.

References used: hmmlearn's forward pass (hmmlearn.base.BaseHMM.score with the
emission log-probabilities given, Rabiner 1989), brute-force enumeration of
every path on a tiny grid (the definition of the likelihood of a hidden Markov
model), scipy.stats.uniform for the discretised moves. Posteriors are random
arrays or made by the decoder from invented place fields, not data.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hmmlearn.base import BaseHMM
from scipy import stats
from scipy.special import logsumexp

from decoder.config import ConfigError, RippleSettings, SafetyCaps, TriggerRule
from decoder.inference._sequence_kernels import sequence_step, sequence_step_numpy
from decoder.inference.sequence_filter import STAY_WEIGHT, SequenceFilter, uniform_moves
from decoder.session.replay_content import ReplayContent, zone_distances_cm
from decoder.session.triggers import TriggerBank
from decoder.space.environments import LinearTrack, TrackGraph


def _maze_filter(**kw) -> tuple[SequenceFilter, np.ndarray]:
    """A small T maze, two zones (an arm's end and the stem's foot), some positions not decodable."""
    maze = TrackGraph([[0, 0], [0, 40], [-30, 40], [30, 40]], [(0, 1), (1, 2), (1, 3)], bin_cm=5)
    full = maze.bin_distance_matrix_cm()
    d = np.vstack([full[:, 0], full[:, -1]])  # distance to each of two bins
    valid = maze.valid_mask.copy()
    valid[[3, 7]] = False
    return SequenceFilter(d, valid, level_cm=5.0, bin_s=0.015, **kw), valid


def _posteriors(rng, valid: np.ndarray, n: int) -> np.ndarray:
    p = rng.dirichlet(np.full(valid.size, 0.4), n) * valid
    return p / p.sum(axis=1, keepdims=True)


def _moves_from_scipy(low: float, high: float, level_cm: float, moves: np.ndarray) -> np.ndarray:
    """P(move in level j) for a move uniform on [low, high]: scipy.stats.uniform's CDF over the level's edges."""
    u = stats.uniform(loc=low, scale=high - low)
    return u.cdf((moves + 0.5) * level_cm) - u.cdf((moves - 0.5) * level_cm)


def _transition(f: SequenceFilter, h: int, n: int, z: int = 0) -> np.ndarray:
    """Hypothesis ``h``'s transition matrix over ``n`` levels, straight from its definition (rows may lose mass)."""
    lo, hi = f.speed_cm_s
    j = np.arange(n)
    move = j[None, :] - j[:, None]  # from level i (row) to level j (column)
    if h == 0:  # towards: the distance falls by speed * bin_s, widened by the slack
        return _moves_from_scipy(-(hi * f.bin_s + f.slack_cm), -lo * f.bin_s + f.slack_cm, f.level_cm, move)
    if h == 1:
        return _moves_from_scipy(-(hi * f.bin_s + f.slack_cm), -lo * f.bin_s + f.slack_cm, f.level_cm, -move)
    stay = _moves_from_scipy(-f.slack_cm, f.slack_cm, f.level_cm, move) if f.slack_cm > 0 else np.eye(n)
    return STAY_WEIGHT * stay + (1 - STAY_WEIGHT) * f.start_[z, :n][None, :]


def _emissions(f: SequenceFilter, z: int, posteriors: np.ndarray, observed: list[bool]) -> np.ndarray:
    """Each bin's likelihood over zone ``z``'s levels: the mean over the positions at that level (its definition),
    mixed with the stray share spread uniformly; 1 for a bin passed without evidence."""
    n = int(f.n_levels_[z])
    level = f.level_of_bin_[z]
    out = np.ones((len(posteriors), n))
    for k, (p, seen) in enumerate(zip(posteriors, observed)):
        if not seen:
            continue
        on = level >= 0
        mean = np.array([p[level == lv].mean() if np.any(level == lv) else 0.0 for lv in range(n)])
        out[k] = (1 - f.stray_p) * mean + f.stray_p * p[on].mean()
    return out


def test_the_discretised_moves_are_scipys_uniform_over_the_levels():
    for low, high, level in ((-18.0, 0.75, 3.0), (-3.0, 3.0, 3.0), (-40.0, -2.0, 5.0), (0.2, 0.4, 1.0)):
        p, lo = uniform_moves(low, high, level)
        moves = lo + np.arange(p.size)
        # scipy.stats.uniform: the share of the move's interval within each level's edges.
        np.testing.assert_allclose(p, _moves_from_scipy(low, high, level, moves), atol=1e-12)
        assert p.sum() == pytest.approx(1.0)


@pytest.mark.parametrize("stray_p", [0.0, 0.1])
def test_kernel_and_numpy_twin_agree(stray_p):
    f, valid = _maze_filter(stray_p=stray_p)
    states = []
    for kernel in (sequence_step, sequence_step_numpy):
        alpha = np.repeat(f.start_[:, None, :], 3, axis=1).copy()
        log_lik = np.zeros((2, 3))
        log_odds = np.zeros((2, 2))
        scratch = np.empty((2, f.start_.shape[1]))
        for k, p in enumerate(_posteriors(np.random.default_rng(1), valid, 9)):
            kernel(p, k != 4, k > 0, f.level_of_bin_, f.inv_count_, f.start_, f.n_levels_, stray_p, f.step_p_,
                   f.step_lo_, f.stay_p_, STAY_WEIGHT, alpha, log_lik, log_odds, scratch)
        states.append((alpha, log_lik, log_odds))
    np.testing.assert_allclose(states[0][0], states[1][0], rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(states[0][1], states[1][1], rtol=1e-12)
    np.testing.assert_allclose(states[0][2], states[1][2], rtol=1e-10, atol=1e-12)
    # A zone where no hypothesis explains the bins has NaN odds; one where only towards does, +inf.
    for kernel in (sequence_step, sequence_step_numpy):
        log_lik = np.array([[-np.inf, -np.inf, -np.inf], [-1.0, -np.inf, -np.inf]])
        log_odds = np.zeros((2, 2))
        kernel(np.full(valid.size, 1.0 / valid.size), False, True, f.level_of_bin_, f.inv_count_, f.start_,
               f.n_levels_, 0.1, f.step_p_, f.step_lo_, f.stay_p_, STAY_WEIGHT,
               np.repeat(f.start_[:, None, :], 3, axis=1).copy(), log_lik, log_odds, np.empty((2, f.start_.shape[1])))
        assert np.all(np.isnan(log_odds[:, 0])) and log_odds[0, 1] == np.inf and log_odds[1, 1] == -np.inf
    # The filter's own copy on the twin (bench/ripples.py's baseline) follows the same path.
    twin = f.copy("numpy")
    for k, p in enumerate(_posteriors(np.random.default_rng(1), valid, 9)):
        f.step(p, k != 4)
        twin.step(p, k != 4)
    np.testing.assert_allclose(twin.log_likelihood, f.log_likelihood, rtol=1e-12)
    np.testing.assert_allclose(f.log_likelihood, states[0][1], rtol=1e-12)


class _GivenEmissions(BaseHMM):
    """hmmlearn's model with the emission log-probabilities given as a table (observation k -> row k)."""

    def __init__(self, log_frame: np.ndarray, **kw) -> None:
        super().__init__(n_components=log_frame.shape[1], implementation="log", **kw)
        self.log_frame = log_frame

    def _compute_log_likelihood(self, X):
        return self.log_frame[X[:, 0].astype(int)]

    def _get_n_fit_scalars_per_param(self):  # required by the base class; nothing is fitted here
        return {}


@pytest.mark.parametrize("backend", ["numba", "numpy"])
def test_each_hypothesis_is_hmmlearns_forward_pass(backend):
    rng = np.random.default_rng(3)
    f, valid = _maze_filter(backend=backend, speed_cm_s=(200.0, 900.0), slack_cm=4.0, stray_p=0.05)
    posteriors = _posteriors(rng, valid, 8)
    observed = [True, True, False, True, True, True, False, True]
    for p, seen in zip(posteriors, observed):
        f.step(p, seen)
    for z in range(2):
        n = int(f.n_levels_[z])
        emission = _emissions(f, z, posteriors, observed)
        for h in range(3):
            # Mass a move carries off the grid goes to an extra absorbing state that emits nothing,
            # so that hmmlearn gets the stochastic rows it checks; it adds nothing to the likelihood.
            inner = _transition(f, h, n, z)
            trans = np.zeros((n + 1, n + 1))
            trans[:n, :n] = inner
            trans[:n, n] = 1.0 - inner.sum(axis=1)
            trans[n, n] = 1.0
            with np.errstate(divide="ignore"):
                log_frame = np.hstack([np.log(emission), np.full((len(posteriors), 1), -np.inf)])
            hmm = _GivenEmissions(log_frame)
            hmm.startprob_ = np.append(f.start_[z, :n], 0.0)
            hmm.transmat_ = np.clip(trans, 0.0, None)
            # Source: hmmlearn.base.BaseHMM.score (forward algorithm in log space, Rabiner 1989).
            want = hmm.score(np.arange(len(posteriors))[:, None])
            assert f.log_likelihood[z, h] == pytest.approx(want, rel=1e-9, abs=1e-9)


def test_the_likelihood_is_the_sum_over_every_path_on_a_tiny_grid():
    # Four positions on a 20 cm track at 0, 5, 10, 15 cm from the zone (level 5 cm), five bins, one passed.
    track = LinearTrack((0, 0), (20, 0), bin_cm=5)
    d = 15.0 - track.bin_centers_cm[:, 0][None, :] + 2.5
    f = SequenceFilter(d, track.valid_mask, level_cm=5.0, bin_s=0.01, speed_cm_s=(300.0, 1000.0), slack_cm=2.0,
                       stray_p=0.2)
    rng = np.random.default_rng(9)
    posteriors = rng.dirichlet(np.ones(4), 5)
    observed = [True, True, False, True, True]
    for p, seen in zip(posteriors, observed):
        f.step(p, seen)
    n = int(f.n_levels_[0])
    emission = _emissions(f, 0, posteriors, observed)
    start = f.start_[0, :n]
    for h in range(3):
        a = _transition(f, h, n)
        total = 0.0
        # The definition: P(bins | h) = sum over every path d_0..d_4 of
        # start(d_0) e_0(d_0) prod_k A(d_{k-1}, d_k) e_k(d_k).
        for path in itertools.product(range(n), repeat=len(posteriors)):
            p = start[path[0]] * emission[0, path[0]]
            for k in range(1, len(path)):
                p *= a[path[k - 1], path[k]] * emission[k, path[k]]
            total += p
        assert f.log_likelihood[0, h] == pytest.approx(np.log(total), rel=1e-10)
    ll = f.log_likelihood[0]
    # Posterior log odds with even prior odds, the other two hypotheses sharing the rest equally.
    assert f.log_odds()[0, 0] == pytest.approx(ll[0] - logsumexp(ll[1:]) + np.log(2))
    assert f.log_odds()[1, 0] == pytest.approx(ll[1] - logsumexp(ll[[0, 2]]) + np.log(2))


# -- on decoded content bins ---------------------------------------------------------------------------

TRACK = LinearTrack((0, 0), (100, 0), bin_cm=5)
END = np.zeros((1, TRACK.n_bins), bool)
END[0, -2:] = True


def _place_maps(n_units: int = 20) -> np.ndarray:
    centres = np.linspace(2.5, 97.5, n_units)
    x = TRACK.bin_centers_cm[:, 0]
    return 0.5 + 40.0 * np.exp(-0.5 * ((x[None, :] - centres[:, None]) / 6.0) ** 2)


def _event(content: ReplayContent, onset_s: float, units_over_time) -> list:
    t = onset_s + np.arange(0.0005, 0.09, 0.0025)
    content.take_spikes(t, np.array([units_over_time(x) for x in t - onset_s], np.int64))
    content.begin(onset_s)
    return content.due(onset_s + 0.2)


def test_sweeps_read_as_towards_or_away_and_a_still_or_shuffled_event_as_neither():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.09)
    # 600 cm/s along the track (inside the default 150-1000 cm/s), towards the zone at the far end, then away.
    towards = _event(content, 1.0, lambda dt: min(19, int(dt * 600 / 100 * 19)))
    assert towards[-1].log_odds[0, 0] > 5 and towards[-1].log_odds[1, 0] < -5
    away = _event(content, 2.0, lambda dt: max(0, 19 - int(dt * 600 / 100 * 19)))
    assert away[-1].log_odds[1, 0] > 5 and away[-1].log_odds[0, 0] < -5
    # The odds grow with the bins: a sequential test decides as the evidence comes in.
    assert np.all(np.diff([b.log_odds[0, 0] for b in towards[1:]]) > 0)
    still = _event(content, 3.0, lambda dt: 8)
    assert still[-1].log_odds.max() < 0
    order = np.random.default_rng(0).permutation(6)  # the towards sweep's bins in a shuffled order
    shuffled = _event(content, 4.0, lambda dt: min(19, int((order[min(5, int(dt / 0.015))] + 0.5) * 0.015 * 600 / 100 * 19)))
    assert shuffled[-1].log_odds[0, 0] < 3


def test_a_bin_with_too_few_spikes_passes_without_its_evidence():
    content = ReplayContent.for_model(_place_maps(), TRACK, TRACK.valid_mask, END, bin_s=0.015, max_event_s=0.06,
                                      min_spikes=3)
    t = np.array([1.001, 1.003, 1.005, 1.020, 1.031, 1.033, 1.036])  # bin 1 holds one spike
    content.take_spikes(t, np.array([2, 2, 3, 6, 7, 8, 8]))
    content.begin(1.0)
    bins = content.due(1.1)
    assert content.sequence.n_steps == 4 and [b.n_used for b in bins] == [1, 1, 2, 2]
    f = SequenceFilter(zone_distances_cm(TRACK, END), TRACK.valid_mask, level_cm=5.0, bin_s=0.015)
    for b, seen in zip(bins, (True, False, True, False)):
        f.step(b.posterior, seen)
    np.testing.assert_allclose(f.log_odds(), bins[-1].log_odds, rtol=1e-12)


def test_no_zones_and_a_zone_off_the_decoded_positions():
    none = SequenceFilter(np.zeros((0, 4)), np.ones(4, bool), level_cm=5.0, bin_s=0.015)
    none.step(np.full(4, 0.25), True)
    assert none.log_odds().shape == (2, 0)
    # A zone whose positions the decoder never decodes (NaN distances) has no odds: no rule can fire on it.
    off = SequenceFilter(np.array([[np.nan] * 4, [0.0, 5.0, 10.0, 15.0]]), np.ones(4, bool), level_cm=5.0,
                         bin_s=0.015)
    for x in (3, 2, 1):
        off.step(np.eye(4)[x] * 0.97 + 0.01, True)
    odds = off.log_odds()
    assert np.all(np.isnan(odds[:, 0])) and odds[0, 1] > 0


def test_settings_are_checked():
    d = np.zeros((1, 4))
    for kw, what in (({"speed_cm_s": (500, 100)}, "speed_cm_s"), ({"slack_cm": -1}, "slack_cm"),
                     ({"stray_p": 1.0}, "stray_p"), ({"backend": "gpu"}, "backend")):
        with pytest.raises(ValueError, match=what):
            SequenceFilter(d, np.ones(4, bool), level_cm=5.0, bin_s=0.015, **kw)
    with pytest.raises(ConfigError, match="content_speed_cm_s"):
        RippleSettings(content_speed_cm_s=(900.0, 100.0))
    with pytest.raises(ConfigError, match="content_stray_p"):
        RippleSettings(content_stray_p=1.5)
    with pytest.raises(ConfigError, match="content_slack_cm"):
        RippleSettings(content_slack_cm=-2.0)
    with pytest.raises(ValueError, match="min_log_odds"):
        TriggerRule("x", zone="goal", kind="replay_towards", min_log_odds=-1.0)
    assert RippleSettings().sequence_kwargs() == {"speed_cm_s": (150.0, 1000.0), "slack_cm": 3.0, "stray_p": 0.1}


def test_a_log_odds_rule_judges_its_row_and_zone_beneath_the_caps():
    rules = [TriggerRule("to", zone="goal", kind="replay_towards", min_log_odds=3.0, min_bins=2),
             TriggerRule("from", zone="goal", kind="replay_away", min_log_odds=3.0, min_bins=2)]
    bank = TriggerBank(rules, ["goal"], SafetyCaps(refractory_s=0.5))
    bank.arm(0.0)

    def judge(t, index, towards, away):
        return [e.rule for e in bank.content(t, index, index + 1, np.array([0.0]), np.array([[towards], [away]]),
                                             np.array([1.0, 1.0]), 0.0, 0.0)]

    assert judge(1.015, 0, 9.0, -9.0) == []  # one bin: min_bins not reached
    assert judge(1.030, 1, 3.5, -3.5) == ["to"]
    assert judge(3.015, 0, 0.0, 0.0) == [] and judge(3.030, 1, -4.0, 4.0) == ["from"]
    assert judge(3.215, 0, 0.0, 0.0) == [] and judge(3.230, 1, 5.0, -5.0) == []  # the caps stay beneath
    assert bank.counters["refractory"] == 1
    assert judge(5.015, 0, 0.0, 0.0) == [] and judge(5.030, 1, np.nan, 2.9) == []
    assert judge(5.045, 2, 3.0, -3.0) == []  # the odds must exceed the threshold
    # The default threshold, 0: fires once towards is more likely than not (a tie is not enough).
    even = TriggerBank([TriggerRule("to", zone="goal", kind="replay_towards", min_bins=2)], ["goal"])
    assert TriggerRule("to", zone="goal", kind="replay_towards").min_log_odds == 0.0
    even.arm(0.0)
    assert even.content(1.015, 0, 1, np.zeros(1), np.zeros((2, 1)), np.ones(2), 0.0, 0.0) == []
    assert even.content(1.030, 1, 2, np.zeros(1), np.zeros((2, 1)), np.ones(2), 0.0, 0.0) == []
    assert len(even.content(1.045, 2, 3, np.zeros(1), np.array([[0.2], [-0.2]]), np.ones(2), 0.0, 0.0)) == 1
