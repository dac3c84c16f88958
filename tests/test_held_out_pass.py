"""The held-out pass of calibration in one call: ``BayesDecoder.decode_held_out`` and ``_kernels.mass_above``.

The pass must give the numbers a loop over ``BayesDecoder.decode`` gives,
bit for bit, so that a fitted temperature (and every step decoded with it)
stays what it was; the loop is the reference here, and numpy's own sum
(pairwise summation, as numpy's documentation of ``numpy.sum`` describes it)
is the reference of the mass above the known bin.
"""

from __future__ import annotations

import numpy as np
import pytest

from decoder.inference import _kernels as K
from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Arena, LinearTrack


@pytest.mark.parametrize("mass_above", [K.mass_above, K.mass_above_numpy])
def test_mass_above_is_numpys_sum_of_the_values_above_bit_for_bit(mass_above):
    rng = np.random.default_rng(7)
    # Lengths around every branch of numpy's pairwise sum: < 8, one block of <= 128, split runs.
    sizes = [0, 1, 7, 8, 9, 127, 128, 129, 255, 256, 257, 1000, 2500, 4099]
    for n in sizes + rng.integers(0, 6000, 200).tolist():
        p = rng.random(n) ** rng.integers(1, 30)
        if n > 3:
            p[rng.integers(0, n, 3)] = p[0]  # ties with the level
        level = p[0] if n else 0.0
        expected = p[p > level].sum()  # numpy's pairwise summation (numpy.sum, Notes)
        assert mass_above(p, level, np.empty(n)) == expected


def _windows(rng: np.random.Generator, n_steps: int, n_units: int):
    counts = rng.poisson(0.4, (n_steps, n_units))
    steps, rows = np.nonzero(counts)
    start = np.searchsorted(steps, np.arange(n_steps + 1)).astype(np.int64)
    return rows.astype(np.int64), counts[steps, rows].astype(np.float64), start


def _loop(decoder: BayesDecoder, rows, counts, start, true_bins, keep, log_like=None, expected=None):
    """The reference: decode() window by window, scored as calibration scored each step."""
    points, above, n_hpd, kept = [], [], [], []
    for i in range(true_bins.size):
        marks = () if log_like is None else (log_like[i], expected)
        step = decoder.decode(rows[start[i]:start[i + 1]], counts[start[i]:start[i + 1]], *marks)
        p = step.posterior
        points.append(np.concatenate([step.map_xy_cm, step.mean_xy_cm]))
        above.append(p[p > p[true_bins[i]]].sum() if true_bins[i] >= 0 else np.nan)
        n_hpd.append(round(step.hpd95_size / decoder.environment.bin_size))
        if keep[i]:
            kept.append(p.copy())
    return np.array(points), np.array(above), np.array(n_hpd), np.array(kept).reshape(-1, decoder.n_bins)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize("where", ["arena", "track", "arena_marks", "arena_drift"])
def test_the_pass_equals_decoding_window_by_window_bit_for_bit(backend, where):
    rng = np.random.default_rng(11)
    env = LinearTrack((0, 0), (200, 0), bin_cm=4) if where == "track" else Arena.rectangle(40, 30, bin_cm=2.0)
    n_units, n_steps = 25, 400
    rates = rng.gamma(1.0, 4.0, (n_units, env.n_bins))
    valid = env.valid_mask.copy()
    valid[: env.n_bins // 10] = False  # unvisited bins, as a fitted model has
    kwargs = dict(prior="state_space", random_walk_sd_cm=3.0, uniform_weight=1e-3, likelihood_temperature=1.4,
                  drift_gain=0.5 if where == "arena_drift" else 0.0, backend=backend)
    rows, counts, start = _windows(rng, n_steps, n_units)
    true_bins = rng.integers(-1, env.n_bins, n_steps)
    keep = rng.random(n_steps) < 0.2
    log_like = expected = None
    if where == "arena_marks":
        log_like = rng.normal(0.0, 2.0, (n_steps, env.n_bins))
        expected = rng.gamma(2.0, 0.5, env.n_bins)
    passed = BayesDecoder(rates, env, valid, 0.02, **kwargs).decode_held_out(
        rows, counts, start, true_bins, keep, log_like, expected)
    reference = _loop(BayesDecoder(rates, env, valid, 0.02, **kwargs), rows, counts, start, true_bins, keep,
                      log_like, expected)
    for got, want in zip(passed, reference):
        np.testing.assert_array_equal(got, want)


def test_the_pass_carries_the_posterior_on_to_the_next_window_and_refuses_a_bad_entry():
    rng = np.random.default_rng(3)
    env = Arena.rectangle(20, 20, bin_cm=2.0)
    rates = rng.gamma(1.0, 4.0, (10, env.n_bins))
    rows, counts, start = _windows(rng, 60, 10)
    decoder = BayesDecoder(rates, env, env.valid_mask, 0.02, prior="state_space", uniform_weight=1e-3)
    reference = BayesDecoder(rates, env, env.valid_mask, 0.02, prior="state_space", uniform_weight=1e-3)
    none = np.full(30, -1, np.int64), np.zeros(30, bool)
    decoder.decode_held_out(rows, counts, start[:31], *none)
    _loop(reference, rows, counts, start[:31], *none)
    # The next window of each follows from the same prior.
    a, b = start[30], start[31]
    np.testing.assert_array_equal(decoder.decode(rows[a:b], counts[a:b]).posterior,
                                  reference.decode(rows[a:b], counts[a:b]).posterior)
    bad_rows = rows.copy()
    bad_rows[start[40]] = 99
    with pytest.raises(ValueError, match="row 99, outside the model's rows"):
        decoder.decode_held_out(bad_rows, counts, start, np.full(60, -1, np.int64), np.zeros(60, bool))


def test_a_decoder_from_floored_rates_decodes_as_one_from_the_maps_and_refuses_other_bins():
    from decoder.inference.floored_rates import floored_rates

    rng = np.random.default_rng(5)
    env = Arena.rectangle(20, 20, bin_cm=2.0)
    rates = rng.gamma(1.0, 4.0, (10, env.n_bins))
    valid = env.valid_mask.copy()
    valid[:7] = False
    shared = floored_rates(rates, valid, 0.05)
    rows, counts, start = _windows(rng, 40, 10)
    for temperature in (1.0, 1.7):
        kwargs = dict(prior="state_space", uniform_weight=1e-3, likelihood_temperature=temperature, rate_floor_hz=0.05)
        a, b = BayesDecoder(shared, env, valid, 0.02, **kwargs), BayesDecoder(rates, env, valid, 0.02, **kwargs)
        np.testing.assert_array_equal(a.rates_hz, b.rates_hz)
        for i in range(40):
            window = rows[start[i]:start[i + 1]], counts[start[i]:start[i + 1]]
            np.testing.assert_array_equal(a.decode(*window).posterior, b.decode(*window).posterior)
    with pytest.raises(ValueError, match="other valid bins or another rate floor"):
        BayesDecoder(shared, env, env.valid_mask, 0.02, rate_floor_hz=0.05)
    with pytest.raises(ValueError, match="other valid bins or another rate floor"):
        BayesDecoder(shared, env, valid, 0.02, rate_floor_hz=0.01)
