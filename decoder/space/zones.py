"""Target zones: the places where a decoded or tracked position counts as "in".

A zone is a named region in the arena's frame (a circle, a rectangle, a
polygon), on a linear track or track graph an interval of linear position,
or on a heading ring an arc of headings (:class:`ArcZone`).
Each zone answers two questions:

* ``contains(xy_cm)`` -- which of these positions are inside? Used on the
  tracked position at every decoding step.
* ``bin_mask(environment)`` -- which bins of the environment are inside? Used
  once, when the decoder is built, to sum the posterior mass in the zone.

Boundaries are closed: a point on the edge of a circle, rectangle or interval
is inside. A NaN position (a lost tracker frame) is never inside any zone.

Zones are frozen dataclasses and round-trip through plain dictionaries
(``to_dict`` / ``zone_from_dict``), which is how experiment configs hold them.

Examples
--------
>>> import numpy as np
>>> zone = CircleZone("reward_west", center_cm=(20.0, 50.0), radius_cm=8.0)
>>> zone.contains(np.array([[20.0, 55.0], [40.0, 50.0], [np.nan, np.nan]]))
array([ True, False, False])
>>> zone_from_dict(zone.to_dict()) == zone
True
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from decoder.space.headings import HeadingRing

_POLYGON_CHUNK = 16_384

__all__ = [
    "Zone",
    "CircleZone",
    "RectangleZone",
    "PolygonZone",
    "IntervalZone",
    "ArcZone",
    "zone_from_dict",
    "zone_masks",
]


def _check_name(name: Any) -> str:
    if not isinstance(name, str) or not name.strip():
        raise ValueError(f"a zone needs a non-empty name, got {name!r}")
    return name


def _finite(zone_name: str, field_name: str, value: Any) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"zone {zone_name!r}: {field_name} must be a number, got {value!r}") from None
    if not math.isfinite(out):
        raise ValueError(f"zone {zone_name!r}: {field_name} must be finite, got {value!r}")
    return out


def _point(zone_name: str, field_name: str, value: Any) -> tuple[float, float]:
    arr = np.asarray(value, dtype=np.float64) if not isinstance(value, str) else np.array([])
    if arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise ValueError(f"zone {zone_name!r}: {field_name} must be two finite numbers (x_cm, y_cm), got {value!r}")
    return (float(arr[0]), float(arr[1]))


def _positions(zone_name: str, xy_cm: Any) -> np.ndarray:
    xy = np.asarray(xy_cm, dtype=np.float64)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"zone {zone_name!r}: positions must have shape (n, 2), got {xy.shape}")
    return xy


class Zone:
    """Base class of every zone; use one of the subclasses.

    Subclasses set ``kind`` (the tag written by ``to_dict``) and implement
    ``_contains_finite`` for 2-D zones or override ``contains``.
    """

    kind: ClassVar[str] = ""
    name: str

    def contains(self, xy_cm: np.ndarray, environment: Any = None) -> np.ndarray:
        """Which positions lie in the zone.

        Parameters
        ----------
        xy_cm : ndarray of float64, shape (n, 2)
            Positions in the arena's frame; NaN marks a lost frame.
        environment : Environment, optional
            Ignored by 2-D zones; required by ``IntervalZone``.

        Returns
        -------
        ndarray of bool, shape (n,)
            True where the position is inside (boundary included); False for NaN.
        """
        xy = _positions(self.name, xy_cm)
        inside = np.zeros(xy.shape[0], dtype=bool)
        finite = np.all(np.isfinite(xy), axis=1)
        if np.any(finite):
            inside[finite] = self._contains_finite(xy[finite])
        return inside

    def _contains_finite(self, xy: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def contains_point(self, x_cm: float, y_cm: float, environment: Any = None) -> bool:
        """Whether one position lies in the zone; ``contains`` for a single point.

        Parameters
        ----------
        x_cm, y_cm : float
            The position; NaN for a lost frame (never inside).
        environment : Environment, optional
            As for ``contains``.

        Returns
        -------
        bool
        """
        return bool(self.contains(np.array([[x_cm, y_cm]], dtype=np.float64), environment)[0])

    def bin_mask(self, environment: Any) -> np.ndarray:
        """Bins of ``environment`` whose centres lie in the zone.

        Parameters
        ----------
        environment : Environment
            Supplies ``bin_centers_cm (n_bins, 2)`` and ``valid_mask (n_bins,)``.

        Returns
        -------
        ndarray of bool, shape (n_bins,)
            Restricted to the environment's valid bins.

        Raises
        ------
        ValueError
            If no valid bin has its centre in the zone: the zone would never
            hold any posterior mass, so a rule on it could never fire.
        """
        mask = self.contains(environment.bin_centers_cm, environment) & np.asarray(environment.valid_mask, dtype=bool)
        if not np.any(mask):
            raise ValueError(
                f"zone {self.name!r} contains no valid bin centre of the environment; "
                "enlarge the zone, move it inside the arena or track, or use smaller bins"
            )
        return mask

    def to_dict(self) -> dict:
        """A plain, JSON- and TOML-friendly dictionary; ``zone_from_dict`` inverts it."""
        raise NotImplementedError


@dataclass(frozen=True)
class CircleZone(Zone):
    """A disc in the arena: ``|xy - center_cm| <= radius_cm``.

    Parameters
    ----------
    name : str
    center_cm : (float, float)
    radius_cm : float
        Strictly positive.
    """

    kind: ClassVar[str] = "circle"
    name: str
    center_cm: tuple[float, float]
    radius_cm: float

    def __post_init__(self) -> None:
        name = _check_name(self.name)
        object.__setattr__(self, "center_cm", _point(name, "center_cm", self.center_cm))
        radius = _finite(name, "radius_cm", self.radius_cm)
        if radius <= 0:
            raise ValueError(f"zone {name!r}: radius_cm must be positive, got {self.radius_cm!r}")
        object.__setattr__(self, "radius_cm", radius)

    def _contains_finite(self, xy: np.ndarray) -> np.ndarray:
        dx = xy[:, 0] - self.center_cm[0]
        dy = xy[:, 1] - self.center_cm[1]
        return dx * dx + dy * dy <= self.radius_cm * self.radius_cm

    def contains_point(self, x_cm: float, y_cm: float, environment: Any = None) -> bool:
        # Scalar arithmetic, the same IEEE operations as _contains_finite: the
        # pipeline asks this of the tracked position at every decoding step.
        x, y = float(x_cm), float(y_cm)
        if not (math.isfinite(x) and math.isfinite(y)):
            return False
        dx = x - self.center_cm[0]
        dy = y - self.center_cm[1]
        return dx * dx + dy * dy <= self.radius_cm * self.radius_cm

    def to_dict(self) -> dict:
        return {"kind": self.kind, "name": self.name, "center_cm": list(self.center_cm), "radius_cm": self.radius_cm}


@dataclass(frozen=True)
class RectangleZone(Zone):
    """An axis-aligned rectangle in the arena, edges included.

    Parameters
    ----------
    name : str
    x_min_cm, x_max_cm, y_min_cm, y_max_cm : float
        ``x_min_cm < x_max_cm`` and ``y_min_cm < y_max_cm``.
    """

    kind: ClassVar[str] = "rectangle"
    name: str
    x_min_cm: float
    x_max_cm: float
    y_min_cm: float
    y_max_cm: float

    def __post_init__(self) -> None:
        name = _check_name(self.name)
        for field_name in ("x_min_cm", "x_max_cm", "y_min_cm", "y_max_cm"):
            object.__setattr__(self, field_name, _finite(name, field_name, getattr(self, field_name)))
        if self.x_min_cm >= self.x_max_cm:
            raise ValueError(
                f"zone {name!r}: x_min_cm ({self.x_min_cm}) must be less than x_max_cm ({self.x_max_cm})"
            )
        if self.y_min_cm >= self.y_max_cm:
            raise ValueError(
                f"zone {name!r}: y_min_cm ({self.y_min_cm}) must be less than y_max_cm ({self.y_max_cm})"
            )

    def _contains_finite(self, xy: np.ndarray) -> np.ndarray:
        x, y = xy[:, 0], xy[:, 1]
        return (x >= self.x_min_cm) & (x <= self.x_max_cm) & (y >= self.y_min_cm) & (y <= self.y_max_cm)

    def contains_point(self, x_cm: float, y_cm: float, environment: Any = None) -> bool:
        # Scalar comparisons for the pipeline's per-step question (see CircleZone).
        x, y = float(x_cm), float(y_cm)
        if not (math.isfinite(x) and math.isfinite(y)):
            return False
        return self.x_min_cm <= x <= self.x_max_cm and self.y_min_cm <= y <= self.y_max_cm

    def to_dict(self) -> dict:
        return {
            "kind": self.kind,
            "name": self.name,
            "x_min_cm": self.x_min_cm,
            "x_max_cm": self.x_max_cm,
            "y_min_cm": self.y_min_cm,
            "y_max_cm": self.y_max_cm,
        }


@dataclass(frozen=True)
class PolygonZone(Zone):
    """A simple polygon in the arena, tested by the even-odd (crossing) rule.

    Parameters
    ----------
    name : str
    vertices_cm : sequence of (x_cm, y_cm), at least 3
        In order around the boundary, either direction; the last vertex
        joins the first. The polygon should not cross itself: where it does,
        the even-odd rule leaves the doubly covered parts outside.

    Notes
    -----
    Points exactly on an edge may fall either way (floating point); give the
    zone a margin if that matters.

    References
    ----------
    Shimrat M (1962) Algorithm 112: Position of point relative to polygon.
    Communications of the ACM 5(8):434.
    """

    kind: ClassVar[str] = "polygon"
    name: str
    vertices_cm: tuple[tuple[float, float], ...]

    def __post_init__(self) -> None:
        name = _check_name(self.name)
        try:
            verts = np.asarray(self.vertices_cm, dtype=np.float64)
        except (TypeError, ValueError):
            raise ValueError(f"zone {name!r}: vertices_cm must be a list of (x_cm, y_cm) pairs") from None
        if verts.ndim != 2 or verts.shape[1] != 2:
            raise ValueError(
                f"zone {name!r}: vertices_cm must be a list of (x_cm, y_cm) pairs, got shape {verts.shape}"
            )
        if verts.shape[0] < 3:
            raise ValueError(f"zone {name!r}: a polygon needs at least 3 vertices, got {verts.shape[0]}")
        if not np.all(np.isfinite(verts)):
            raise ValueError(f"zone {name!r}: vertices_cm holds a NaN or infinite coordinate")
        x, y = verts[:, 0], verts[:, 1]
        twice_area = np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))
        if abs(twice_area) <= 1e-12 * max(1.0, float(np.ptp(x) * np.ptp(y))):
            raise ValueError(f"zone {name!r}: the polygon has zero area (its vertices are collinear or repeated)")
        object.__setattr__(self, "vertices_cm", tuple((float(a), float(b)) for a, b in verts))

    def _contains_finite(self, xy: np.ndarray) -> np.ndarray:
        verts = np.asarray(self.vertices_cm)
        x0, y0 = verts[:, 0], verts[:, 1]
        x1, y1 = np.roll(x0, -1), np.roll(y0, -1)
        inside = np.empty(xy.shape[0], dtype=bool)
        # Chunks keep the (points x edges) temporaries small on fine grids.
        for lo in range(0, xy.shape[0], _POLYGON_CHUNK):
            px, py = xy[lo : lo + _POLYGON_CHUNK, 0:1], xy[lo : lo + _POLYGON_CHUNK, 1:2]
            # An edge counts when it straddles the horizontal line through the
            # point (half-open in y, so a vertex on the line is counted once)
            # and crosses that line to the right of the point.
            straddles = (y0 > py) != (y1 > py)
            with np.errstate(divide="ignore", invalid="ignore"):
                x_cross = x0 + (py - y0) * (x1 - x0) / (y1 - y0)
            crossings = straddles & (px < x_cross)
            inside[lo : lo + _POLYGON_CHUNK] = (np.count_nonzero(crossings, axis=1) % 2) == 1
        return inside

    def to_dict(self) -> dict:
        return {"kind": self.kind, "name": self.name, "vertices_cm": [list(v) for v in self.vertices_cm]}


@dataclass(frozen=True)
class IntervalZone(Zone):
    """An interval of linear position on a linear track or track graph.

    Positions are linearised by the environment (cm along the concatenated
    edges, ``environment.linearize``), so the zone needs the environment
    both for ``contains`` and for ``bin_mask``.

    Parameters
    ----------
    name : str
    start_cm, end_cm : float
        Closed interval ``[start_cm, end_cm]`` of linear position, ``start_cm < end_cm``.
    """

    kind: ClassVar[str] = "interval"
    name: str
    start_cm: float
    end_cm: float

    def __post_init__(self) -> None:
        name = _check_name(self.name)
        start = _finite(name, "start_cm", self.start_cm)
        end = _finite(name, "end_cm", self.end_cm)
        if start >= end:
            raise ValueError(f"zone {name!r}: start_cm ({start}) must be less than end_cm ({end})")
        object.__setattr__(self, "start_cm", start)
        object.__setattr__(self, "end_cm", end)

    def contains(self, xy_cm: np.ndarray, environment: Any = None) -> np.ndarray:
        """Which positions lie in the interval, after linearisation.

        Parameters
        ----------
        xy_cm : ndarray of float64, shape (n, 2)
        environment : LinearTrack or TrackGraph
            Required. Positions it cannot place on the track (NaN from
            ``linearize``) are outside.

        Returns
        -------
        ndarray of bool, shape (n,)
        """
        xy = _positions(self.name, xy_cm)
        if environment is None or getattr(environment, "ndim_spatial", 1) != 1:
            raise ValueError(
                f"zone {self.name!r} is an interval of linear position and needs the linear track "
                "or track graph to linearize positions; pass environment=..."
            )
        inside = np.zeros(xy.shape[0], dtype=bool)
        finite = np.all(np.isfinite(xy), axis=1)
        if np.any(finite):
            lin = np.asarray(environment.linearize(xy[finite]), dtype=np.float64)
            with np.errstate(invalid="ignore"):
                inside[finite] = (lin >= self.start_cm) & (lin <= self.end_cm)
        return inside

    def to_dict(self) -> dict:
        return {"kind": self.kind, "name": self.name, "start_cm": self.start_cm, "end_cm": self.end_cm}


@dataclass(frozen=True)
class ArcZone(Zone):
    """An arc of headings on a :class:`~decoder.space.headings.HeadingRing`: ``centre_deg ± half_width_deg``.

    Headings are the directions of ring points from the ring's centre
    (``decoder.space.headings``), so ``contains`` takes the same ``(n, 2)``
    points as every other zone. Both ends are inside.

    Parameters
    ----------
    name : str
    center_deg : float
        Direction of the arc's middle, degrees counter-clockwise from +x;
        any finite value, taken modulo 360.
    half_width_deg : float
        In (0, 180]; 180 is the whole ring.

    Examples
    --------
    >>> from decoder.space.headings import heading_points_cm
    >>> arc = ArcZone("facing_goal", center_deg=350.0, half_width_deg=30.0)
    >>> arc.contains(heading_points_cm(np.radians([10.0, 50.0, np.nan]))).tolist()
    [True, False, False]
    """

    kind: ClassVar[str] = "arc"
    name: str
    center_deg: float
    half_width_deg: float

    def __post_init__(self) -> None:
        name = _check_name(self.name)
        center = _finite(name, "center_deg", self.center_deg) % 360.0
        half = _finite(name, "half_width_deg", self.half_width_deg)
        if not 0.0 < half <= 180.0:
            raise ValueError(f"zone {name!r}: half_width_deg must lie in (0, 180] degrees, got {self.half_width_deg!r}")
        object.__setattr__(self, "center_deg", center)
        object.__setattr__(self, "half_width_deg", half)

    def _contains_finite(self, xy: np.ndarray) -> np.ndarray:
        at_centre = (xy[:, 0] == 0.0) & (xy[:, 1] == 0.0)
        deg = np.degrees(np.arctan2(xy[:, 1], xy[:, 0]))
        off = np.abs(np.mod(deg - self.center_deg + 180.0, 360.0) - 180.0)
        return (off <= self.half_width_deg) & ~at_centre

    def contains_point(self, x_cm: float, y_cm: float, environment: Any = None) -> bool:
        # Scalar arithmetic, the same operations as _contains_finite, for the pipeline's per-step question.
        x, y = float(x_cm), float(y_cm)
        if not (math.isfinite(x) and math.isfinite(y)) or (x == 0.0 and y == 0.0):
            return False
        off = abs((math.degrees(math.atan2(y, x)) - self.center_deg + 180.0) % 360.0 - 180.0)
        return off <= self.half_width_deg

    def bin_mask(self, environment: Any) -> np.ndarray:
        if not isinstance(environment, HeadingRing):
            raise ValueError(
                f"zone {self.name!r} is an arc of headings and needs a heading ring "
                f"([environment] kind = \"heading_ring\"), not a {type(environment).__name__}"
            )
        return super().bin_mask(environment)

    def to_dict(self) -> dict:
        return {"kind": self.kind, "name": self.name, "center_deg": self.center_deg,
                "half_width_deg": self.half_width_deg}


_KINDS: dict[str, type[Zone]] = {
    cls.kind: cls for cls in (CircleZone, RectangleZone, PolygonZone, IntervalZone, ArcZone)
}


def zone_from_dict(d: dict) -> Zone:
    """Build a zone from the dictionary written by its ``to_dict``.

    Parameters
    ----------
    d : dict
        ``{"kind": "circle" | "rectangle" | "polygon" | "interval" | "arc", "name": ..., <fields>}``.

    Returns
    -------
    Zone

    Raises
    ------
    ValueError
        For an unknown kind, a missing field or an unexpected field (usually a typo).
    """
    if not isinstance(d, dict):
        raise ValueError(f"a zone must be described by a table/dictionary, got {type(d).__name__}")
    kind = d.get("kind")
    if kind not in _KINDS:
        raise ValueError(f"zone kind must be one of {sorted(_KINDS)}, got {kind!r}")
    cls = _KINDS[kind]
    fields = [f for f in cls.__dataclass_fields__ if f != "kind"]
    label = d.get("name", "<unnamed>")
    missing = [f for f in fields if f not in d]
    if missing:
        raise ValueError(f"{kind} zone {label!r} is missing {', '.join(missing)}")
    extra = sorted(set(d) - set(fields) - {"kind"})
    if extra:
        raise ValueError(
            f"{kind} zone {label!r} has unexpected field(s) {', '.join(extra)}; expected {', '.join(fields)}"
        )
    return cls(**{f: d[f] for f in fields})


def zone_masks(zones: list[Zone], environment: Any) -> np.ndarray:
    """Stack the bin masks of several zones, in the given order.

    This is the ``zone_masks`` argument of the decoder; the same order is the
    order of its ``zone_mass`` vector and of ``TriggerBank(zone_names=...)``.

    Parameters
    ----------
    zones : list of Zone
        Names must be unique.
    environment : Environment

    Returns
    -------
    ndarray of bool, shape (n_zones, n_bins)
    """
    names = [z.name for z in zones]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"zone names must be unique; repeated: {', '.join(repeated)}")
    n_bins = int(np.asarray(environment.valid_mask).size)
    if not zones:
        return np.zeros((0, n_bins), dtype=bool)
    return np.stack([z.bin_mask(environment) for z in zones])
