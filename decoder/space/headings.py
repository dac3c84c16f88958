"""The heading ring: head direction as the variable decoded, binned in degrees around a circle.

A :class:`HeadingRing` is an environment like the arenas and tracks, so the
same place model, decoder, filter, zones, triggers, judge, recorder and
replay serve it. The one generalisation it needs is where a heading lives on
the pipeline's ``(x_cm, y_cm)`` axis: a heading ``theta`` is the point
``RING_RADIUS_CM * (cos theta, sin theta)`` on a circle whose radius is
``180 / pi`` cm, so that one cm of arc is one degree. Then

* every distance the pipeline measures (decoding error, the random walk's
  step, zone margins, smoothing widths) is an arc length in degrees,
  wrapping around through 0°/360°;
* the decoder's planar posterior mean, ``sum_k p_k * centre_k``, is the
  ring's radius times the posterior's mean resultant vector: its direction
  is the circular mean and its length over the radius the mean resultant
  length (Fisher 1993, Statistical Analysis of Circular Data, ch. 2);
* a tracked heading enters as that point, and the running speed computed
  from consecutive points is the angular head speed in degrees per second.

Headings follow the tracker's convention in ``PROTOCOL.md``: radians in the
arena's frame, counter-clockwise from the +x axis; any finite angle is taken
modulo one turn.
"""

from __future__ import annotations

import logging
import math
from typing import Any, ClassVar

import numpy as np
from scipy import special

from decoder.space.environment_base import Environment, freeze, read_positions

logger = logging.getLogger(__name__)

#: Radius of the ring in cm: one cm of arc is one degree of heading.
RING_RADIUS_CM = 180.0 / math.pi

#: Gaussian smoothing is cut off at this many standard deviations, as
#: ``scipy.ndimage.gaussian_filter1d`` does by default (``truncate=4.0``).
_TRUNCATE_SD = 4.0


def wrap_deg(angle_deg: Any) -> np.ndarray:
    """Angles taken into [0, 360) degrees; NaN stays NaN.

    Parameters
    ----------
    angle_deg : array_like of float64

    Returns
    -------
    ndarray of float64, the shape of ``angle_deg``
    """
    return np.mod(np.asarray(angle_deg, dtype=np.float64), 360.0)


def angle_difference_deg(a_deg: Any, b_deg: Any) -> np.ndarray:
    """Signed shortest turn from ``b`` to ``a``, in [-180, 180) degrees; NaN where either is NaN."""
    return np.mod(np.asarray(a_deg, np.float64) - np.asarray(b_deg, np.float64) + 180.0, 360.0) - 180.0


def heading_points_cm(heading_rad: Any) -> np.ndarray:
    """Headings (radians) as points on the ring, shape (n, 2); NaN rows where the heading is NaN.

    Parameters
    ----------
    heading_rad : array_like of float64, shape (n,)
        Finite angles are taken modulo one turn; infinite ones are refused
        upstream (``decoder.messages``) and give NaN here.

    Returns
    -------
    ndarray of float64, shape (n, 2)
    """
    theta = np.asarray(heading_rad, dtype=np.float64)
    theta = np.where(np.isfinite(theta), np.mod(theta, 2.0 * math.pi), np.nan)
    return RING_RADIUS_CM * np.column_stack([np.cos(theta), np.sin(theta)])


def heading_point(heading_rad: float) -> tuple[float, float]:
    """One heading (radians) as ``(x_cm, y_cm)`` on the ring, as Python floats; NaN for NaN or infinite."""
    if not math.isfinite(heading_rad):
        return math.nan, math.nan
    theta = math.fmod(heading_rad, 2.0 * math.pi)
    return RING_RADIUS_CM * math.cos(theta), RING_RADIUS_CM * math.sin(theta)


def heading_of_point(x_cm: float, y_cm: float) -> tuple[float, float]:
    """Direction (degrees, [0, 360)) and mean resultant length of a point inside the ring.

    For the decoder's posterior mean this is the circular mean of the
    posterior and its mean resultant length ``R`` in [0, 1] (0: no preferred
    direction, 1: all mass in one direction).

    Returns
    -------
    (direction_deg, resultant_length) : (float, float)
        NaN, NaN for a NaN point; direction NaN at the centre.
    """
    if not (math.isfinite(x_cm) and math.isfinite(y_cm)):
        return math.nan, math.nan
    length = math.hypot(x_cm, y_cm) / RING_RADIUS_CM
    if length == 0.0:
        return math.nan, 0.0
    return math.degrees(math.atan2(y_cm, x_cm)) % 360.0, length


class HeadingRing(Environment):
    """Head direction binned around a circle: bin ``k`` holds headings in ``[k w, (k + 1) w)`` degrees.

    Parameters
    ----------
    bin_deg : float, default 6.0
        Target bin width in degrees; the actual width is ``360 / n_bins``
        with ``n_bins = ceil(360 / bin_deg)``. 6° bins are common practice
        for head-direction tuning curves (60 bins a turn).

    Attributes
    ----------
    bin_cm : float
        The actual bin width: degrees, which are cm of arc on this ring.
    bin_centers_cm : ndarray of float64, shape (n_bins, 2)
        ``RING_RADIUS_CM * (cos, sin)`` of each bin's central heading.
    bin_centers_deg : ndarray of float64, shape (n_bins,)
    linear_edges_cm : ndarray of float64, shape (n_bins + 1,)
        Bin edges in degrees of heading (:meth:`linearize`'s unit), 0 to 360,
        as a track's are in cm along it.
    bin_size : float
        The bin width in degrees.

    Examples
    --------
    >>> ring = HeadingRing(bin_deg=6)
    >>> ring.n_bins
    60
    >>> ring.bin_index(heading_points_cm([0.01, np.pi, np.nan])).tolist()
    [0, 30, -1]
    >>> ring.distance_cm(heading_points_cm([np.radians(350.0)]), heading_points_cm([np.radians(10.0)])).round(6).tolist()
    [20.0]
    """

    ndim_spatial: ClassVar[int] = 1

    def __init__(self, bin_deg: float = 6.0) -> None:
        try:
            width = float(bin_deg)
        except (TypeError, ValueError):
            raise ValueError(f"bin_deg must be a number of degrees, got {bin_deg!r}") from None
        if not (math.isfinite(width) and 0.5 <= width <= 90.0):
            raise ValueError(f"bin_deg must be between 0.5 and 90 degrees, got {bin_deg!r}")
        self.bin_deg = width
        self.n_bins = max(4, math.ceil(360.0 / width - 1e-9))
        self.bin_cm = 360.0 / self.n_bins
        self.bin_size = self.bin_cm
        self.linear_edges_cm = freeze(np.arange(self.n_bins + 1) * self.bin_cm)
        self.bin_centers_deg = freeze((np.arange(self.n_bins) + 0.5) * self.bin_cm)
        self.bin_centers_cm = freeze(heading_points_cm(np.radians(self.bin_centers_deg)))
        self.valid_mask = freeze(np.ones(self.n_bins, dtype=bool))
        lag = np.abs(np.arange(self.n_bins)[:, None] - np.arange(self.n_bins)[None, :])
        self._lag_bins = np.minimum(lag, self.n_bins - lag)
        self._distance_matrix = freeze(self._lag_bins * self.bin_cm)
        self._kernel: tuple[float, np.ndarray] | None = None
        logger.debug("heading ring: %d bins of %.3g deg", self.n_bins, self.bin_cm)

    def linearize(self, xy_cm: np.ndarray) -> np.ndarray:
        """Heading of each ring point in degrees, [0, 360); NaN for a lost frame or the ring's centre.

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of float64, shape (n,)
        """
        xy = read_positions("xy_cm", xy_cm)
        x, y = xy[:, 0], xy[:, 1]
        ok = np.isfinite(x) & np.isfinite(y) & ((x != 0.0) | (y != 0.0))
        with np.errstate(invalid="ignore"):
            deg = np.mod(np.degrees(np.arctan2(y, x)), 360.0)
        return np.where(ok, deg, np.nan)

    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        """Bin of each point's direction from the ring's centre; ``-1`` for NaN or the centre itself.

        Points need not lie on the ring: a point between two frames'
        headings (linear interpolation) falls in the bin of its direction.
        """
        deg = self.linearize(xy_cm)
        ok = np.isfinite(deg)
        idx = np.zeros(deg.shape, dtype=np.int64)
        # mod 360 can round up to exactly 360.0 for angles a hair below 0.
        idx[ok] = np.minimum((deg[ok] / self.bin_cm).astype(np.int64), self.n_bins - 1)
        return np.where(ok, idx, -1)

    def distance_cm(self, a_xy_cm: np.ndarray, b_xy_cm: np.ndarray) -> np.ndarray:
        """Shortest turn between headings, in degrees (cm of arc on this ring), in [0, 180]."""
        a, b = self._pair_positions(a_xy_cm, b_xy_cm)
        return np.abs(angle_difference_deg(self.linearize(a), self.linearize(b)))

    def bin_distance_matrix_cm(self) -> np.ndarray:
        """Shortest turn between every pair of bin centres, degrees, shape (n_bins, n_bins); read-only."""
        return self._distance_matrix

    def outline_cm(self) -> np.ndarray:
        """The ring as a closed line of shape (n_bins + 1, 2), through the bin edges."""
        edges = np.radians(np.arange(self.n_bins + 1) * self.bin_cm)
        return RING_RADIUS_CM * np.column_stack([np.cos(edges), np.sin(edges)])

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "HeadingRing", "bin_deg": self.bin_deg}

    def wrap_kernel(self, sigma_deg: float) -> np.ndarray:
        """The circulant Gaussian smoothing matrix of s.d. ``sigma_deg``, shape (n_bins, n_bins).

        Weights ``exp(-k² / 2s²)`` for bin lags ``|k| <= int(4 s + 0.5)``
        (``s = sigma_deg / bin width``), laid around the ring modulo
        ``n_bins``: the kernel of ``scipy.ndimage.gaussian_filter1d`` with
        ``mode="wrap"``, before its normalisation (here the smoothing
        divides by the mask's weight instead).
        """
        if self._kernel is None or self._kernel[0] != sigma_deg:
            s = sigma_deg / self.bin_cm
            reach = int(_TRUNCATE_SD * s + 0.5)
            lags = np.arange(-reach, reach + 1)
            weights = np.exp(-0.5 * (lags / s) ** 2)
            first_row = np.zeros(self.n_bins)
            np.add.at(first_row, lags % self.n_bins, weights)
            rows = (np.arange(self.n_bins)[None, :] - np.arange(self.n_bins)[:, None]) % self.n_bins
            self._kernel = (sigma_deg, first_row[rows])
        return self._kernel[1]

    def tracked_bin_kernel(self, noise_sd_cm: float) -> np.ndarray:
        """Probability that the tracked heading falls in bin ``j`` when the true one lies in bin ``i``.

        The true heading is taken uniform within its bin and the tracker adds
        a normal error of s.d. ``noise_sd_cm`` (degrees on this ring),
        wrapped around the circle: a wrapped normal convolved with the bin's
        box and integrated over each bin. With ``G(x) = x Phi(x/s) + s
        phi(x/s)``, the integral of the normal c.d.f., the mass ``k`` bins
        away is the second difference ``(G((k+1)w) - 2 G(kw) + G((k-1)w)) /
        w``, summed over the wraps ``k w + 360 m`` (Mardia and Jupp 2000,
        Directional Statistics, sec. 3.5.7, the wrapped normal as a sum over
        turns; from memory).

        Parameters
        ----------
        noise_sd_cm : float
            The tracked heading's noise s.d. in degrees, >= 0; 0 gives the identity.

        Returns
        -------
        ndarray of float64, shape (n_bins, n_bins)
            Circulant, rows summing to 1: ``posterior @ kernel`` is the
            distribution of the tracked heading's bin (the posterior
            predictive of a noisy observation).
        """
        sd = float(noise_sd_cm)
        if not (math.isfinite(sd) and sd >= 0.0):
            raise ValueError(f"noise_sd_cm must be a finite s.d. >= 0 degrees, got {noise_sd_cm!r}")
        if sd == 0.0:
            return np.eye(self.n_bins)
        w = self.bin_cm
        # Enough turns either side that the normal's tails beyond them are negligible (8 s.d.).
        reach = math.ceil(2 * _TRUNCATE_SD * sd / 360.0) + 1
        turns = np.arange(-reach, reach + 1)
        offsets = (np.arange(self.n_bins)[:, None] * w + 360.0 * turns[None, :]) / sd
        w_sd = w / sd

        def g(z: np.ndarray) -> np.ndarray:  # G(x) / s at z = x / s
            return z * special.ndtr(z) + np.exp(-0.5 * z**2) / math.sqrt(2.0 * math.pi)

        first_row = ((g(offsets + w_sd) - 2.0 * g(offsets) + g(offsets - w_sd)) / w_sd).sum(axis=1)
        rows = (np.arange(self.n_bins)[None, :] - np.arange(self.n_bins)[:, None]) % self.n_bins
        return first_row[rows] / first_row.sum()

    def _smooth_masked(
        self, values: np.ndarray, mask_f: np.ndarray, sigma_cm: float
    ) -> tuple[np.ndarray, np.ndarray]:
        kernel = self.wrap_kernel(sigma_cm)
        return values @ kernel, mask_f @ kernel
