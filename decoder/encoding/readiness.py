"""How far a session has come towards a usable place model: coverage, running time, tuned units.

:class:`Readiness` is what the session reports while it learns and at the
fit; the tuning test and the coarser grid on which it can be asked every few
seconds (with the counts summed onto it) live here beside it, so that the
threshold is written once.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from decoder.encoding.spatial_metrics import skaggs_information
from decoder.space.environments import Environment

#: Thresholds for a spatially tuned unit (common practice).
TUNED_BITS_PER_SPIKE = 0.5
TUNED_PEAK_HZ = 1.0


@dataclass(frozen=True, eq=False)
class Readiness(Mapping):
    """How far a session has come towards a usable model.

    A read-only mapping as well as a dataclass, so ``dict(readiness)`` gives
    its fields by name.

    Attributes
    ----------
    coverage : float
        Fraction of the environment's valid bins visited for at least
        ``min_occupancy_s`` of running.
    running_time_s : float
        Running time that counted for occupancy, s.
    unit_ids : ndarray of int64, shape (n_units,)
    spikes_per_unit : ndarray of int64, shape (n_units,)
        Spikes placed in the maps, per unit.
    n_tuned_units : int
        Units with at least 0.5 bits/spike and a peak rate of at least 1 Hz
        (common practice for calling a unit spatially tuned).
    median_cv_error_cm : float or None
        Cross-validated median decoding error, cm, when asked for; NaN
        while there is too little data.
    walk_sd_cm_per_sqrt_s : float
        S.d. of the learned movement model's random walk over 1 s, cm
        (over a step of ``step_s`` it is this times ``sqrt(step_s)``); NaN
        before a fit or when the tracking could not tell.
    """

    coverage: float
    running_time_s: float
    unit_ids: np.ndarray
    spikes_per_unit: np.ndarray
    n_tuned_units: int
    median_cv_error_cm: float | None = None
    walk_sd_cm_per_sqrt_s: float = math.nan

    def __getitem__(self, key: str) -> Any:
        if key not in self.__dataclass_fields__:
            raise KeyError(key)
        return getattr(self, key)

    def __iter__(self) -> Iterator[str]:
        return iter(self.__dataclass_fields__)

    def __len__(self) -> int:
        return len(self.__dataclass_fields__)


def count_tuned_units(rate_maps_hz: np.ndarray, occupancy_s: np.ndarray) -> int:
    """Units with at least 0.5 bits/spike and a peak rate of at least 1 Hz.

    Parameters
    ----------
    rate_maps_hz : ndarray of float64, shape (n_units, n_bins)
    occupancy_s : ndarray of float64, shape (n_bins,)
        Running time per bin, 0 outside the visited bins.

    Returns
    -------
    int

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993).
    An information-theoretic approach to deciphering the hippocampal code.
    Advances in Neural Information Processing Systems 5, 1030-1037.
    """
    bits, _ = skaggs_information(rate_maps_hz, occupancy_s)
    return count_tuned(bits, rate_maps_hz.max(axis=1))


def count_tuned(bits_per_spike: np.ndarray, peak_rate_hz: np.ndarray) -> int:
    """Units with at least 0.5 bits/spike and a peak rate of at least 1 Hz, from their figures.

    The test of :func:`count_tuned_units` on figures a fit already holds
    (``PlaceModel.info_bits_per_spike_``, ``peak_rate_hz_``).

    Parameters
    ----------
    bits_per_spike, peak_rate_hz : ndarray of float64, shape (n_units,)

    Returns
    -------
    int
    """
    tuned = (bits_per_spike >= TUNED_BITS_PER_SPIKE) & (peak_rate_hz >= TUNED_PEAK_HZ)
    return int(np.count_nonzero(tuned))


def coarse_tuning_grid(environment: Environment, smooth_cm: float) -> tuple[Environment, np.ndarray]:
    """The grid on which tuned units can be counted cheaply, and the grid bin of each model bin.

    In an arena, a grid of ``f * bin_cm`` bins, ``f = floor(smooth_cm /
    bin_cm)``: the Gaussian of ``smooth_cm`` already averages over such a
    bin. Where ``f < 2``, and on tracks and graphs, the environment itself.

    Parameters
    ----------
    environment : Environment
    smooth_cm : float

    Returns
    -------
    grid : Environment
    to_grid : ndarray of int64, shape (environment.n_bins,)
        Grid bin of each bin of ``environment``; -1 for an invalid bin.
    """
    factor = int(smooth_cm // environment.bin_cm)
    if environment.grid_shape is None or factor < 2:
        return environment, np.arange(environment.n_bins)
    grid = Environment.from_dict({**environment.to_dict(), "bin_cm": factor * environment.bin_cm})
    return grid, np.where(environment.valid_mask, grid.bin_index(environment.bin_centers_cm), -1)


def coarse_counts(counts: np.ndarray, to_grid: np.ndarray, n_grid_bins: int) -> np.ndarray:
    """Spike counts summed into the bins of the coarser grid.

    Parameters
    ----------
    counts : ndarray of int, shape (n_units, n_bins)
    to_grid : ndarray of int64, shape (n_bins,)
        Grid bin of each bin (:func:`coarse_tuning_grid`); -1 leaves the bin out.
    n_grid_bins : int

    Returns
    -------
    ndarray of int64, shape (n_units, n_grid_bins)
    """
    n_units = counts.shape[0]
    into = np.flatnonzero(to_grid >= 0)
    cells = (np.arange(n_units)[:, None] * n_grid_bins + to_grid[into]).ravel()
    # One bincount instead of np.add.at's element-wise adds; its float64 sums of
    # whole counts are exact below 2**53 spikes, so the integers come back unchanged.
    summed = np.bincount(cells, weights=counts[:, into].ravel(), minlength=n_units * n_grid_bins)
    return summed.astype(np.int64).reshape(n_units, n_grid_bins)
