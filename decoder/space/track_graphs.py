"""Track graphs: mazes of straight segments joined at nodes, and the linear track.

A :class:`TrackGraph` (T-, Y-, W-shaped and the like) is binned along each
segment and measures distance along the track, through the nodes; a
:class:`LinearTrack` is a graph with a single segment.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from scipy.sparse import csr_array
from scipy.sparse.csgraph import connected_components, shortest_path

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
        nodes = np.asarray(nodes_cm, dtype=np.float64) if is_numeric(nodes_cm) else None
        if nodes is None or nodes.ndim != 2 or nodes.shape[1] != 2 or len(nodes) < 2:
            raise ValueError("nodes_cm must be a finite array of shape (n_nodes, 2) with at least two nodes")
        if not np.all(np.isfinite(nodes)):
            raise ValueError("nodes_cm must be a finite array of shape (n_nodes, 2) with at least two nodes")
        self.nodes_cm = freeze(nodes.copy())
        self.edges = self._read_edges(edges, len(nodes))
        self.bin_cm = positive_length("bin_cm", bin_cm)
        self.max_distance_cm = positive_length("max_distance_cm", max_distance_cm)

        ends = np.array(self.edges, dtype=np.int64)
        self._start, self._stop = nodes[ends[:, 0]], nodes[ends[:, 1]]
        self.edge_lengths_cm = freeze(np.hypot(*(self._stop - self._start).T))
        short = np.flatnonzero(self.edge_lengths_cm == 0)
        if short.size:
            i, j = self.edges[short[0]]
            raise ValueError(f"edge ({i}, {j}) has zero length: nodes {i} and {j} are at the same place")
        self._ends = ends
        self._edge_bins = np.array([whole_bins(L, self.bin_cm) for L in self.edge_lengths_cm], dtype=np.int64)
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
        self.bin_lengths_cm = freeze(step[self._bin_edge])
        self._bin_s_cm = (k_on_edge + 0.5) * self.bin_lengths_cm
        frac = (self._bin_s_cm / self.edge_lengths_cm[self._bin_edge])[:, np.newaxis]
        direction = (self._stop - self._start)[self._bin_edge]
        self.bin_centers_cm = freeze(self._start[self._bin_edge] + frac * direction)
        self.linear_edges_cm = freeze(
            np.concatenate(
                [self._edge_start_cm[e] + step[e] * np.arange(self._edge_bins[e]) for e in range(len(ends))]
                + [[self.total_length_cm]]
            )
        )
        self.valid_mask = freeze(np.ones(self.n_bins, dtype=bool))
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
        xy = read_positions(name, xy_cm)
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
            self._distance_matrix = freeze(matrix)
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
        start, end = read_point("start_cm", start_cm), read_point("end_cm", end_cm)
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
