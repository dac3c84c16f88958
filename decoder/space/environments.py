"""Spatial environments: where the animal can be and how positions become bins.

Four kinds share one interface (:class:`Environment`):

- :class:`Arena`, an open field (rectangle, circle or polygon) covered by a
  regular square grid whose bins are flattened row-major, ``bin = iy * nx + ix``;
- :class:`TrackGraph`, a maze made of straight track segments joined at nodes
  (T-, Y-, W-shaped and the like), binned along each segment;
- :class:`LinearTrack`, a graph with a single segment;
- :class:`HeadingRing`, head direction binned in degrees around a circle,
  each heading a point on a ring of radius ``180 / pi`` cm so that one cm of
  arc is one degree (:mod:`decoder.space.headings`).

Every environment maps tracked 2-D positions ``(x_cm, y_cm)`` of shape
``(n, 2)`` to flat bin indices (``-1`` where the position is lost, outside, or
off the track), measures distances the way the animal can travel (straight
line in an arena, along the track in a graph), smooths maps over its bins and
serialises to a JSON-friendly dict that rebuilds it exactly.

The kinds live in :mod:`decoder.space.arenas` and
:mod:`decoder.space.track_graphs`, their shared interface and helpers in
:mod:`decoder.space.environment_base`; this module is where they are
imported from, and importing it makes every kind known to
:meth:`Environment.from_dict`.
"""

from decoder.space.arenas import MAX_POLYGON_VERTICES, Arena, points_in_polygon
from decoder.space.environment_base import MAX_BINS, Environment
from decoder.space.headings import RING_RADIUS_CM, HeadingRing
from decoder.space.track_graphs import LinearTrack, TrackGraph

__all__ = [
    "Environment",
    "Arena",
    "TrackGraph",
    "LinearTrack",
    "HeadingRing",
    "RING_RADIUS_CM",
    "MAX_BINS",
    "MAX_POLYGON_VERTICES",
    "points_in_polygon",
]
