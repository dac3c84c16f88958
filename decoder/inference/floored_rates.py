"""Rate maps as the decoder's likelihood takes them: checked, floored, and their logarithm.

What a :class:`~decoder.inference.decoding.BayesDecoder` computes from its
rate maps before its first window depends only on the maps, the bins
decoded over and the rate floor, not on the temperature, the walk or the
drift; calibration decodes the same held-out fold at a dozen settings, and
the logarithm of 300 maps of 2,500 bins took a third of each decoder's
construction. :func:`floored_rates` makes it once; the decoder takes either
the maps or this.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np


class FlooredRates(NamedTuple):
    """Rate maps checked and floored for the likelihood.

    Every array is read-only but ``log_floored``, which the compiled
    kernels take writable (one compiled type) and never write to.

    Attributes
    ----------
    valid : ndarray of bool, shape (n_bins,)
        The bins decoded over; the maps were checked on these.
    rate_floor_hz : float
    floored_hz : ndarray of float64, shape (n_units, n_bins)
        The maps raised to ``rate_floor_hz``; ``rate_floor_hz`` outside ``valid``.
    log_floored : ndarray of float64, shape (n_units, n_bins)
        Their natural logarithm.
    total_hz : ndarray of float64, shape (n_bins,)
        Their sum over units, in memory order.
    """

    valid: np.ndarray
    rate_floor_hz: float
    floored_hz: np.ndarray
    log_floored: np.ndarray
    total_hz: np.ndarray


def floored_rates(rate_maps_hz: np.ndarray, valid: np.ndarray, rate_floor_hz: float) -> FlooredRates:
    """Check the maps on the valid bins and floor them.

    Parameters
    ----------
    rate_maps_hz : ndarray, shape (n_units, n_bins)
        Finite and non-negative on the valid bins (NaN allowed elsewhere).
    valid : ndarray of bool, shape (n_bins,)
        At least one bin.
    rate_floor_hz : float
        Positive.

    Returns
    -------
    FlooredRates

    Raises
    ------
    ValueError
        For maps of another shape or type, or a negative, NaN or infinite
        rate on a valid bin.
    """
    n_bins = valid.shape[0]
    rates = np.asarray(rate_maps_hz)
    if rates.ndim != 2 or rates.shape[1] != n_bins or rates.dtype.kind not in "iuf":
        raise ValueError(
            f"rate_maps_hz must be a numeric array of shape (n_units, {n_bins}), "
            f"got {rates.dtype} of shape {rates.shape}"
        )
    # Every bin valid (an arena's grid): the maps themselves, no gathered copy. C order, as
    # np.full made it before: the sum over units below adds in memory order.
    all_valid = bool(valid.all())
    on_valid = np.ascontiguousarray(rates if all_valid else rates[:, valid], dtype=np.float64)
    # NaN and negative rates fail ">= 0"; an infinite one makes the largest infinite.
    if on_valid.size and not ((on_valid >= 0).all() and np.isfinite(on_valid.max())):
        unit = int(np.flatnonzero(~(np.isfinite(on_valid) & (on_valid >= 0)).all(axis=1))[0])
        raise ValueError(f"rate_maps_hz row {unit} holds a negative, NaN or infinite rate on a valid bin")
    if all_valid:
        floored = np.maximum(on_valid, rate_floor_hz)
    else:
        floored = np.full(rates.shape, rate_floor_hz)
        floored[:, valid] = np.maximum(on_valid, rate_floor_hz)
    log_floored = np.log(floored)
    with np.errstate(over="ignore"):
        # Too large a sum is the decoder's error to raise, with its own sentence.
        total = floored.sum(axis=0)
    valid = valid.copy()
    for arr in (valid, floored, total):
        arr.setflags(write=False)
    return FlooredRates(valid, float(rate_floor_hz), floored, log_floored, total)
