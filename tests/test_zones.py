"""Tests for decoder.space.zones.

Geometry is checked against matplotlib's point-in-polygon (a reference
library) and against closed-form areas; the random points below are test
probes, not simulated data.
"""

import json
import math

import numpy as np
import pytest
from matplotlib.path import Path

from decoder.space.environments import Arena, LinearTrack, TrackGraph
from decoder.space.zones import (
    CircleZone,
    IntervalZone,
    PolygonZone,
    RectangleZone,
    zone_from_dict,
    zone_masks,
)

# A concave, arrow-like outline with a notch, so that a ray from a point can
# cross the boundary up to four times.
NOTCHED = [(10.0, 10.0), (90.0, 10.0), (90.0, 80.0), (50.0, 40.0), (10.0, 80.0), (30.0, 45.0)]


def test_polygon_contains_matches_matplotlib():
    rng = np.random.default_rng(7)
    probes = rng.uniform(0.0, 100.0, size=(5000, 2))
    zone = PolygonZone("notch", NOTCHED)
    expected = Path(np.array(NOTCHED)).contains_points(probes)
    # Reference library: matplotlib.path.Path.contains_points. Random probes
    # land on an edge with probability zero, where the two may differ.
    np.testing.assert_array_equal(zone.contains(probes), expected)


def test_polygon_orientation_does_not_matter():
    rng = np.random.default_rng(8)
    probes = rng.uniform(0.0, 100.0, size=(2000, 2))
    forward = PolygonZone("a", NOTCHED).contains(probes)
    backward = PolygonZone("b", NOTCHED[::-1]).contains(probes)
    # Common practice: the even-odd rule counts crossings, so vertex order is irrelevant.
    np.testing.assert_array_equal(forward, backward)


@pytest.mark.parametrize("bin_cm", [1.0, 2.5, 4.0])
def test_circle_bin_mask_area_matches_pi_r_squared(bin_cm):
    arena = Arena.rectangle(120.0, 120.0, bin_cm=bin_cm)
    radius = 25.0
    zone = CircleZone("goal", center_cm=(60.0, 55.0), radius_cm=radius)
    area = zone.bin_mask(arena).sum() * arena.bin_size
    half_diagonal = bin_cm * math.sqrt(2.0) / 2.0
    # Area of a disc, pi r^2. Every square bin whose centre is in the disc
    # lies within r + h of the centre, and the disc of radius r - h is covered
    # by such bins (h = half the bin diagonal), so the binned area is bounded
    # by the two discs (common practice, as in the Gauss circle problem).
    assert math.pi * (radius - half_diagonal) ** 2 <= area <= math.pi * (radius + half_diagonal) ** 2
    # The binned area converges to pi r^2 as bins shrink; at these sizes it is
    # within 5 % (pi r^2 = 1963.5 cm^2; value worked by hand).
    assert area == pytest.approx(math.pi * radius**2, rel=0.05)


def test_rectangle_bin_mask_on_bin_edges_has_exact_area():
    arena = Arena.rectangle(100.0, 60.0, bin_cm=5.0)
    zone = RectangleZone("corner", x_min_cm=10.0, x_max_cm=30.0, y_min_cm=20.0, y_max_cm=45.0)
    mask = zone.bin_mask(arena)
    # Area of a rectangle (20 cm x 25 cm = 500 cm^2) when its sides fall on bin edges: bins are whole.
    assert mask.sum() * arena.bin_size == pytest.approx(20.0 * 25.0)
    # Row-major bin order, bin = iy * nx + ix (DEVELOPERS.md contract): x bins 2..5, y bins 4..8.
    ny, nx = arena.grid_shape
    iy, ix = np.divmod(np.flatnonzero(mask), nx)
    assert set(ix.tolist()) == {2, 3, 4, 5}
    assert set(iy.tolist()) == {4, 5, 6, 7, 8}


def test_bin_mask_is_restricted_to_valid_bins():
    arena = Arena.circle(center_cm=(50.0, 50.0), radius_cm=40.0, bin_cm=5.0)
    everything = RectangleZone("all", -10.0, 110.0, -10.0, 110.0)
    np.testing.assert_array_equal(everything.bin_mask(arena), arena.valid_mask)


def test_interval_zone_on_linear_track():
    track = LinearTrack((0.0, 0.0), (150.0, 0.0), bin_cm=5.0)
    zone = IntervalZone("reward_end", start_cm=120.0, end_cm=150.0)
    mask = zone.bin_mask(track)
    # Length of an interval (30 cm) when its ends fall on bin edges: 6 whole 5-cm bins.
    assert mask.sum() * track.bin_size == pytest.approx(30.0)
    probes = np.array([[125.0, 2.0], [119.0, 0.0], [150.0, 0.0], [130.0, 40.0], [np.nan, 0.0]])
    # Closed interval; a point 40 cm off the track cannot be linearised (max_distance_cm = 10).
    np.testing.assert_array_equal(zone.contains(probes, track), [True, False, True, False, False])


def test_interval_zone_on_track_graph_follows_linear_position():
    # A T-maze: stem 0 -> 1 (60 cm), left arm 1 -> 2 (40 cm), right arm 1 -> 3 (40 cm).
    maze = TrackGraph([(50.0, 0.0), (50.0, 60.0), (10.0, 60.0), (90.0, 60.0)], [(0, 1), (1, 2), (1, 3)], bin_cm=5.0)
    left_arm = IntervalZone("left_arm", start_cm=60.0, end_cm=100.0)
    probes = np.array([[20.0, 61.0], [80.0, 60.0], [50.0, 30.0]])
    # Edges laid end to end: the left arm is linear 60..100 cm, the right arm 100..140 cm (worked by hand).
    np.testing.assert_array_equal(left_arm.contains(probes, maze), [True, False, False])


@pytest.mark.parametrize(
    "zone",
    [
        CircleZone("c", (0.0, 0.0), 5.0),
        RectangleZone("r", -1.0, 1.0, -1.0, 1.0),
        PolygonZone("p", [(-1.0, -1.0), (1.0, -1.0), (0.0, 1.0)]),
    ],
)
def test_lost_positions_are_never_inside(zone):
    probes = np.array([[0.0, 0.0], [np.nan, 0.0], [0.0, np.nan], [np.nan, np.nan]])
    np.testing.assert_array_equal(zone.contains(probes), [True, False, False, False])


def test_boundaries_are_closed():
    circle = CircleZone("c", (10.0, 10.0), 4.0)
    rect = RectangleZone("r", 0.0, 2.0, 0.0, 3.0)
    # Documented convention of decoder.space.zones (not a published fact): edges are inside.
    assert circle.contains(np.array([[14.0, 10.0], [10.0, 6.0]])).all()
    assert rect.contains(np.array([[0.0, 0.0], [2.0, 3.0], [1.0, 3.0]])).all()


@pytest.mark.parametrize(
    "zone",
    [
        CircleZone("c", (3.0, -4.5), 2.5),
        RectangleZone("r", 0.0, 20.0, 5.0, 15.0),
        PolygonZone("p", NOTCHED),
        IntervalZone("i", 12.5, 40.0),
    ],
)
def test_to_dict_round_trip(zone):
    d = json.loads(json.dumps(zone.to_dict()))
    assert zone_from_dict(d) == zone


def test_zone_masks_stack_in_order():
    arena = Arena.rectangle(100.0, 100.0, bin_cm=10.0)
    zones = [CircleZone("a", (25.0, 25.0), 10.0), RectangleZone("b", 50.0, 100.0, 50.0, 100.0)]
    masks = zone_masks(zones, arena)
    assert masks.shape == (2, arena.n_bins)
    np.testing.assert_array_equal(masks[1], zones[1].bin_mask(arena))
    with pytest.raises(ValueError, match="unique.*a"):
        zone_masks([zones[0], CircleZone("a", (75.0, 75.0), 10.0)], arena)


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda: CircleZone("c", (0, 0), -1.0), "radius_cm must be positive"),
        (lambda: CircleZone("c", (0, 0), 0.0), "radius_cm must be positive"),
        (lambda: CircleZone("c", (0, np.nan), 1.0), "center_cm"),
        (lambda: CircleZone("", (0, 0), 1.0), "non-empty name"),
        (lambda: RectangleZone("r", 5.0, 5.0, 0.0, 1.0), "x_min_cm .* less than x_max_cm"),
        (lambda: RectangleZone("r", 0.0, 1.0, 3.0, 2.0), "y_min_cm .* less than y_max_cm"),
        (lambda: PolygonZone("p", [(0, 0), (1, 1)]), "at least 3 vertices"),
        (lambda: PolygonZone("p", [(0, 0), (1, 1), (2, 2)]), "zero area"),
        (lambda: IntervalZone("i", 10.0, 10.0), "start_cm .* less than end_cm"),
        (lambda: zone_from_dict({"kind": "ellipse", "name": "e"}), "kind must be one of"),
        (lambda: zone_from_dict({"kind": "circle", "name": "c", "radius_cm": 1.0}), "missing center_cm"),
        (
            lambda: zone_from_dict({"kind": "circle", "name": "c", "center_cm": [0, 0], "radius_cm": 1, "radius": 2}),
            "unexpected field.*radius",
        ),
    ],
)
def test_bad_zones_say_what_is_wrong(make, message):
    with pytest.raises(ValueError, match=message):
        make()


def test_zone_outside_the_environment_is_an_error_naming_it():
    arena = Arena.rectangle(50.0, 50.0, bin_cm=5.0)
    with pytest.raises(ValueError, match="'far_away' contains no valid bin"):
        CircleZone("far_away", (500.0, 500.0), 10.0).bin_mask(arena)


def test_interval_zone_needs_a_track():
    zone = IntervalZone("i", 0.0, 10.0)
    with pytest.raises(ValueError, match="needs the linear track"):
        zone.contains(np.zeros((1, 2)))
    with pytest.raises(ValueError, match="needs the linear track"):
        zone.bin_mask(Arena.rectangle(50.0, 50.0, bin_cm=5.0))


def test_positions_must_be_pairs():
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        CircleZone("c", (0, 0), 1.0).contains(np.zeros(3))


@pytest.mark.parametrize(
    "zone",
    [
        CircleZone("disc", (40.0, 60.0), 12.5),
        RectangleZone("box", 10.0, 30.0, 50.0, 95.0),
        PolygonZone("notched", NOTCHED),
    ],
)
def test_contains_point_agrees_with_contains_for_single_points(zone):
    rng = np.random.default_rng(5)
    probes = np.vstack([
        rng.uniform(0.0, 100.0, (400, 2)),
        # On the boundary: closed zones count it as inside (|xy - c| = r; x = x_min).
        [[52.5, 60.0], [10.0, 70.0], [30.0, 95.0]],
        [[np.nan, 50.0], [np.inf, 50.0], [50.0, -np.inf]],
    ])
    expected = zone.contains(probes)
    got = [zone.contains_point(x, y) for x, y in probes]
    # Reference: the array form, whose circle and rectangle rules are the closed-form
    # definitions |xy - c| <= r and x_min <= x <= x_max, y_min <= y <= y_max (common practice).
    assert got == expected.tolist()
    assert all(type(v) is bool for v in got)


def test_contains_point_on_a_track_uses_the_linearised_position():
    track = LinearTrack((0.0, 0.0), (100.0, 0.0), bin_cm=5.0)
    zone = IntervalZone("end", 80.0, 100.0)
    # Linear position along a straight track is the distance from its start (closed-form).
    assert zone.contains_point(90.0, 1.0, track) and not zone.contains_point(20.0, 0.0, track)
    assert not zone.contains_point(float("nan"), 0.0, track)
