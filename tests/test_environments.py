"""Tests for decoder.space.environments.

Each check of the science names its source beside the assertion. Positions
are drawn at random only to probe the geometry; no simulated cells are used.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import ndimage
from scipy.sparse import csr_array
from scipy.sparse.csgraph import shortest_path
from scipy.spatial.distance import cdist

from decoder.space.environments import MAX_BINS, Arena, Environment, LinearTrack, TrackGraph, points_in_polygon

RNG_SEED = 20240611

# A non-convex outline (a notched field) with corners off the grid lines.
NOTCHED_CM = np.array([[0.0, 0.0], [50.3, 3.1], [47.7, 40.2], [25.1, 12.6], [3.3, 41.9]])

# T-maze worked by hand below: node 0 at the foot of a 60 cm stem, node 1 the
# junction, nodes 2 and 3 the ends of 40 cm arms to the left and right.
T_NODES_CM = [[0.0, 0.0], [0.0, 60.0], [-40.0, 60.0], [40.0, 60.0]]
T_EDGES = [(0, 1), (1, 2), (1, 3)]

# U-shaped track: down the left side, across the bottom, up the right; the
# two sides are 20 cm apart with a wall between them.
U_NODES_CM = [[0.0, 50.0], [0.0, 0.0], [20.0, 0.0], [20.0, 50.0]]
U_EDGES = [(0, 1), (1, 2), (2, 3)]


@pytest.fixture
def mpl_path():
    return pytest.importorskip("matplotlib.path")


@pytest.fixture
def t_maze() -> TrackGraph:
    return TrackGraph(T_NODES_CM, T_EDGES, bin_cm=5.0, max_distance_cm=8.0)


def _chain_reference_cm(graph: TrackGraph) -> np.ndarray:
    """Bin-centre distances from an independent graph: every bin centre a vertex.

    Vertices are the graph's nodes followed by its bin centres; each edge of
    the maze becomes a chain node -> centre -> ... -> centre -> node, weighted
    by the straight distance between neighbours on the chain.
    """
    n_nodes = len(graph.nodes_cm)
    points = np.vstack([graph.nodes_cm, graph.bin_centers_cm])
    rows, cols = [], []
    first = 0
    for i, j in graph.edges:
        length = math.dist(graph.nodes_cm[i], graph.nodes_cm[j])
        n_edge_bins = math.ceil(length / graph.bin_cm - 1e-9)
        chain = [i] + list(range(n_nodes + first, n_nodes + first + n_edge_bins)) + [j]
        rows += chain[:-1]
        cols += chain[1:]
        first += n_edge_bins
    weights = np.linalg.norm(points[rows] - points[cols], axis=1)
    adjacency = csr_array((weights, (rows, cols)), shape=(len(points), len(points)))
    return shortest_path(adjacency, method="D", directed=False)[n_nodes:, n_nodes:]


# ---------------------------------------------------------------- arena bins


def test_rectangle_grid_matches_histogram2d():
    arena = Arena.rectangle(width_cm=100.0, height_cm=60.0, bin_cm=2.5, origin_cm=(-10.0, 5.0))
    assert arena.grid_shape == (24, 40)
    rng = np.random.default_rng(RNG_SEED)
    xy = rng.uniform([-20.0, -5.0], [100.0, 75.0], size=(20_000, 2))
    # Points exactly on the far walls, on inner grid lines, lost frames.
    xy = np.vstack([xy, [[90.0, 65.0], [-10.0, 5.0], [0.0, 10.0], [np.nan, 20.0], [30.0, np.nan]]])
    bins = arena.bin_index(xy)
    assert bins.dtype == np.int64 and bins.shape == (len(xy),)

    counts = np.bincount(bins[bins >= 0], minlength=arena.n_bins).reshape(arena.grid_shape)
    finite = np.all(np.isfinite(xy), axis=1)
    reference, _, _ = np.histogram2d(xy[finite, 1], xy[finite, 0], bins=[arena.y_edges_cm, arena.x_edges_cm])
    # Reference library: numpy.histogram2d with the same edges (first axis y, so row-major).
    np.testing.assert_array_equal(counts, reference)

    inner = finite & (xy[:, 0] < 90.0) & (xy[:, 1] < 65.0)
    ix = np.digitize(xy[inner, 0], arena.x_edges_cm) - 1
    iy = np.digitize(xy[inner, 1], arena.y_edges_cm) - 1
    inside = (ix >= 0) & (ix < 40) & (iy >= 0) & (iy < 24)
    expected = np.where(inside, iy * 40 + ix, -1)
    # Reference library: numpy.digitize per axis, flattened row-major (bin = iy * nx + ix).
    np.testing.assert_array_equal(bins[inner], expected)
    # Lost frames (NaN) are -1 (DEVELOPERS.md contract).
    assert np.all(bins[~finite] == -1)


def test_bin_centres_are_row_major_and_map_to_themselves():
    arena = Arena.rectangle(30.0, 20.0, bin_cm=5.0)
    ny, nx = arena.grid_shape
    iy, ix = np.divmod(np.arange(arena.n_bins), nx)
    centres = np.column_stack([(ix + 0.5) * 5.0, (iy + 0.5) * 5.0])
    # Common practice: bin centre = midpoint of its edges, bins numbered row-major.
    np.testing.assert_allclose(arena.bin_centers_cm, centres)
    assert np.array_equal(arena.bin_index(arena.bin_centers_cm), np.arange(arena.n_bins))
    assert arena.bin_size == 25.0 and arena.ndim_spatial == 2 and np.all(arena.valid_mask)
    assert arena.bin_index(np.zeros((0, 2))).shape == (0,)


def test_polygon_containment_matches_matplotlib(mpl_path):
    arena = Arena.polygon(NOTCHED_CM, bin_cm=3.0)
    rng = np.random.default_rng(RNG_SEED)
    xy = rng.uniform(-5.0, 55.0, size=(20_000, 2))
    reference = mpl_path.Path(NOTCHED_CM).contains_points(xy)
    # Reference library: matplotlib.path.Path.contains_points on the same outline.
    np.testing.assert_array_equal(arena.contains(xy), reference)
    np.testing.assert_array_equal(points_in_polygon(xy, NOTCHED_CM[::-1]), reference)
    assert Arena.polygon(np.vstack([NOTCHED_CM, NOTCHED_CM[:1]]), bin_cm=3.0) == arena


def test_polygon_valid_bins_are_the_squares_that_overlap_it(mpl_path):
    from matplotlib.transforms import Bbox

    arena = Arena.polygon(NOTCHED_CM, bin_cm=3.0)
    ny, nx = arena.grid_shape
    path = mpl_path.Path(np.vstack([NOTCHED_CM, NOTCHED_CM[:1]]), closed=True)
    shrink = 1e-6
    reference = np.array(
        [
            path.intersects_bbox(
                Bbox(
                    [
                        [arena.x_edges_cm[b % nx] + shrink, arena.y_edges_cm[b // nx] + shrink],
                        [arena.x_edges_cm[b % nx + 1] - shrink, arena.y_edges_cm[b // nx + 1] - shrink],
                    ]
                ),
                filled=True,
            )
            for b in range(arena.n_bins)
        ]
    )
    # Reference library: matplotlib.path.Path.intersects_bbox(filled=True), square by square.
    np.testing.assert_array_equal(arena.valid_mask, reference)
    # The notch leaves whole bins outside the field, and those bins map to -1.
    assert 0 < arena.valid_mask.sum() < arena.n_bins
    outside = arena.bin_centers_cm[~arena.valid_mask]
    assert np.all(arena.bin_index(outside) == -1)


def test_circle_valid_area_is_pi_r_squared_within_the_boundary_band():
    radius, bin_cm = 40.0, 2.5
    arena = Arena.circle(center_cm=(10.0, -5.0), radius_cm=radius, bin_cm=bin_cm)
    area = arena.valid_mask.sum() * arena.bin_size
    # Area of a disk is pi r^2 (elementary geometry). Valid squares cover the
    # disk and each lies within r + bin diagonal of the centre, so the valid
    # area is bounded by the disk and by the disk grown by one diagonal.
    assert math.pi * radius**2 <= area <= math.pi * (radius + math.sqrt(2) * bin_cm) ** 2
    centre_distance = np.hypot(*(arena.bin_centers_cm - [10.0, -5.0]).T)
    # Same geometry: a centre inside the disk means overlap; a valid square's
    # centre is at most half a diagonal outside the rim.
    assert np.all(arena.valid_mask[centre_distance < radius])
    assert np.all(centre_distance[arena.valid_mask] < radius + bin_cm / math.sqrt(2))


def test_wall_hugging_positions_land_in_valid_bins_and_corners_do_not():
    arena = Arena.circle(center_cm=(0.0, 0.0), radius_cm=30.0, bin_cm=4.0)
    angle = np.linspace(0.0, 2 * math.pi, 720, endpoint=False)
    rim = np.column_stack([29.999 * np.cos(angle), 29.999 * np.sin(angle)])
    # Common practice: an animal against the wall is still in the arena.
    assert np.all(arena.bin_index(rim) >= 0)
    corner = np.array([[arena.x_edges_cm[0] + 0.5, arena.y_edges_cm[0] + 0.5]])
    # Geometry: the bounding-box corner square is ~21 cm from the disk, so invalid.
    assert arena.bin_index(corner).tolist() == [-1]
    assert arena.bin_index([[31.0, 31.0], [0.0, 1e6]]).tolist() == [-1, -1]


def test_arena_distance_is_euclidean():
    arena = Arena.rectangle(50.0, 50.0, bin_cm=5.0)
    rng = np.random.default_rng(RNG_SEED)
    a, b = rng.uniform(0, 50, (200, 2)), rng.uniform(0, 50, (200, 2))
    # Reference library: scipy.spatial.distance.cdist (Euclidean), paired rows.
    np.testing.assert_allclose(arena.distance_cm(a, b), np.diag(cdist(a, b)))
    assert np.isnan(arena.distance_cm([[np.nan, 0.0]], [[1.0, 1.0]])[0])
    np.testing.assert_allclose(arena.distance_cm(a, [[0.0, 0.0]]), np.hypot(a[:, 0], a[:, 1]))


def test_arena_outline_closes():
    ring = Arena.circle((0.0, 0.0), 10.0, 1.0).outline_cm()
    assert ring.ndim == 2 and ring.shape[1] == 2 and np.array_equal(ring[0], ring[-1])
    np.testing.assert_allclose(np.hypot(*ring.T), 10.0)
    square = Arena.rectangle(4.0, 3.0, 1.0, origin_cm=(1.0, 2.0)).outline_cm()
    assert square.tolist() == [[1, 2], [5, 2], [5, 5], [1, 5], [1, 2]]


# ----------------------------------------------------------- tracks, graphs


def test_t_maze_worked_by_hand(t_maze):
    # Bins: stem 60/5 = 12, each arm 40/5 = 8 -> 28 bins of 5 cm.
    assert t_maze.n_bins == 28 and t_maze.bin_size == 5.0 and t_maze.grid_shape is None
    stem, left, right = [0.0, 20.0], [-30.0, 60.0], [30.0, 60.0]
    # Linear position: stem 0..60, left arm 60..100, right arm 100..140.
    # (0, 20) -> 20; (-30, 60) -> 60 + 30 = 90; (30, 60) -> 100 + 30 = 130.
    np.testing.assert_allclose(t_maze.linearize([stem, left, right]), [20.0, 90.0, 130.0])
    # Bins: 20 // 5 = 4; 12 + 30 // 5 = 18; 20 + 30 // 5 = 26.
    assert t_maze.bin_index([stem, left, right]).tolist() == [4, 18, 26]
    # Along the maze: stem to left arm = (60 - 20) up the stem + 30 along the arm = 70,
    # left arm to right arm = 30 + 30 = 60 through the junction; stem to itself 0.
    np.testing.assert_allclose(t_maze.distance_cm([stem, left, stem], [left, right, stem]), [70.0, 60.0, 0.0])
    # Straight line stem to left arm is sqrt(30^2 + 40^2) = 50 < 70.
    assert Arena.rectangle(100, 100, 5, origin_cm=(-50, 0)).distance_cm([stem], [left])[0] == pytest.approx(50.0)
    # Bin centres: first stem bin at (0, 2.5), first left-arm bin at (-2.5, 60).
    np.testing.assert_allclose(t_maze.bin_centers_cm[[0, 12, 20]], [[0.0, 2.5], [-2.5, 60.0], [2.5, 60.0]])
    # Centre of bin 0 (2.5 cm up the stem) to centre of bin 12 (2.5 cm into the left arm): 57.5 + 2.5 = 60.
    assert t_maze.bin_distance_matrix_cm()[0, 12] == pytest.approx(60.0)


def test_track_positions_project_onto_the_nearest_edge(t_maze):
    # Common practice: a tracked point is assigned to the foot of its
    # perpendicular on the nearest segment. (3, 20) is 3 cm right of the stem.
    np.testing.assert_allclose(t_maze.linearize([[3.0, 20.0], [-30.0, 66.0]]), [20.0, 90.0])
    # Farther than max_distance_cm (8 cm) from every edge, or lost: off the track.
    off = [[20.0, 20.0], [0.0, -9.0], [np.nan, 3.0]]
    assert np.all(np.isnan(t_maze.linearize(off)))
    assert t_maze.bin_index(off).tolist() == [-1, -1, -1]
    assert np.all(np.isnan(t_maze.distance_cm(off, [[0.0, 30.0]] * 3)))


def test_graph_bins_match_digitize_on_linear_position(t_maze):
    rng = np.random.default_rng(RNG_SEED)
    edge = rng.integers(0, 3, 5_000)
    frac = rng.uniform(0.0, 1.0, 5_000)
    nodes = np.asarray(T_NODES_CM)
    ends = np.asarray(T_EDGES)
    on_track = nodes[ends[edge, 0]] + frac[:, None] * (nodes[ends[edge, 1]] - nodes[ends[edge, 0]])
    linear = t_maze.linearize(on_track)
    expected = np.digitize(linear, t_maze.linear_edges_cm) - 1
    # Reference library: numpy.digitize of the linear position on linear_edges_cm.
    np.testing.assert_array_equal(t_maze.bin_index(on_track), expected)
    counts, _ = np.histogram(linear, bins=t_maze.linear_edges_cm)
    # Reference library: numpy.histogram with the same bin edges.
    np.testing.assert_array_equal(np.bincount(t_maze.bin_index(on_track), minlength=28), counts)


@pytest.mark.parametrize(
    ("nodes_cm", "edges"),
    [
        # A W-maze: four 41.2 cm legs zig-zagging between two rows of nodes.
        ([[0, 0], [10, 40], [20, 0], [30, 40], [40, 0]], [(0, 1), (1, 2), (2, 3), (3, 4)]),
        # A square loop of 50 cm sides with a 30 cm tail: distances may go either way round.
        ([[0, 0], [50, 0], [50, 50], [0, 50], [-30, 0]], [(0, 1), (1, 2), (2, 3), (3, 0), (4, 0)]),
        # The T-maze with its stem given from the junction down.
        ([[0, 0], [0, 60], [-40, 60], [40, 60]], [(1, 0), (2, 1), (1, 3)]),
    ],
)
def test_bin_distances_match_csgraph_on_a_chain_of_bin_centres(nodes_cm, edges):
    graph = TrackGraph(nodes_cm, edges, bin_cm=3.0)
    d = graph.bin_distance_matrix_cm()
    # Reference library: scipy.sparse.csgraph.shortest_path (Dijkstra 1959,
    # Numerische Mathematik 1:269-271) on a graph with every bin centre as a vertex.
    np.testing.assert_allclose(d, _chain_reference_cm(graph), atol=1e-9)
    assert d is graph.bin_distance_matrix_cm() and not d.flags.writeable
    # Metric facts: symmetric, zero on the diagonal.
    np.testing.assert_allclose(d, d.T)
    assert np.all(np.diag(d) == 0)


def test_point_across_a_wall_is_far_along_the_maze():
    u_track = TrackGraph(U_NODES_CM, U_EDGES, bin_cm=2.0, max_distance_cm=8.0)
    left, right = [[0.0, 45.0]], [[20.0, 45.0]]
    # Hand arithmetic: 45 down + 20 across + 45 up = 110 along the track; 20 straight.
    assert u_track.distance_cm(left, right)[0] == pytest.approx(110.0)
    assert Arena.rectangle(20, 50, 2).distance_cm(left, right)[0] == pytest.approx(20.0)
    a, b = u_track.bin_index(left + right)
    straight_cm = np.hypot(*(u_track.bin_centers_cm[a] - u_track.bin_centers_cm[b]))
    assert u_track.bin_distance_matrix_cm()[a, b] > 5 * straight_cm


def test_linear_track_is_a_one_edge_graph():
    track = LinearTrack(start_cm=(10.0, 5.0), end_cm=(160.0, 5.0), bin_cm=4.0)
    # ceil(150 / 4) = 38 bins of 150 / 38 cm.
    assert track.n_bins == 38 and track.ndim_spatial == 1
    assert track.bin_size == pytest.approx(150.0 / 38)
    x = np.array([10.0, 50.0, 159.9, 160.0])
    np.testing.assert_allclose(track.linearize(np.column_stack([x, np.full(4, 7.0)])), x - 10.0)
    assert track.bin_index([[160.0, 5.0], [10.0, 5.0]]).tolist() == [37, 0]
    graph = TrackGraph([[10.0, 5.0], [160.0, 5.0]], [(0, 1)], bin_cm=4.0)
    np.testing.assert_array_equal(track.bin_distance_matrix_cm(), graph.bin_distance_matrix_cm())
    assert [seg.shape for seg in track.outline_cm()] == [(2, 2)]


# ----------------------------------------------------------------- smoothing


def test_arena_smoothing_matches_gaussian_filter_away_from_the_mask_edge():
    arena = Arena.rectangle(120.0, 80.0, bin_cm=2.0)
    ny, nx = arena.grid_shape
    rng = np.random.default_rng(RNG_SEED)
    maps = rng.gamma(2.0, 1.0, size=(3, arena.n_bins))
    mask = np.ones(arena.n_bins, dtype=bool)
    hole = np.zeros((ny, nx), dtype=bool)
    hole[5:9, 40:46] = True
    mask[hole.ravel()] = False
    sigma_cm = 5.0
    smoothed = arena.smooth(maps, mask, sigma_cm)
    sigma_bins = sigma_cm / arena.bin_cm
    radius = int(4.0 * sigma_bins + 0.5)
    # The separable kernel's footprint is a square of half-width `radius` bins.
    square = np.ones((3, 3), dtype=bool)
    near_edge = ndimage.binary_dilation(~mask.reshape(ny, nx), square, iterations=radius, border_value=1)
    far = ~near_edge.ravel()
    assert far.sum() > 500
    for k in range(3):
        reference = ndimage.gaussian_filter(maps[k].reshape(ny, nx), sigma_bins, mode="constant", truncate=4.0)
        # Reference library: scipy.ndimage.gaussian_filter, same sigma in bins,
        # truncate=4.0; far from the mask edge the normaliser G*m is exactly 1.
        np.testing.assert_allclose(smoothed[k, far], reference.ravel()[far], rtol=1e-10)
    # Outside the mask the result is zero (DEVELOPERS.md contract).
    assert np.all(smoothed[:, ~mask] == 0)


def test_smoothing_keeps_a_constant_map_constant_inside_the_mask():
    arena = Arena.polygon(NOTCHED_CM, bin_cm=2.0)
    rng = np.random.default_rng(RNG_SEED)
    mask = arena.valid_mask & (rng.uniform(size=arena.n_bins) < 0.7)
    values = np.where(mask, 3.5, np.nan)
    smoothed = arena.smooth(values, mask, sigma_cm=4.0)
    # Knutsson & Westin (1993, Proc. IEEE CVPR): normalised convolution
    # reproduces a constant signal exactly wherever it is defined.
    np.testing.assert_allclose(smoothed[mask], 3.5, rtol=1e-12)
    assert np.all(smoothed[~mask] == 0)


def test_track_smoothing_matches_normalised_gaussian_filter1d():
    track = LinearTrack((0.0, 0.0), (200.0, 0.0), bin_cm=2.0)
    rng = np.random.default_rng(RNG_SEED)
    values = rng.gamma(2.0, 1.0, size=(2, track.n_bins))
    mask = rng.uniform(size=track.n_bins) < 0.8
    sigma_cm = 6.0
    smoothed = track.smooth(values, mask, sigma_cm)
    sigma_bins = sigma_cm / track.bin_cm
    # truncate wide enough that the sampled kernel spans the whole track, as the graph kernel does.
    wide = track.n_bins / sigma_bins + 1.0
    masked = np.where(mask, values, 0.0)
    num = ndimage.gaussian_filter1d(masked, sigma_bins, axis=1, mode="constant", truncate=wide)
    den = ndimage.gaussian_filter1d(mask.astype(float), sigma_bins, mode="constant", truncate=wide)
    reference = np.where(mask, num / den, 0.0)
    # Reference library: scipy.ndimage.gaussian_filter1d, normalised by the
    # smoothed mask (Knutsson & Westin 1993): on a straight, evenly binned track
    # the along-track kernel exp(-d^2 / 2 sigma^2) is that same sampled Gaussian.
    np.testing.assert_allclose(smoothed, reference, rtol=1e-10, atol=1e-14)


def test_graph_smoothing_does_not_leak_across_a_wall():
    u_track = TrackGraph(U_NODES_CM, U_EDGES, bin_cm=2.0)
    spike = np.zeros(u_track.n_bins)
    a, b = u_track.bin_index([[0.0, 45.0], [20.0, 45.0]])
    spike[a] = 1.0
    smoothed = u_track.smooth(spike, np.ones(u_track.n_bins, dtype=bool), sigma_cm=4.0)
    # Along the track the other side is 110 cm away, 27.5 sigma: its Gaussian
    # weight is exp(-27.5^2 / 2) ~ 1e-164, where the straight 20 cm (5 sigma)
    # would have given exp(-5^2 / 2) ~ 4e-6 (arithmetic).
    assert smoothed[b] < 1e-150 and smoothed[a] > 0.1


@pytest.mark.parametrize("env", [Arena.circle((0, 0), 20, 2.0), LinearTrack((0, 0), (60, 0), 2.0)])
def test_smoothing_never_makes_nan(env):
    values = np.full((2, env.n_bins), np.nan)
    none = np.zeros(env.n_bins, dtype=bool)
    out = env.smooth(values, none, sigma_cm=5.0)
    # DEVELOPERS.md contract: zero outside the mask, never NaN, even with no mask at all.
    assert np.all(out == 0)
    isolated = np.zeros(env.n_bins, dtype=bool)
    isolated[:: 7] = True
    values[:, isolated] = 2.0
    for sigma_cm in (0.0, 1e-3, 0.5, 5.0, 500.0):
        out = env.smooth(values, isolated, sigma_cm)
        assert np.all(np.isfinite(out))
        # Normalised convolution (Knutsson & Westin 1993) keeps the constant 2 on isolated bins.
        np.testing.assert_allclose(out[:, isolated], 2.0, rtol=1e-12)
    one = env.smooth(np.arange(env.n_bins, dtype=float), np.ones(env.n_bins, dtype=bool), 0.0)
    assert one.shape == (env.n_bins,) and np.array_equal(one, np.arange(env.n_bins))


# --------------------------------------------------------------- round trip


@pytest.mark.parametrize(
    "env",
    [
        Arena.rectangle(100.3, 61.7, bin_cm=2.5, origin_cm=(-3.1, 0.7)),
        Arena.circle((12.25, -4.5), 37.3, bin_cm=3.0),
        Arena.polygon(NOTCHED_CM, bin_cm=1.7),
        LinearTrack((0.1, 0.2), (150.3, 0.2), bin_cm=2.2, max_distance_cm=6.5),
        TrackGraph(T_NODES_CM, T_EDGES, bin_cm=3.3),
    ],
)
def test_to_dict_from_dict_round_trip(env):
    d = env.to_dict()
    rebuilt = Environment.from_dict(json.loads(json.dumps(d)))
    assert type(rebuilt) is type(env) and rebuilt == env and hash(rebuilt) == hash(env)
    assert rebuilt.to_dict() == d
    np.testing.assert_array_equal(rebuilt.bin_centers_cm, env.bin_centers_cm)
    np.testing.assert_array_equal(rebuilt.valid_mask, env.valid_mask)
    assert rebuilt.n_bins == env.n_bins and rebuilt.bin_size == env.bin_size
    assert env != Arena.rectangle(10, 10, 1)


# ------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: Arena.rectangle(100, 60, bin_cm=0), "bin_cm must be a positive"),
        (lambda: Arena.rectangle(100, 60, bin_cm=-2.5), "bin_cm must be a positive"),
        (lambda: Arena.rectangle(100, 60, bin_cm=float("nan")), "bin_cm must be a positive"),
        (lambda: Arena.rectangle(0, 60, bin_cm=2), "width_cm must be a positive"),
        (lambda: Arena.rectangle(10, 10, bin_cm=2, origin_cm=(0, "a")), "origin_cm must be a finite"),
        (lambda: Arena.circle((0, 0), -5, 2), "radius_cm must be a positive"),
        (lambda: Arena.circle((0, np.nan), 5, 2), "center_cm must be a finite"),
        (lambda: Arena.polygon([[0, 0], [1, 1]], 1), "3 to 1000 distinct vertices"),
        (lambda: Arena.polygon([[0, 0], [1, 1], [2, 2]], 1), "collinear and enclose no area"),
        (lambda: Arena.polygon([[0, 0], [10, 10], [10, 0], [0, 10]], 1), "not a simple polygon"),
        (lambda: Arena.polygon([[0, 0], [10, 0], [10, 0], [0, 10]], 1), "repeats a vertex"),
        (lambda: Arena.polygon([[0, 0], [10, 0], [5, 0], [5, 10]], 1), "doubles back"),
        (lambda: Arena.polygon([[0, 0], [np.inf, 0], [0, 1]], 1), "vertices_cm must be a finite"),
        (lambda: Arena("hexagon", 2.0), "shape must be one of"),
        (lambda: Arena("circle", 2.0, center_cm=(0, 0)), "needs exactly"),
        (lambda: Arena.rectangle(1000, 1000, bin_cm=0.5), f"more than {MAX_BINS}"),
        (lambda: TrackGraph([[0, 0], [0, 0], [5, 5]], [(0, 1), (1, 2)], 1), r"edge \(0, 1\) has zero length"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(1, 1)], 1), "joins a node to itself"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(0, 2)], 1), "outside 0..1"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(0, 1), (1, 0)], 1), "given twice"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [], 1), "edges is empty"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(0, 1.5)], 1), "pair of node indices"),
        (
            lambda: TrackGraph([[0, 0], [5, 5], [9, 9], [9, 0]], [(0, 1), (2, 3)], 1),
            r"nodes \[2, 3\] cannot be reached",
        ),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(0, 1)], 0), "bin_cm must be a positive"),
        (lambda: TrackGraph([[0, 0], [5, 5]], [(0, 1)], 1, max_distance_cm=0), "max_distance_cm must be"),
        (lambda: LinearTrack((1, 1), (1, 1), 1), "zero length"),
        (lambda: Environment.from_dict({"kind": "Maze"}), "unknown environment kind"),
        (lambda: Environment.from_dict({"kind": "LinearTrack", "start_cm": [0, 0]}), "missing entries"),
        (
            lambda: Environment.from_dict(
                {"kind": "TrackGraph", "nodes_cm": [[0, 0], [1, 0]], "edges": [[0, 1]], "bin_cm": 1, "size": 3}
            ),
            "unknown entries",
        ),
        (lambda: TrackGraph([[0, 0], [np.nan, 5]], [(0, 1)], 1), "nodes_cm must be a finite"),
        (lambda: Environment.from_dict([("kind", "Arena")]), "mapping with a 'kind'"),
    ],
)
def test_bad_settings_raise_a_clear_value_error(build, message):
    with pytest.raises(ValueError, match=message):
        build()


def test_bad_queries_raise_a_clear_error(t_maze):
    arena = Arena.rectangle(20, 20, 2)
    with pytest.raises(ValueError, match=r"shape \(n, 2\), got \(4, 3\)"):
        arena.bin_index(np.zeros((4, 3)))
    with pytest.raises(ValueError, match="give equal numbers or one"):
        t_maze.distance_cm(np.zeros((3, 2)), np.zeros((2, 2)))
    with pytest.raises(ValueError, match=r"values must have shape \(k, 100\)"):
        arena.smooth(np.zeros((2, 99)), np.ones(100, dtype=bool), 2.0)
    with pytest.raises(ValueError, match="mask must be a boolean array"):
        arena.smooth(np.zeros(100), np.ones(100), 2.0)
    with pytest.raises(ValueError, match="sigma_cm must be zero or a positive"):
        arena.smooth(np.zeros(100), np.ones(100, dtype=bool), -1.0)
    with pytest.raises(ValueError, match="NaN or infinite value inside the mask"):
        arena.smooth(np.full(100, np.nan), np.ones(100, dtype=bool), 2.0)
    with pytest.raises(NotImplementedError, match="no bin distance matrix"):
        arena.bin_distance_matrix_cm()
    with pytest.raises(NotImplementedError, match="no linear position"):
        arena.linearize(np.zeros((1, 2)))
