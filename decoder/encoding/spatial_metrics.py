"""Spatial figures of merit for rate maps: information, sparsity, field size, gridness.

Plain numpy (and ``scipy.ndimage`` for labelling and rotation); every
function takes rate maps flattened over an environment's bins, or a 2-D grid
map for the autocorrelogram and gridness, and returns plain arrays.
"""

from __future__ import annotations

import logging

import numpy as np
from scipy import ndimage, signal
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

logger = logging.getLogger(__name__)

__all__ = [
    "skaggs_information",
    "sparsity",
    "field_size",
    "spatial_autocorrelogram",
    "gridness_score",
]


def _maps_and_weights(rate_maps_hz, occupancy_s):
    """Validate ``(n_units, n_bins)`` maps and turn occupancy into probabilities."""
    maps = np.asarray(rate_maps_hz, dtype=np.float64)
    single = maps.ndim == 1
    maps = np.atleast_2d(maps)
    occ = np.asarray(occupancy_s, dtype=np.float64)
    if maps.ndim != 2:
        raise ValueError(f"rate_maps_hz must have shape (n_units, n_bins), got {maps.shape}")
    if occ.shape != (maps.shape[1],):
        raise ValueError(
            f"occupancy_s must have shape ({maps.shape[1]},) to match the rate maps, got {occ.shape}"
        )
    if np.any(occ < 0) or not np.all(np.isfinite(occ)):
        raise ValueError("occupancy_s must be finite and non-negative")
    total = occ.sum()
    if total <= 0:
        raise ValueError("occupancy_s sums to zero: no bin was visited")
    p = occ / total
    # Bins never visited carry no weight; their rates (often NaN or 0) must not leak in.
    maps = np.where(p > 0, maps, 0.0)
    if not np.all(np.isfinite(maps)) or np.any(maps < 0):
        raise ValueError("rate_maps_hz must be finite and non-negative in visited bins")
    return maps, p, single


def skaggs_information(rate_maps_hz, occupancy_s):
    """Spatial information of each unit, in bits per spike and bits per second.

    ``I_s = sum_i p_i (r_i / r) log2(r_i / r)`` bits/spike and
    ``I_t = sum_i p_i r_i log2(r_i / r)`` bits/s, with ``p_i`` the
    occupancy probability of bin ``i``, ``r_i`` the rate there and
    ``r = sum_i p_i r_i`` the mean rate; so ``I_t = I_s * r``.

    Parameters
    ----------
    rate_maps_hz : array_like, shape (n_units, n_bins) or (n_bins,)
        Firing rate in each bin, Hz.
    occupancy_s : array_like, shape (n_bins,)
        Time spent in each bin, s. Bins with zero occupancy are ignored.

    Returns
    -------
    bits_per_spike, bits_per_s : ndarray, shape (n_units,) (or scalars for one map)
        NaN for a unit whose mean rate is zero: it carries no spikes to
        inform about.

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993).
    An information-theoretic approach to deciphering the hippocampal code.
    Advances in Neural Information Processing Systems 5, 1030-1037.

    Examples
    --------
    >>> bits, rate = skaggs_information([[4.0, 0.0, 0.0, 0.0]], [1.0, 1.0, 1.0, 1.0])
    >>> float(bits[0])
    2.0
    """
    maps, p, single = _maps_and_weights(rate_maps_hz, occupancy_s)
    mean_rate = maps @ p
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = maps / mean_rate[:, None]
        terms = np.where(maps > 0, p * ratio * np.log2(np.where(maps > 0, ratio, 1.0)), 0.0)
    bits_per_spike = terms.sum(axis=1)
    silent = mean_rate <= 0
    bits_per_spike[silent] = np.nan
    bits_per_s = bits_per_spike * mean_rate
    if single:
        return float(bits_per_spike[0]), float(bits_per_s[0])
    return bits_per_spike, bits_per_s


def sparsity(rate_maps_hz, occupancy_s):
    """Sparsity of each unit's rate map, between ``1/n_bins`` and 1.

    ``s = (sum_i p_i r_i)^2 / sum_i p_i r_i^2``: 1 for a unit firing
    evenly everywhere, ``1/N`` for one firing in one of ``N`` equally
    visited bins.

    Parameters
    ----------
    rate_maps_hz : array_like, shape (n_units, n_bins) or (n_bins,)
    occupancy_s : array_like, shape (n_bins,)

    Returns
    -------
    ndarray, shape (n_units,) (or a scalar for one map)
        NaN for a unit whose mean rate is zero.

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Wilson, M. A. & Barnes, C. A. (1996).
    Theta phase precession in hippocampal neuronal populations and the
    compression of temporal sequences. Hippocampus 6, 149-172.

    Examples
    --------
    >>> float(sparsity([1.0, 0.0, 0.0, 0.0], [1.0, 1.0, 1.0, 1.0]))
    0.25
    """
    maps, p, single = _maps_and_weights(rate_maps_hz, occupancy_s)
    mean_rate = maps @ p
    mean_square = (maps**2) @ p
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(mean_square > 0, mean_rate**2 / mean_square, np.nan)
    return float(out[0]) if single else out


def _bin_adjacency(environment):
    """Sparse adjacency between neighbouring bins of a track or graph."""
    distance = np.asarray(environment.bin_distance_matrix_cm(), dtype=np.float64)
    # Neighbours along a track sit one bin apart; 1.5 bins tolerates the
    # uneven spacing where edges of a graph meet.
    near = (distance > 0) & (distance <= 1.5 * environment.bin_cm)
    return csr_matrix(near)


def field_size(rate_map, environment, mask, threshold=0.2):
    """Size of the place field around each map's peak.

    The field is the connected region of bins, inside ``mask``, whose rate
    is at least ``threshold`` times the peak rate, grown from the peak bin.
    Bins connect through shared edges on an arena's grid and through
    neighbouring bins along a track or graph.

    Parameters
    ----------
    rate_map : array_like, shape (n_bins,) or (n_units, n_bins)
        Rate maps, Hz.
    environment : decoder.space.environments.Environment
        Gives the grid shape (arena) or the bin distances (track, graph) and
        the size of one bin.
    mask : array_like of bool, shape (n_bins,)
        Bins to consider (visited and inside the geometry).
    threshold : float, default 0.2
        Fraction of the peak rate that bounds the field. A fifth of the peak
        is common practice.

    Returns
    -------
    float or ndarray, shape (n_units,)
        Field size in ``environment.bin_size`` units: cm² in an arena, cm
        on a track or graph. Zero for a silent map.

    Examples
    --------
    >>> from decoder.space.environments import Arena
    >>> box = Arena.rectangle(width_cm=10.0, height_cm=10.0, bin_cm=5.0)
    >>> float(field_size([1.0, 0.5, 0.0, 0.0], box, [True, True, True, True]))
    50.0
    """
    maps = np.asarray(rate_map, dtype=np.float64)
    single = maps.ndim == 1
    maps = np.atleast_2d(maps)
    mask = np.asarray(mask, dtype=bool)
    if maps.ndim != 2 or maps.shape[1] != environment.n_bins:
        raise ValueError(
            f"rate_map must have {environment.n_bins} bins (one per environment bin), got shape {maps.shape}"
        )
    if mask.shape != (environment.n_bins,):
        raise ValueError(f"mask must have shape ({environment.n_bins},), got {mask.shape}")
    if not 0.0 < threshold < 1.0:
        raise ValueError(f"threshold must lie between 0 and 1 (a fraction of the peak), got {threshold}")
    masked = np.where(mask, np.nan_to_num(maps, nan=0.0), 0.0)
    peak_bin = masked.argmax(axis=1)
    peak = masked[np.arange(len(masked)), peak_bin]
    above = masked >= threshold * peak[:, None]
    sizes = np.zeros(len(masked))
    grid = environment.grid_shape
    units = np.flatnonzero(peak > 0)
    if grid is not None:
        # One labelling of every map stacked, joined by shared edges within a map only: hundreds of
        # separate ndimage.label calls cost more than the labelling itself.
        within_map = np.zeros((3, 3, 3), dtype=bool)
        within_map[1] = ndimage.generate_binary_structure(2, 1)
        labels = ndimage.label(above[units].reshape(len(units), *grid), within_map)[0].reshape(len(units), environment.n_bins)
        own = labels[np.arange(len(units)), peak_bin[units]]
        sizes[units] = np.count_nonzero(labels == own[:, None], axis=1)
        sizes *= environment.bin_size
        return float(sizes[0]) if single else sizes
    adjacency = _bin_adjacency(environment)
    for unit in units:
        keep = above[unit]
        _, sub_labels = connected_components(adjacency[keep][:, keep], directed=False)
        labels = np.full(environment.n_bins, -1)
        labels[keep] = sub_labels
        sizes[unit] = np.count_nonzero(labels == labels[peak_bin[unit]])
    sizes *= environment.bin_size
    return float(sizes[0]) if single else sizes


def spatial_autocorrelogram(rate_map_2d, *, min_overlap_bins=20):
    """Pearson autocorrelogram of a 2-D rate map over all spatial lags.

    For each lag ``(dy, dx)`` the map is correlated with itself shifted by
    that lag, using only the bins where both copies are finite (NaN marks
    unvisited bins), as Sargolini et al. (2006) did.

    Parameters
    ----------
    rate_map_2d : array_like, shape (ny, nx)
        Rate map on an arena's grid, Hz; NaN for unvisited bins.
    min_overlap_bins : int, default 20
        Lags where fewer bins overlap are NaN: their correlation is noise.

    Returns
    -------
    ndarray, shape (2 * ny - 1, 2 * nx - 1)
        Correlation in [-1, 1]; the centre ``[ny - 1, nx - 1]`` is lag zero.

    References
    ----------
    Sargolini, F., Fyhn, M., Hafting, T., McNaughton, B. L., Witter, M. P.,
    Moser, M.-B. & Moser, E. I. (2006). Conjunctive representation of
    position, direction, and velocity in entorhinal cortex. Science 312,
    758-762.
    """
    f = np.asarray(rate_map_2d, dtype=np.float64)
    if f.ndim != 2 or min(f.shape) < 2:
        raise ValueError(f"rate_map_2d must be a 2-D grid of at least 2 x 2 bins, got shape {f.shape}")
    if min_overlap_bins < 2:
        raise ValueError(f"min_overlap_bins must be at least 2, got {min_overlap_bins}")
    seen = np.isfinite(f)
    g = np.where(seen, f, 0.0)
    m = seen.astype(np.float64)

    def xcorr(a, b):
        return signal.fftconvolve(a, b[::-1, ::-1], mode="full")

    n = np.rint(xcorr(m, m))
    s1 = xcorr(g, m)
    s2 = xcorr(m, g)
    s11 = xcorr(g * g, m)
    s22 = xcorr(m, g * g)
    s12 = xcorr(g, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        num = n * s12 - s1 * s2
        den = np.sqrt(np.clip(n * s11 - s1**2, 0.0, None)) * np.sqrt(np.clip(n * s22 - s2**2, 0.0, None))
        r = num / den
    # FFT round-off can push a flat overlap a hair above zero variance.
    flat = den <= 1e-9 * np.maximum(n * s11, 1e-300)
    r[(n < min_overlap_bins) | flat] = np.nan
    return np.clip(r, -1.0, 1.0)


def _radial_profile(autocorr):
    """Mean autocorrelation in one-bin rings around the centre."""
    cy, cx = (np.array(autocorr.shape) - 1) // 2
    yy, xx = np.indices(autocorr.shape)
    radius = np.hypot(yy - cy, xx - cx)
    ring = np.rint(radius).astype(int)
    ok = np.isfinite(autocorr)
    sums = np.bincount(ring[ok], weights=autocorr[ok], minlength=ring.max() + 1)
    counts = np.bincount(ring[ok], minlength=ring.max() + 1)
    with np.errstate(invalid="ignore"):
        return radius, sums / counts


def _annulus(autocorr):
    """Inner and outer radius (bins) around the ring of peaks nearest the centre."""
    radius, profile = _radial_profile(autocorr)
    limit = min(autocorr.shape) // 2
    below = np.flatnonzero(profile[1:limit] < 0)
    inner = (below[0] + 1) if below.size else None
    if inner is None:
        # No ring dips below zero: the central peak ends where the profile stops falling.
        rising = np.flatnonzero(np.diff(profile[:limit]) > 0)
        inner = int(rising[0] + 1) if rising.size else max(1, limit // 4)
    beyond = profile[inner:limit]
    if beyond.size >= 3 and np.any(np.isfinite(beyond)):
        ring_radius = inner + int(np.nanargmax(beyond))
        # The six peaks are as wide as the central one, so the ring reaches
        # one central-peak radius past their centres.
        outer = min(ring_radius + inner, limit)
    else:
        outer = limit
    return float(inner), float(max(outer, inner + 2))


def gridness_score(rate_map_2d, *, inner_radius_bins=None, outer_radius_bins=None, min_overlap_bins=20):
    """Gridness of a 2-D rate map from the rotational symmetry of its autocorrelogram.

    The autocorrelogram is rotated by 30°, 60°, 90°, 120° and 150°; each
    rotation is correlated with the original over an annulus that holds the
    peaks nearest the centre but not the central peak. The score is
    ``min(r60, r120) - max(r30, r90, r150)``: high for a hexagonal grid,
    near or below zero otherwise.

    Parameters
    ----------
    rate_map_2d : array_like, shape (ny, nx)
        Rate map on an arena's grid, Hz; NaN for unvisited bins.
    inner_radius_bins, outer_radius_bins : float, optional
        The annulus, in bins from the autocorrelogram's centre. By default
        the inner radius is where the radial profile first drops below zero
        (the edge of the central peak) and the outer radius is the ring of
        nearest peaks plus that inner radius.
    min_overlap_bins : int, default 20
        Passed to :func:`spatial_autocorrelogram`.

    Returns
    -------
    float
        The gridness score; NaN when the annulus holds too few bins.

    References
    ----------
    Sargolini, F., Fyhn, M., Hafting, T., McNaughton, B. L., Witter, M. P.,
    Moser, M.-B. & Moser, E. I. (2006). Conjunctive representation of
    position, direction, and velocity in entorhinal cortex. Science 312,
    758-762.
    """
    autocorr = spatial_autocorrelogram(rate_map_2d, min_overlap_bins=min_overlap_bins)
    inner, outer = _annulus(autocorr)
    if inner_radius_bins is not None:
        inner = float(inner_radius_bins)
    if outer_radius_bins is not None:
        outer = float(outer_radius_bins)
    if not 0 <= inner < outer:
        raise ValueError(
            f"the annulus needs 0 <= inner_radius_bins < outer_radius_bins, got {inner} and {outer}"
        )
    cy, cx = (np.array(autocorr.shape) - 1) // 2
    yy, xx = np.indices(autocorr.shape)
    radius = np.hypot(yy - cy, xx - cx)
    ring = (radius >= inner) & (radius <= outer)
    seen = np.isfinite(autocorr)
    filled = np.where(seen, autocorr, 0.0)
    correlations = {}
    for angle in (30, 60, 90, 120, 150):
        rotated = ndimage.rotate(filled, angle, reshape=False, order=1)
        rotated_seen = ndimage.rotate(seen.astype(float), angle, reshape=False, order=1) > 0.999
        use = ring & seen & rotated_seen
        if np.count_nonzero(use) < 10:
            logger.debug("annulus [%s, %s] bins holds too few bins for a gridness score", inner, outer)
            return float("nan")
        correlations[angle] = np.corrcoef(autocorr[use], rotated[use])[0, 1]
    return float(
        min(correlations[60], correlations[120])
        - max(correlations[30], correlations[90], correlations[150])
    )
