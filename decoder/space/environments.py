"""Spatial environments: where the animal can be and how positions become bins.

Three kinds share one interface (:class:`Environment`):

- :class:`Arena`, an open field (rectangle, circle or polygon) covered by a
  regular square grid whose bins are flattened row-major, ``bin = iy * nx + ix``;
- :class:`TrackGraph`, a maze made of straight track segments joined at nodes
  (T-, Y-, W-shaped and the like), binned along each segment;
- :class:`LinearTrack`, a graph with a single segment.

Every environment maps tracked 2-D positions ``(x_cm, y_cm)`` of shape
``(n, 2)`` to flat bin indices (``-1`` where the position is lost, outside, or
off the track), measures distances the way the animal can travel (straight
line in an arena, along the track in a graph), smooths maps over its bins and
serialises to a JSON-friendly dict that rebuilds it exactly.
"""

from __future__ import annotations

import abc
import inspect
import json
import logging
import math
from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np
from scipy import ndimage
from scipy.sparse import csr_array
from scipy.sparse.csgraph import connected_components, shortest_path

logger = logging.getLogger(__name__)

#: Largest number of bins an environment may have. A 500 x 500 grid already
#: needs 2 MB per unit for a rate map, so a finer grid is a mistaken bin size.
MAX_BINS = 250_000

#: Largest number of polygon vertices; the simplicity check compares every
#: pair of sides, and a drawn arena outline needs far fewer.
MAX_POLYGON_VERTICES = 1_000

#: Points used to draw a circle's outline.
_CIRCLE_OUTLINE_POINTS = 128

#: Relative slack used where a ratio of lengths is rounded up to a whole
#: number of bins, so that 100 cm / 2.5 cm stays 40 bins despite rounding.
_RATIO_SLACK = 1e-9


def _positive_length(name: str, value: Any) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number of cm, got {value!r}") from None
    if not math.isfinite(out) or out <= 0:
        raise ValueError(f"{name} must be a positive, finite number of cm, got {value!r}")
    return out


def _point(name: str, value: Any) -> tuple[float, float]:
    arr = np.asarray(value, dtype=np.float64) if _is_numeric(value) else None
    if arr is None or arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be a finite (x_cm, y_cm) pair, got {value!r}")
    return float(arr[0]), float(arr[1])


def _is_numeric(value: Any) -> bool:
    try:
        np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        return False
    return True


def _whole_bins(length_cm: float, bin_cm: float) -> int:
    ratio = length_cm / bin_cm
    return max(1, math.ceil(ratio - _RATIO_SLACK * max(1.0, ratio)))


def _read_positions(name: str, xy_cm: Any) -> np.ndarray:
    if not _is_numeric(xy_cm):
        raise ValueError(f"{name} must be an array of (x_cm, y_cm) positions")
    xy = np.asarray(xy_cm, dtype=np.float64)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"{name} must have shape (n, 2), got {xy.shape}")
    return xy


def _cross(ax: Any, ay: Any, bx: Any, by: Any) -> Any:
    return ax * by - ay * bx


def points_in_polygon(xy_cm: np.ndarray, vertices_cm: np.ndarray) -> np.ndarray:
    """Whether each position lies inside a polygon (even-odd rule).

    Parameters
    ----------
    xy_cm : ndarray of float64, shape (n, 2)
        Positions; NaN gives False.
    vertices_cm : ndarray of float64, shape (m, 2)
        Polygon vertices in order, not repeating the first.

    Returns
    -------
    ndarray of bool, shape (n,)
        Points exactly on a side may fall either way.

    References
    ----------
    Shimrat M (1962) Algorithm 112: Position of point relative to polygon.
    Communications of the ACM 5(8):434.
    """
    xy = _read_positions("xy_cm", xy_cm)
    x, y = xy[:, 0], xy[:, 1]
    inside = np.zeros(len(xy), dtype=bool)
    verts = np.asarray(vertices_cm, dtype=np.float64)
    for (x0, y0), (x1, y1) in zip(verts, np.roll(verts, -1, axis=0)):
        if y1 == y0:
            continue
        straddles = (y0 > y) != (y1 > y)
        x_cross = x0 + (x1 - x0) * (y - y0) / (y1 - y0)
        inside ^= straddles & (x < x_cross)
    return inside


def _segments_touch(p0: np.ndarray, p1: np.ndarray, q0: np.ndarray, q1: np.ndarray) -> np.ndarray:
    """Whether closed segments p0-p1 and q0-q1 share a point, shape (k, 2) each."""
    def orient(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
        return np.sign(_cross(b[:, 0] - a[:, 0], b[:, 1] - a[:, 1], c[:, 0] - a[:, 0], c[:, 1] - a[:, 1]))

    def on_segment(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        return np.all((c >= lo) & (c <= hi), axis=1)

    d1, d2 = orient(q0, q1, p0), orient(q0, q1, p1)
    d3, d4 = orient(p0, p1, q0), orient(p0, p1, q1)
    crossing = (d1 * d2 < 0) & (d3 * d4 < 0)
    return (
        crossing
        | ((d1 == 0) & on_segment(q0, q1, p0))
        | ((d2 == 0) & on_segment(q0, q1, p1))
        | ((d3 == 0) & on_segment(p0, p1, q0))
        | ((d4 == 0) & on_segment(p0, p1, q1))
    )


def _check_simple_polygon(verts: np.ndarray) -> None:
    m = len(verts)
    nxt = np.roll(verts, -1, axis=0)
    side = nxt - verts
    if np.any(np.all(side == 0, axis=1)):
        raise ValueError("vertices_cm repeats a vertex in a row; give each corner once")
    spread = verts - verts[0]
    if np.all(_cross(spread[1, 0], spread[1, 1], spread[:, 0], spread[:, 1]) == 0):
        raise ValueError("vertices_cm are collinear and enclose no area")
    prev_side = np.roll(side, 1, axis=0)
    turn = _cross(prev_side[:, 0], prev_side[:, 1], side[:, 0], side[:, 1])
    if np.any((turn == 0) & (np.sum(prev_side * side, axis=1) < 0)):
        raise ValueError("vertices_cm doubles back on itself along a side; the polygon is not simple")
    i, j = np.triu_indices(m, k=2)
    keep = ~((i == 0) & (j == m - 1))
    i, j = i[keep], j[keep]
    touching = _segments_touch(verts[i], nxt[i], verts[j], nxt[j])
    if np.any(touching):
        a, b = int(i[touching][0]), int(j[touching][0])
        raise ValueError(
            f"vertices_cm is not a simple polygon: side {a} ({a}->{(a + 1) % m}) meets side "
            f"{b} ({b}->{(b + 1) % m}); give the outline once, without crossings"
        )
    twice_area = np.sum(_cross(verts[:, 0], verts[:, 1], nxt[:, 0], nxt[:, 1]))
    if abs(twice_area) <= 1e-12 * np.ptp(verts, axis=0).max() ** 2:
        raise ValueError("vertices_cm encloses almost no area; check the units and the vertex order")


class Environment(abc.ABC):
    """What every environment offers: bins, distances, smoothing, a dict form.

    Attributes
    ----------
    bin_cm : float
        Nominal bin size in cm (side of a grid square, length of a track bin).
    n_bins : int
        Number of bins on the flat bin axis.
    bin_centers_cm : ndarray of float64, shape (n_bins, 2)
        Centre of each bin in the arena's frame.
    valid_mask : ndarray of bool, shape (n_bins,)
        Bins inside the geometry.
    bin_size : float
        Area of a bin in cm² (arena) or its mean length in cm (track, graph).
    ndim_spatial : int
        2 for an arena, 1 for a track or graph.
    """

    ndim_spatial: ClassVar[int]
    bin_cm: float
    n_bins: int
    bin_centers_cm: np.ndarray
    valid_mask: np.ndarray
    bin_size: float

    @property
    def grid_shape(self) -> tuple[int, int] | None:
        """``(ny, nx)`` for a grid arena, ``None`` otherwise."""
        return None

    @abc.abstractmethod
    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        """Flat bin of each position.

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of int64, shape (n,)
            ``-1`` for NaN, for positions outside the geometry and for
            positions in invalid bins.
        """

    @abc.abstractmethod
    def distance_cm(self, a_xy_cm: np.ndarray, b_xy_cm: np.ndarray) -> np.ndarray:
        """Distance the animal would travel from each ``a`` to each ``b``.

        Parameters
        ----------
        a_xy_cm, b_xy_cm : array_like of float64, shape (n, 2)
            Positions; a shape (1, 2) argument is paired with every row of
            the other.

        Returns
        -------
        ndarray of float64, shape (n,)
            NaN where either position is lost (or off the track).
        """

    @abc.abstractmethod
    def outline_cm(self) -> Any:
        """The geometry for drawing, in cm."""

    @abc.abstractmethod
    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly settings that :meth:`Environment.from_dict` rebuilds exactly."""

    @abc.abstractmethod
    def _smooth_masked(
        self, values: np.ndarray, mask_f: np.ndarray, sigma_cm: float
    ) -> tuple[np.ndarray, np.ndarray]:
        """Numerator ``G*(v·m)`` of shape (k, n_bins) and denominator ``G*m`` of shape (n_bins,)."""

    def linearize(self, xy_cm: np.ndarray) -> np.ndarray:
        """Position along the track in cm; only tracks and graphs have one."""
        raise NotImplementedError(f"{type(self).__name__} has no linear position; use a LinearTrack or TrackGraph")

    def bin_distance_matrix_cm(self) -> np.ndarray:
        """Distances between all bin centres along a track or graph."""
        raise NotImplementedError(
            f"{type(self).__name__} has no bin distance matrix (it would be n_bins² entries); "
            "work on the grid instead, for example with distance_cm on bin centres"
        )

    def smooth(self, values: np.ndarray, mask: np.ndarray, sigma_cm: float) -> np.ndarray:
        """Gaussian smoothing restricted to ``mask``, normalised by the mask's weight.

        Each output bin inside the mask is ``G*(v·m) / G*m``: a weighted mean
        of the values in masked bins only, so that unvisited bins neither
        pull a map towards zero nor leak across walls. Bins outside the mask
        are 0. Values outside the mask are ignored, even if NaN.

        Parameters
        ----------
        values : array_like of float64, shape (k, n_bins) or (n_bins,)
        mask : array_like of bool, shape (n_bins,)
        sigma_cm : float
            Standard deviation of the Gaussian; 0 returns ``values`` with
            zeros outside the mask.

        Returns
        -------
        ndarray of float64, the shape of ``values``
            Never NaN.

        References
        ----------
        Knutsson H, Westin C-F (1993) Normalized and differential convolution:
        methods for interpolation and filtering of incomplete and uncertain
        data. Proceedings of the IEEE Conference on Computer Vision and
        Pattern Recognition, 515-523.
        """
        vals = np.asarray(values, dtype=np.float64)
        one_map = vals.ndim == 1
        vals2 = vals[np.newaxis] if one_map else vals
        if vals2.ndim != 2 or vals2.shape[1] != self.n_bins:
            raise ValueError(f"values must have shape (k, {self.n_bins}) or ({self.n_bins},), got {vals.shape}")
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != (self.n_bins,):
            raise ValueError(f"mask must be a boolean array of shape ({self.n_bins},), got {m.dtype} {m.shape}")
        try:
            sigma = float(sigma_cm)
        except (TypeError, ValueError):
            raise ValueError(f"sigma_cm must be a number of cm, got {sigma_cm!r}") from None
        if not math.isfinite(sigma) or sigma < 0:
            raise ValueError(f"sigma_cm must be zero or a positive, finite number of cm, got {sigma_cm!r}")
        if not np.all(np.isfinite(vals2[:, m])):
            raise ValueError("values hold a NaN or infinite value inside the mask; mask those bins out")
        masked = np.where(m, vals2, 0.0)
        if sigma == 0 or not m.any():
            out = masked
        else:
            num, den = self._smooth_masked(masked, m.astype(np.float64), sigma)
            # G*m is positive in every masked bin (the kernel's centre weight);
            # the guard only keeps float underflow far from the mask out of the division.
            ok = m & (den > 0)
            out = np.zeros_like(num)
            np.divide(num, den, out=out, where=ok)
        return out[0] if one_map else out

    @staticmethod
    def from_dict(d: Mapping[str, Any]) -> Environment:
        """Rebuild an environment from :meth:`to_dict` output (or its JSON).

        Parameters
        ----------
        d : mapping
            Must hold ``"kind"`` (``"Arena"``, ``"TrackGraph"`` or
            ``"LinearTrack"``) and that kind's settings.
        """
        if not isinstance(d, Mapping) or "kind" not in d:
            raise ValueError("an environment dict must be a mapping with a 'kind' entry")
        kinds = {cls.__name__: cls for cls in (Arena, TrackGraph, LinearTrack)}
        kind = d["kind"]
        if kind not in kinds:
            raise ValueError(f"unknown environment kind {kind!r}; expected one of {sorted(kinds)}")
        cls = kinds[kind]
        fields = {k: v for k, v in d.items() if k != "kind"}
        params = inspect.signature(cls.__init__).parameters
        takes_any = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values())
        named = {
            name for name, p in params.items() if name != "self" and p.kind is not inspect.Parameter.VAR_KEYWORD
        }
        missing = sorted(
            name for name in named if params[name].default is inspect.Parameter.empty and name not in fields
        )
        unknown = sorted(set(fields) - named) if not takes_any else []
        if missing or unknown:
            raise ValueError(f"cannot rebuild a {kind}: missing entries {missing}, unknown entries {unknown}")
        return cls(**fields)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Environment):
            return NotImplemented
        return type(self) is type(other) and self.to_dict() == other.to_dict()

    def __hash__(self) -> int:
        return hash(json.dumps(self.to_dict(), sort_keys=True))

    def __repr__(self) -> str:
        settings = ", ".join(f"{k}={v!r}" for k, v in self.to_dict().items() if k != "kind")
        return f"{type(self).__name__}({settings})"

    def _pair_positions(self, a_xy_cm: Any, b_xy_cm: Any) -> tuple[np.ndarray, np.ndarray]:
        a = _read_positions("a_xy_cm", a_xy_cm)
        b = _read_positions("b_xy_cm", b_xy_cm)
        if len(a) != len(b) and 1 not in (len(a), len(b)):
            raise ValueError(f"a_xy_cm has {len(a)} positions and b_xy_cm has {len(b)}; give equal numbers or one")
        return np.broadcast_arrays(a, b)


def _freeze(arr: np.ndarray) -> np.ndarray:
    arr.setflags(write=False)
    return arr


class Arena(Environment):
    """An open field covered by a square grid.

    Build one with :meth:`rectangle`, :meth:`circle` or :meth:`polygon`; the
    constructor takes the same settings by name and is what
    :meth:`Environment.from_dict` calls.

    The grid starts at the lower-left corner of the shape's bounding box and
    covers it with whole bins (the last row and column may reach past the
    box). A bin is valid when its square overlaps the shape with positive
    area, so that an animal hugging the wall lands in a valid bin.

    Parameters
    ----------
    shape : {"rectangle", "circle", "polygon"}
    bin_cm : float
        Side of a grid square.
    **geometry
        ``origin_cm, width_cm, height_cm`` for a rectangle, ``center_cm,
        radius_cm`` for a circle, ``vertices_cm`` for a polygon.

    Attributes
    ----------
    x_edges_cm : ndarray of float64, shape (nx + 1,)
    y_edges_cm : ndarray of float64, shape (ny + 1,)
        Grid lines, usable as ``numpy.histogram2d`` bins.

    Examples
    --------
    >>> arena = Arena.rectangle(width_cm=100, height_cm=60, bin_cm=2.5)
    >>> arena.grid_shape
    (24, 40)
    >>> arena.bin_index([[1.0, 1.0], [3.0, 2.6], [np.nan, 0.0]]).tolist()
    [0, 41, -1]
    """

    ndim_spatial: ClassVar[int] = 2
    _GEOMETRY: ClassVar[dict[str, tuple[str, ...]]] = {
        "rectangle": ("origin_cm", "width_cm", "height_cm"),
        "circle": ("center_cm", "radius_cm"),
        "polygon": ("vertices_cm",),
    }

    def __init__(self, shape: str, bin_cm: float, **geometry: Any) -> None:
        if shape not in self._GEOMETRY:
            raise ValueError(f"shape must be one of {sorted(self._GEOMETRY)}, got {shape!r}")
        expected = self._GEOMETRY[shape]
        if set(geometry) != set(expected):
            raise ValueError(f"a {shape} arena needs exactly {list(expected)}, got {sorted(geometry)}")
        self.shape = shape
        self.bin_cm = _positive_length("bin_cm", bin_cm)
        self._geometry = self._read_geometry(shape, geometry)
        if shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            self._vertices = None
            lo, hi = np.array([cx - r, cy - r]), np.array([cx + r, cy + r])
        else:
            self._vertices = self._polygon_vertices()
            lo, hi = self._vertices.min(axis=0), self._vertices.max(axis=0)
        nx, ny = _whole_bins(hi[0] - lo[0], self.bin_cm), _whole_bins(hi[1] - lo[1], self.bin_cm)
        if nx * ny > MAX_BINS:
            raise ValueError(
                f"bin_cm={self.bin_cm} gives a {ny} x {nx} grid ({nx * ny} bins), more than {MAX_BINS}; "
                "use a larger bin_cm"
            )
        self.x_edges_cm = _freeze(self._grid_lines(lo[0], hi[0], nx))
        self.y_edges_cm = _freeze(self._grid_lines(lo[1], hi[1], ny))
        self._nx, self._ny = nx, ny
        self.n_bins = nx * ny
        xc = 0.5 * (self.x_edges_cm[:-1] + self.x_edges_cm[1:])
        yc = 0.5 * (self.y_edges_cm[:-1] + self.y_edges_cm[1:])
        gx, gy = np.meshgrid(xc, yc)
        self.bin_centers_cm = _freeze(np.column_stack([gx.ravel(), gy.ravel()]))
        self.valid_mask = _freeze(self._overlapping_bins())
        if not self.valid_mask.any():
            raise ValueError(f"the {shape} arena has no valid bin at bin_cm={self.bin_cm}")
        self.bin_size = self.bin_cm**2
        logger.debug("%s arena: %d x %d grid, %d valid bins", shape, ny, nx, int(self.valid_mask.sum()))

    @classmethod
    def rectangle(
        cls, width_cm: float, height_cm: float, bin_cm: float, origin_cm: Sequence[float] = (0, 0)
    ) -> Arena:
        """A rectangular field with its lower-left corner at ``origin_cm``."""
        return cls("rectangle", bin_cm, origin_cm=origin_cm, width_cm=width_cm, height_cm=height_cm)

    @classmethod
    def circle(cls, center_cm: Sequence[float], radius_cm: float, bin_cm: float) -> Arena:
        """A circular field."""
        return cls("circle", bin_cm, center_cm=center_cm, radius_cm=radius_cm)

    @classmethod
    def polygon(cls, vertices_cm: Any, bin_cm: float) -> Arena:
        """A field bounded by a simple polygon, shape (m, 2), m >= 3, in either orientation."""
        return cls("polygon", bin_cm, vertices_cm=vertices_cm)

    @staticmethod
    def _read_geometry(shape: str, geometry: Mapping[str, Any]) -> dict[str, Any]:
        if shape == "rectangle":
            return {
                "origin_cm": _point("origin_cm", geometry["origin_cm"]),
                "width_cm": _positive_length("width_cm", geometry["width_cm"]),
                "height_cm": _positive_length("height_cm", geometry["height_cm"]),
            }
        if shape == "circle":
            return {
                "center_cm": _point("center_cm", geometry["center_cm"]),
                "radius_cm": _positive_length("radius_cm", geometry["radius_cm"]),
            }
        raw = geometry["vertices_cm"]
        verts = np.asarray(raw, dtype=np.float64) if _is_numeric(raw) else None
        if verts is None or verts.ndim != 2 or verts.shape[1] != 2 or not np.all(np.isfinite(verts)):
            raise ValueError("vertices_cm must be a finite array of shape (m, 2)")
        if len(verts) > 1 and np.array_equal(verts[0], verts[-1]):
            verts = verts[:-1]
        if not 3 <= len(verts) <= MAX_POLYGON_VERTICES:
            raise ValueError(f"a polygon needs 3 to {MAX_POLYGON_VERTICES} distinct vertices, got {len(verts)}")
        _check_simple_polygon(verts)
        return {"vertices_cm": tuple((float(x), float(y)) for x, y in verts)}

    def _polygon_vertices(self) -> np.ndarray:
        if self.shape == "rectangle":
            (x0, y0) = self._geometry["origin_cm"]
            w, h = self._geometry["width_cm"], self._geometry["height_cm"]
            verts = np.array([[x0, y0], [x0 + w, y0], [x0 + w, y0 + h], [x0, y0 + h]])
        else:
            verts = np.array(self._geometry["vertices_cm"], dtype=np.float64)
        return _freeze(verts)

    def _grid_lines(self, lo: float, hi: float, n: int) -> np.ndarray:
        lines = lo + self.bin_cm * np.arange(n + 1)
        # The slack in _whole_bins may leave the last line a hair short of the shape.
        lines[-1] = max(lines[-1], hi)
        return lines

    def _overlapping_bins(self) -> np.ndarray:
        # Squares shrunk by a hair, so that a square merely touching the
        # shape along a grid line does not count as overlapping it.
        eps = 1e-9 * self.bin_cm
        x0 = np.tile(self.x_edges_cm[:-1], self._ny) + eps
        x1 = np.tile(self.x_edges_cm[1:], self._ny) - eps
        y0 = np.repeat(self.y_edges_cm[:-1], self._nx) + eps
        y1 = np.repeat(self.y_edges_cm[1:], self._nx) - eps
        if self.shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            dx = np.clip(cx, x0, x1) - cx
            dy = np.clip(cy, y0, y1) - cy
            return dx * dx + dy * dy < r * r
        hit = points_in_polygon(self.bin_centers_cm, self._vertices)
        for p, q in zip(self._vertices, np.roll(self._vertices, -1, axis=0)):
            hit |= self._side_meets_boxes(p, q - p, (x0, x1), (y0, y1))
        return hit

    @staticmethod
    def _side_meets_boxes(p: np.ndarray, d: np.ndarray, xs: tuple, ys: tuple) -> np.ndarray:
        """Whether segment ``p + t·d``, t in [0, 1], meets each box.

        References
        ----------
        Liang Y-D, Barsky BA (1984) A new concept and method for line
        clipping. ACM Transactions on Graphics 3(1):1-22.
        """
        t_lo = np.zeros_like(xs[0])
        t_hi = np.ones_like(xs[0])
        inside = np.ones(xs[0].shape, dtype=bool)
        for start, step, (lo, hi) in ((p[0], d[0], xs), (p[1], d[1], ys)):
            if step == 0:
                inside &= (start >= lo) & (start <= hi)
            else:
                t0, t1 = (lo - start) / step, (hi - start) / step
                t_lo = np.maximum(t_lo, np.minimum(t0, t1))
                t_hi = np.minimum(t_hi, np.maximum(t0, t1))
        return inside & (t_lo <= t_hi)

    @property
    def grid_shape(self) -> tuple[int, int]:
        """``(ny, nx)``: rows along y, columns along x."""
        return (self._ny, self._nx)

    def contains(self, xy_cm: np.ndarray) -> np.ndarray:
        """Whether each position lies inside the shape itself (not the grown bins).

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of bool, shape (n,)
            False for NaN.
        """
        xy = _read_positions("xy_cm", xy_cm)
        if self.shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            with np.errstate(invalid="ignore"):
                return (xy[:, 0] - cx) ** 2 + (xy[:, 1] - cy) ** 2 <= r * r
        return points_in_polygon(xy, self._vertices)

    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        xy = _read_positions("xy_cm", xy_cm)
        ix = self._axis_index(xy[:, 0], self.x_edges_cm)
        iy = self._axis_index(xy[:, 1], self.y_edges_cm)
        inside = (ix >= 0) & (iy >= 0)
        flat = np.where(inside, iy * self._nx + ix, -1)
        flat[inside] = np.where(self.valid_mask[flat[inside]], flat[inside], -1)
        return flat

    @staticmethod
    def _axis_index(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
        # Same rule as numpy.histogram2d: half-open bins, the last one closed.
        idx = np.searchsorted(edges, values, side="right").astype(np.int64) - 1
        idx[values == edges[-1]] = len(edges) - 2
        idx[~((idx >= 0) & (idx < len(edges) - 1)) | ~np.isfinite(values)] = -1
        return idx

    def distance_cm(self, a_xy_cm: np.ndarray, b_xy_cm: np.ndarray) -> np.ndarray:
        a, b = self._pair_positions(a_xy_cm, b_xy_cm)
        return np.hypot(a[:, 0] - b[:, 0], a[:, 1] - b[:, 1])

    def outline_cm(self) -> np.ndarray:
        """Boundary of the shape as a closed ring, shape (m + 1, 2), last row = first row."""
        if self.shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            angle = np.linspace(0.0, 2 * np.pi, _CIRCLE_OUTLINE_POINTS + 1)
            ring = np.column_stack([cx + r * np.cos(angle), cy + r * np.sin(angle)])
            ring[-1] = ring[0]
            return ring
        return np.vstack([self._vertices, self._vertices[:1]])

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"kind": "Arena", "shape": self.shape, "bin_cm": self.bin_cm}
        for key, value in self._geometry.items():
            if key == "vertices_cm":
                out[key] = [list(v) for v in value]
            elif isinstance(value, tuple):
                out[key] = list(value)
            else:
                out[key] = value
        return out

    def _smooth_masked(
        self, values: np.ndarray, mask_f: np.ndarray, sigma_cm: float
    ) -> tuple[np.ndarray, np.ndarray]:
        sigma_bins = sigma_cm / self.bin_cm
        k = len(values)

        def blur(grid: np.ndarray) -> np.ndarray:
            for axis in (-2, -1):
                grid = ndimage.gaussian_filter1d(grid, sigma_bins, axis=axis, mode="constant", truncate=4.0)
            return grid

        num = blur(values.reshape(k, self._ny, self._nx)).reshape(k, self.n_bins)
        den = blur(mask_f.reshape(self._ny, self._nx)).reshape(self.n_bins)
        return num, den


class TrackGraph(Environment):
    """A maze of straight track segments joined at nodes.

    Each edge ``(i, j)`` runs from node ``i`` to node ``j`` and is cut into
    ``ceil(length / bin_cm)`` equal bins; bins are numbered edge by edge, in
    the order the edges are given, from each edge's first node. The linear
    position is cm along the edges laid end to end in that order. A tracked
    position is projected onto the nearest edge; one farther than
    ``max_distance_cm`` from every edge is off the track.

    Distances follow the track: between two points the shortest way along
    edges, through nodes, found from node-to-node shortest paths.

    Parameters
    ----------
    nodes_cm : array_like of float64, shape (n_nodes, 2)
    edges : sequence of (int, int)
        Pairs of node indices; each pair at most once, in either direction.
        The graph must be connected.
    bin_cm : float
        Target bin length; the actual length on an edge is
        ``length / ceil(length / bin_cm)``, at most ``bin_cm``.
    max_distance_cm : float, default 10.0
        How far from the centre line a tracked position may be and still be
        on the track; about the width of a typical rodent track plus
        tracker jitter (common practice).

    Attributes
    ----------
    edge_lengths_cm : ndarray of float64, shape (n_edges,)
    linear_edges_cm : ndarray of float64, shape (n_bins + 1,)
        Bin boundaries in linear position, usable as ``numpy.histogram``
        bins of :meth:`linearize` output.
    bin_lengths_cm : ndarray of float64, shape (n_bins,)
    total_length_cm : float

    Examples
    --------
    A T-maze: a 60 cm stem from (0, 0) up to a junction, 40 cm arms left and right.

    >>> maze = TrackGraph([[0, 0], [0, 60], [-40, 60], [40, 60]], [(0, 1), (1, 2), (1, 3)], bin_cm=5)
    >>> maze.n_bins
    28
    >>> maze.distance_cm([[0.0, 20.0]], [[-30.0, 60.0]]).tolist()
    [70.0]
    """

    ndim_spatial: ClassVar[int] = 1

    def __init__(self, nodes_cm: Any, edges: Any, bin_cm: float, max_distance_cm: float = 10.0) -> None:
        nodes = np.asarray(nodes_cm, dtype=np.float64) if _is_numeric(nodes_cm) else None
        if nodes is None or nodes.ndim != 2 or nodes.shape[1] != 2 or len(nodes) < 2:
            raise ValueError("nodes_cm must be a finite array of shape (n_nodes, 2) with at least two nodes")
        if not np.all(np.isfinite(nodes)):
            raise ValueError("nodes_cm must be a finite array of shape (n_nodes, 2) with at least two nodes")
        self.nodes_cm = _freeze(nodes.copy())
        self.edges = self._read_edges(edges, len(nodes))
        self.bin_cm = _positive_length("bin_cm", bin_cm)
        self.max_distance_cm = _positive_length("max_distance_cm", max_distance_cm)

        ends = np.array(self.edges, dtype=np.int64)
        self._start, self._stop = nodes[ends[:, 0]], nodes[ends[:, 1]]
        self.edge_lengths_cm = _freeze(np.hypot(*(self._stop - self._start).T))
        short = np.flatnonzero(self.edge_lengths_cm == 0)
        if short.size:
            i, j = self.edges[short[0]]
            raise ValueError(f"edge ({i}, {j}) has zero length: nodes {i} and {j} are at the same place")
        self._ends = ends
        self._edge_bins = np.array([_whole_bins(L, self.bin_cm) for L in self.edge_lengths_cm], dtype=np.int64)
        self.n_bins = int(self._edge_bins.sum())
        if self.n_bins > MAX_BINS:
            raise ValueError(
                f"bin_cm={self.bin_cm} gives {self.n_bins} bins, more than {MAX_BINS}; use a larger bin_cm"
            )
        self._edge_first_bin = np.concatenate([[0], np.cumsum(self._edge_bins)[:-1]])
        self._edge_start_cm = np.concatenate([[0.0], np.cumsum(self.edge_lengths_cm)[:-1]])
        self.total_length_cm = float(self.edge_lengths_cm.sum())

        n_nodes = len(nodes)
        both_ways = np.vstack([ends, ends[:, ::-1]])
        adjacency = csr_array(
            (np.tile(self.edge_lengths_cm, 2), (both_ways[:, 0], both_ways[:, 1])), shape=(n_nodes, n_nodes)
        )
        n_parts, labels = connected_components(adjacency, directed=False)
        if n_parts > 1:
            apart = np.flatnonzero(labels != labels[0]).tolist()
            raise ValueError(f"the track graph must be connected; nodes {apart} cannot be reached from node 0")
        self._node_distance_cm = shortest_path(adjacency, method="D", directed=False)

        self._bin_edge = np.repeat(np.arange(len(ends)), self._edge_bins)
        k_on_edge = np.arange(self.n_bins) - self._edge_first_bin[self._bin_edge]
        step = self.edge_lengths_cm / self._edge_bins
        self.bin_lengths_cm = _freeze(step[self._bin_edge])
        self._bin_s_cm = (k_on_edge + 0.5) * self.bin_lengths_cm
        frac = (self._bin_s_cm / self.edge_lengths_cm[self._bin_edge])[:, np.newaxis]
        direction = (self._stop - self._start)[self._bin_edge]
        self.bin_centers_cm = _freeze(self._start[self._bin_edge] + frac * direction)
        self.linear_edges_cm = _freeze(
            np.concatenate(
                [self._edge_start_cm[e] + step[e] * np.arange(self._edge_bins[e]) for e in range(len(ends))]
                + [[self.total_length_cm]]
            )
        )
        self.valid_mask = _freeze(np.ones(self.n_bins, dtype=bool))
        self.bin_size = self.total_length_cm / self.n_bins
        self._distance_matrix: np.ndarray | None = None
        self._kernel: tuple[float, np.ndarray] | None = None
        logger.debug("track graph: %d nodes, %d edges, %d bins", n_nodes, len(ends), self.n_bins)

    @staticmethod
    def _read_edges(edges: Any, n_nodes: int) -> tuple[tuple[int, int], ...]:
        try:
            pairs = [tuple(e) for e in edges]
        except TypeError:
            raise ValueError("edges must be a sequence of (i, j) node-index pairs") from None
        if not pairs:
            raise ValueError("edges is empty; a track graph needs at least one edge")
        out: list[tuple[int, int]] = []
        seen: set[frozenset[int]] = set()
        for pair in pairs:
            if len(pair) != 2 or not all(
                isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in pair
            ):
                raise ValueError(f"each edge must be a pair of node indices, got {pair!r}")
            i, j = int(pair[0]), int(pair[1])
            if not (0 <= i < n_nodes and 0 <= j < n_nodes):
                raise ValueError(f"edge ({i}, {j}) names a node outside 0..{n_nodes - 1}")
            if i == j:
                raise ValueError(f"edge ({i}, {j}) joins a node to itself and has zero length")
            if frozenset((i, j)) in seen:
                raise ValueError(f"edge ({i}, {j}) is given twice; give each edge once")
            seen.add(frozenset((i, j)))
            out.append((i, j))
        return tuple(out)

    def _project(self, xy_cm: Any, name: str = "xy_cm") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Nearest edge, cm along it from its first node, and whether on the track."""
        xy = _read_positions(name, xy_cm)
        d = self._stop - self._start
        rel = xy[:, np.newaxis, :] - self._start[np.newaxis]
        length = self.edge_lengths_cm
        with np.errstate(invalid="ignore"):
            s = np.clip(np.einsum("nek,ek->ne", rel, d) / length, 0.0, length)
            gap = rel - (s / length)[..., np.newaxis] * d
            dist2 = np.einsum("nek,nek->ne", gap, gap)
        finite = np.all(np.isfinite(xy), axis=1)
        dist2[~finite] = np.inf
        edge = np.argmin(dist2, axis=1)
        rows = np.arange(len(xy))
        on_track = finite & (dist2[rows, edge] <= self.max_distance_cm**2)
        s_cm = np.where(on_track, s[rows, edge], np.nan)
        return edge, s_cm, on_track

    def linearize(self, xy_cm: np.ndarray) -> np.ndarray:
        """Position along the edges laid end to end, in cm.

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of float64, shape (n,)
            NaN for lost positions and positions off the track.
        """
        edge, s_cm, on_track = self._project(xy_cm)
        return np.where(on_track, self._edge_start_cm[edge] + s_cm, np.nan)

    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        edge, s_cm, on_track = self._project(xy_cm)
        linear = np.where(on_track, self._edge_start_cm[edge] + s_cm, 0.0)
        idx = np.searchsorted(self.linear_edges_cm, linear, side="right").astype(np.int64) - 1
        # A point at an edge's last node belongs to that edge's last bin,
        # not to the first bin of the next edge in the ordering.
        first = self._edge_first_bin[edge]
        idx = np.clip(idx, first, first + self._edge_bins[edge] - 1)
        return np.where(on_track, idx, -1)

    def _along_graph_cm(self, e_a: np.ndarray, s_a: np.ndarray, e_b: np.ndarray, s_b: np.ndarray) -> np.ndarray:
        """Shortest along-track distance between (edge, cm along edge) pairs; broadcasts."""
        length_a, length_b = self.edge_lengths_cm[e_a], self.edge_lengths_cm[e_b]
        best = np.where(e_a == e_b, np.abs(s_a - s_b), np.inf)
        for end_a, to_end_a in ((0, s_a), (1, length_a - s_a)):
            node_a = self._ends[e_a, end_a]
            for end_b, to_end_b in ((0, s_b), (1, length_b - s_b)):
                node_b = self._ends[e_b, end_b]
                best = np.minimum(best, to_end_a + self._node_distance_cm[node_a, node_b] + to_end_b)
        return best

    def distance_cm(self, a_xy_cm: np.ndarray, b_xy_cm: np.ndarray) -> np.ndarray:
        a, b = self._pair_positions(a_xy_cm, b_xy_cm)
        e_a, s_a, ok_a = self._project(a, "a_xy_cm")
        e_b, s_b, ok_b = self._project(b, "b_xy_cm")
        ok = ok_a & ok_b
        out = np.full(len(a), np.nan)
        out[ok] = self._along_graph_cm(e_a[ok], s_a[ok], e_b[ok], s_b[ok])
        return out

    def bin_distance_matrix_cm(self) -> np.ndarray:
        """Along-track distance between every pair of bin centres, shape (n_bins, n_bins).

        Computed once and kept; the returned array is read-only.
        """
        if self._distance_matrix is None:
            e, s = self._bin_edge, self._bin_s_cm
            matrix = self._along_graph_cm(e[:, np.newaxis], s[:, np.newaxis], e[np.newaxis], s[np.newaxis])
            self._distance_matrix = _freeze(matrix)
        return self._distance_matrix

    def outline_cm(self) -> list[np.ndarray]:
        """One segment per edge, each of shape (2, 2): first node, second node."""
        return [np.array([self._start[e], self._stop[e]]) for e in range(len(self.edges))]

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": "TrackGraph",
            "nodes_cm": self.nodes_cm.tolist(),
            "edges": [list(e) for e in self.edges],
            "bin_cm": self.bin_cm,
            "max_distance_cm": self.max_distance_cm,
        }

    def _smooth_masked(
        self, values: np.ndarray, mask_f: np.ndarray, sigma_cm: float
    ) -> tuple[np.ndarray, np.ndarray]:
        if self._kernel is None or self._kernel[0] != sigma_cm:
            d = self.bin_distance_matrix_cm()
            self._kernel = (sigma_cm, np.exp(-0.5 * (d / sigma_cm) ** 2))
        kernel = self._kernel[1]
        return values @ kernel, mask_f @ kernel


class LinearTrack(TrackGraph):
    """A straight track from ``start_cm`` to ``end_cm``: a graph with one edge.

    Parameters
    ----------
    start_cm, end_cm : (float, float)
        Ends of the track's centre line; linear position 0 is at ``start_cm``.
    bin_cm : float
    max_distance_cm : float, default 10.0
        See :class:`TrackGraph`.

    Examples
    --------
    >>> track = LinearTrack((0, 0), (150, 0), bin_cm=5)
    >>> track.linearize([[12.0, 3.0], [40.0, 25.0]]).tolist()
    [12.0, nan]
    """

    def __init__(
        self, start_cm: Sequence[float], end_cm: Sequence[float], bin_cm: float, max_distance_cm: float = 10.0
    ) -> None:
        start, end = _point("start_cm", start_cm), _point("end_cm", end_cm)
        if start == end:
            raise ValueError(f"start_cm and end_cm are the same point {start}; the track has zero length")
        super().__init__([start, end], [(0, 1)], bin_cm, max_distance_cm)
        self.start_cm, self.end_cm = start, end

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": "LinearTrack",
            "start_cm": list(self.start_cm),
            "end_cm": list(self.end_cm),
            "bin_cm": self.bin_cm,
            "max_distance_cm": self.max_distance_cm,
        }
