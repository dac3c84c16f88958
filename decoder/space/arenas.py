"""Open-field arenas: a rectangle, circle or polygon covered by a square grid.

An :class:`Arena` flattens its grid row-major, ``bin = iy * nx + ix``; a bin
is valid where its square overlaps the shape. The planar geometry it needs
(point in polygon, simple-polygon check, side against box) lives here too.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np
from scipy import ndimage

from decoder.space.environment_base import (
    MAX_BINS,
    Environment,
    freeze,
    is_numeric,
    positive_length,
    read_point,
    read_positions,
    whole_bins,
)

logger = logging.getLogger(__name__)

#: Largest number of polygon vertices; the simplicity check compares every
#: pair of sides, and a drawn arena outline needs far fewer.
MAX_POLYGON_VERTICES = 1_000

#: Points used to draw a circle's outline.
_CIRCLE_OUTLINE_POINTS = 128


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
    xy = read_positions("xy_cm", xy_cm)
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
        self.bin_cm = positive_length("bin_cm", bin_cm)
        self._geometry = self._read_geometry(shape, geometry)
        if shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            self._vertices = None
            lo, hi = np.array([cx - r, cy - r]), np.array([cx + r, cy + r])
        else:
            self._vertices = self._polygon_vertices()
            lo, hi = self._vertices.min(axis=0), self._vertices.max(axis=0)
        nx, ny = whole_bins(hi[0] - lo[0], self.bin_cm), whole_bins(hi[1] - lo[1], self.bin_cm)
        if nx * ny > MAX_BINS:
            raise ValueError(
                f"bin_cm={self.bin_cm} gives a {ny} x {nx} grid ({nx * ny} bins), more than {MAX_BINS}; "
                "use a larger bin_cm"
            )
        self.x_edges_cm = freeze(self._grid_lines(lo[0], hi[0], nx))
        self.y_edges_cm = freeze(self._grid_lines(lo[1], hi[1], ny))
        self._nx, self._ny = nx, ny
        self.n_bins = nx * ny
        xc = 0.5 * (self.x_edges_cm[:-1] + self.x_edges_cm[1:])
        yc = 0.5 * (self.y_edges_cm[:-1] + self.y_edges_cm[1:])
        gx, gy = np.meshgrid(xc, yc)
        self.bin_centers_cm = freeze(np.column_stack([gx.ravel(), gy.ravel()]))
        self.valid_mask = freeze(self._overlapping_bins())
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
                "origin_cm": read_point("origin_cm", geometry["origin_cm"]),
                "width_cm": positive_length("width_cm", geometry["width_cm"]),
                "height_cm": positive_length("height_cm", geometry["height_cm"]),
            }
        if shape == "circle":
            return {
                "center_cm": read_point("center_cm", geometry["center_cm"]),
                "radius_cm": positive_length("radius_cm", geometry["radius_cm"]),
            }
        raw = geometry["vertices_cm"]
        verts = np.asarray(raw, dtype=np.float64) if is_numeric(raw) else None
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
        return freeze(verts)

    def _grid_lines(self, lo: float, hi: float, n: int) -> np.ndarray:
        lines = lo + self.bin_cm * np.arange(n + 1)
        # The slack in whole_bins may leave the last line a hair short of the shape.
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
        xy = read_positions("xy_cm", xy_cm)
        if self.shape == "circle":
            (cx, cy), r = self._geometry["center_cm"], self._geometry["radius_cm"]
            with np.errstate(invalid="ignore"):
                return (xy[:, 0] - cx) ** 2 + (xy[:, 1] - cy) ** 2 <= r * r
        return points_in_polygon(xy, self._vertices)

    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        xy = read_positions("xy_cm", xy_cm)
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

