"""The random walk between decoding steps, and its tilt towards a drift.

:class:`RandomWalk` is the state-space decoder's transition: a Gaussian
random walk over the valid bins of an environment, separable on a grid,
along the track on a track or graph (and around the heading ring). Its
:meth:`RandomWalk.predict` takes an optional tilt ``theta`` (1/cm): every
row of the transition reweighted by ``exp(theta . d)``, ``d`` the planar
move, and renormalised over the valid bins, which turns a Gaussian step
``N(d; 0, s^2)`` into ``N(d; s^2 theta, s^2)`` (exponential tilting). The
decoder's compiled step does the same (``_kernels.decode_step``); this
module's numpy path is the reference the offline filter uses.
"""

from __future__ import annotations

import math

import numpy as np

from decoder.inference import _kernels
from decoder.inference.checks import bin_mask, kernel_set, positive_finite
from decoder.space.environments import Environment

#: The random-walk kernel is cut off this many s.d. from its centre, where it
#: has fallen to exp(-8) ~ 3e-4 of its peak.
TRUNCATE_SD = 4.0

#: Largest environment for which :meth:`RandomWalk.dense_matrix` builds the
#: full matrix of a grid arena (n_bins² float64; 20,000 bins is 3.2 GB).
MAX_DENSE_GRID_BINS = 20_000


class RandomWalk:
    """Gaussian random-walk transition between the valid bins of an environment.

    From bin ``i`` the animal moves to bin ``j`` with probability
    ``T[i, j] = K(i, j) m_j / sum_k K(i, k) m_k``, where ``m`` is the
    valid-bin mask and ``K`` a Gaussian of s.d. ``sd_cm`` in the distance
    between bin centres, cut off at ``TRUNCATE_SD`` s.d. In a grid arena
    ``K`` is separable (a Gaussian along x times one along y, each cut off
    separately) and ``T`` is applied as a convolution without being formed;
    on a track or graph ``K`` uses the distance along the track and ``T`` is
    a dense matrix. Each row of ``T`` for a valid bin sums to 1; rows of
    invalid bins are 0 (the posterior never has mass there).

    Parameters
    ----------
    environment : Environment
    valid_mask : ndarray of bool, shape (n_bins,)
        Bins the walk may enter (combined with ``environment.valid_mask``).
    sd_cm : float
        S.d. of one step of the walk in cm, along each axis in an arena.
    backend : {"numba", "numpy"}, default "numba"
        Compiled kernels, or their plain numpy twins.

    Attributes
    ----------
    interior : ndarray of bool, shape (n_bins,)
        On a grid, the valid bins whose whole reach of the walk is valid:
        a tilted row sums its full kernels there (``_kernels.decode_step``).
        All False on a track or graph.

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (100, 0), bin_cm=10)
    >>> walk = RandomWalk(track, track.valid_mask, sd_cm=10.0)
    >>> bool(np.allclose(walk.dense_matrix().sum(axis=1), 1.0))
    True
    """

    def __init__(
        self, environment: Environment, valid_mask: np.ndarray, sd_cm: float, backend: str = "numba"
    ) -> None:
        self.environment = environment
        self.valid_mask = bin_mask("valid_mask", valid_mask, environment.n_bins) & environment.valid_mask
        self.sd_cm = positive_finite("sd_cm", sd_cm)
        self.backend = backend
        self._k = kernel_set(backend)
        self._mask_f = self.valid_mask.astype(np.float64)
        grid = environment.grid_shape
        if grid is not None:
            self._ny, self._nx = grid
            # Only offsets within the cut-off, as on a track; a walk narrower
            # than a quarter bin stays put.
            reach = math.floor(TRUNCATE_SD * self.sd_cm / environment.bin_cm)
            offsets_cm = np.arange(-reach, reach + 1) * environment.bin_cm
            self._kernel_1d = np.exp(-0.5 * (offsets_cm / self.sd_cm) ** 2)
            self._scratch = np.empty(environment.n_bins)
            norm = self._k.convolve_separable(
                self._mask_f, self._ny, self._nx, self._kernel_1d, np.empty(environment.n_bins), self._scratch
            )
            # On a valid bin the kernel's own centre contributes 1, so norm >= 1 there.
            self._inv_norm = np.zeros(environment.n_bins)
            self._inv_norm[self.valid_mask] = 1.0 / norm[self.valid_mask]
            # Bins whose whole reach is valid: a tilted row sums the full kernels there.
            box = np.ones(2 * reach + 1)
            within = _kernels.convolve_separable_numpy(
                self._mask_f, self._ny, self._nx, box, np.empty(environment.n_bins), None
            )
            self.interior = self.valid_mask & (within > box.size**2 - 0.5)
            self._transition = None
        else:
            self.interior = np.zeros(environment.n_bins, bool)
            self._transition = np.ascontiguousarray(self._dense_from_distances())
        centers = np.asarray(environment.bin_centers_cm, dtype=np.float64)
        self._centers_x = np.ascontiguousarray(centers[:, 0])
        self._centers_y = np.ascontiguousarray(centers[:, 1])

    def _dense_from_distances(self) -> np.ndarray:
        d = self.environment.bin_distance_matrix_cm()
        near = d <= TRUNCATE_SD * self.sd_cm
        kernel = np.zeros(d.shape)
        kernel[near] = np.exp(-0.5 * (d[near] / self.sd_cm) ** 2)
        return self._normalise_rows(kernel)

    def _normalise_rows(self, kernel: np.ndarray) -> np.ndarray:
        weighted = kernel * self._mask_f[np.newaxis, :]
        norm = weighted.sum(axis=1)
        out = np.zeros_like(weighted)
        rows = self.valid_mask
        out[rows] = weighted[rows] / norm[rows, np.newaxis]
        return out

    def predict(self, p: np.ndarray, tilt: tuple[float, float] = (0.0, 0.0)) -> np.ndarray:
        """Move a posterior one step, ``p @ T``, with the plain numpy twins.

        The decoder's compiled step predicts inside ``decode_step``; this is
        the reference path that the offline filter uses.

        Parameters
        ----------
        p : ndarray of float64, shape (n_bins,)
            Distribution over bins, 0 outside the valid bins.
        tilt : (float, float), default (0, 0)
            ``theta`` (1/cm, x and y): every row of ``T`` reweighted by
            ``exp(theta . (c_j - c_i))`` and renormalised over the valid
            bins (``_kernels.predict_grid_tilted_numpy``,
            ``_kernels.predict_dense_tilted_numpy``); ``(0, 0)`` is the
            plain walk.

        Returns
        -------
        ndarray of float64, shape (n_bins,)
            The predicted distribution; sums to ``p.sum()``.
        """
        p = np.ascontiguousarray(p, dtype=np.float64)
        out = np.empty(self.environment.n_bins)
        theta_x, theta_y = (float(v) for v in tilt)
        tilted = theta_x != 0.0 or theta_y != 0.0
        if self._transition is not None and tilted:
            return _kernels.predict_dense_tilted_numpy(
                p, self._transition, self._centers_x, self._centers_y, theta_x, theta_y, out, None
            )
        if self._transition is not None:
            return _kernels.predict_dense_numpy(p, self._transition, out)
        if tilted:
            return _kernels.predict_grid_tilted_numpy(
                p, self._ny, self._nx, self._kernel_1d, self.environment.bin_cm, theta_x, theta_y, self._mask_f, out
            )
        return _kernels.predict_grid_numpy(
            p, self._ny, self._nx, self._kernel_1d, self._mask_f, self._inv_norm, out, self._scratch
        )

    def dense_matrix(self) -> np.ndarray:
        """The transition matrix ``T`` (from row bin to column bin), plain numpy.

        Returns
        -------
        ndarray of float64, shape (n_bins, n_bins)

        Raises
        ------
        ValueError
            For a grid arena of more than ``MAX_DENSE_GRID_BINS`` bins.
        """
        if self._transition is not None:
            return self._transition.copy()
        n = self.environment.n_bins
        if n > MAX_DENSE_GRID_BINS:
            raise ValueError(f"a dense transition of {n} bins would need {n * n * 8 / 1e9:.1f} GB; a grid arena is predicted by convolution instead (decode_step)")
        reach = self._kernel_1d.size // 2

        def axis_kernel(size: int) -> np.ndarray:
            lag = np.arange(size)[np.newaxis, :] - np.arange(size)[:, np.newaxis]
            return np.where(np.abs(lag) <= reach, self._kernel_1d[np.clip(lag + reach, 0, 2 * reach)], 0.0)

        # Row-major bins (bin = iy * nx + ix) make the separable kernel a Kronecker product.
        return self._normalise_rows(np.kron(axis_kernel(self._ny), axis_kernel(self._nx)))
