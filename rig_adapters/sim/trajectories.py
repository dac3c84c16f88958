"""Where the simulated animal goes: foraging in an arena, laps on a track, runs through a maze.

Each trajectory holds the animal's position ``xy`` (cm) and moves it by
``step(dt)``; all of them draw from the session's one random generator, so a
seed gives the same path every time.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import shortest_path

from decoder.space.environments import Arena, Environment, LinearTrack, TrackGraph
from rig_adapters.sim.settings import SimulationSettings

#: Time constant with which the animal comes to a halt at the start of a pause (s).
_STOP_TAU_S = 0.15

#: Time constant of turning away from a wall when touching it (s); farther
#: inside the wall margin the turn is proportionally slower.
_TURN_TAU_S = 0.2


class OpenField:
    """Foraging in an arena: a velocity Ornstein-Uhlenbeck process with pauses.

    Each velocity component relaxes with time constant ``velocity_tau_s``
    towards 0 under white noise scaled so that the stationary speed is
    Rayleigh-distributed with mean ``mean_speed_cm_s`` (mean = s·√(π/2) for
    component s.d. s). Within ``wall_margin_cm`` of a wall the velocity's
    component into the wall decays, the faster the closer the wall, so the
    animal turns to run along it as rodents do in an open field; a step that
    would still come closer than ``min_wall_distance_cm`` is put back onto
    that line.
    """

    def __init__(self, arena: Arena, settings: SimulationSettings, rng: np.random.Generator) -> None:
        ring = np.asarray(arena.outline_cm(), dtype=np.float64)
        self._arena = arena
        self._a = ring[:-1]
        self._ab = ring[1:] - ring[:-1]
        self._ab2 = np.sum(self._ab**2, axis=1)
        self._s = settings
        self._rng = rng
        self._sd = settings.mean_speed_cm_s / math.sqrt(math.pi / 2.0)
        self._pause_left_s = 0.0
        lo, hi = ring.min(axis=0), ring.max(axis=0)
        for _ in range(10_000):
            p = lo + (hi - lo) * rng.random(2)
            if self._inside(p) and self._nearest(p)[1] >= settings.wall_margin_cm:
                break
        else:
            raise ValueError(
                f"the arena has no point {settings.wall_margin_cm} cm from every wall; lower wall_margin_cm"
            )
        self.xy = p
        self._v = rng.normal(0.0, self._sd, 2)

    def _inside(self, p: np.ndarray) -> bool:
        return bool(self._arena.contains(p[None, :])[0])

    def _nearest(self, p: np.ndarray) -> tuple[np.ndarray, float, int]:
        """Nearest point on the outline, its distance (cm) and the index of its side."""
        t = np.clip(np.sum((p - self._a) * self._ab, axis=1) / self._ab2, 0.0, 1.0)
        q = self._a + t[:, None] * self._ab
        d2 = np.sum((q - p) ** 2, axis=1)
        i = int(np.argmin(d2))
        return q[i], math.sqrt(d2[i]), i

    def _inward(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """Nearest wall point, unit normal pointing into the arena, signed distance (cm)."""
        q, d, side = self._nearest(p)
        if d == 0.0:
            # On the wall itself there is no direction from it: use the side's normal.
            n = np.array([-self._ab[side, 1], self._ab[side, 0]]) / math.sqrt(self._ab2[side])
            return q, (n if self._inside(q + 1e-6 * n) else -n), 0.0
        n = (p - q) / d
        if self._inside(p):
            return q, n, d
        return q, -n, -d

    def step(self, dt: float) -> np.ndarray:
        s, rng = self._s, self._rng
        if self._pause_left_s > 0:
            self._pause_left_s -= dt
            self._v = self._v * math.exp(-dt / _STOP_TAU_S)
        elif rng.random() < dt / s.pause_interval_s:
            self._pause_left_s = rng.uniform(*s.pause_duration_s)
        else:
            decay = math.exp(-dt / s.velocity_tau_s)
            self._v = self._v * decay + self._sd * math.sqrt(1.0 - decay * decay) * rng.normal(0.0, 1.0, 2)
        _, n, d = self._inward(self.xy)
        into_wall = float(self._v @ n)
        if d < s.wall_margin_cm and into_wall < 0:
            closeness = 1.0 - max(d - s.min_wall_distance_cm, 0.0) / (s.wall_margin_cm - s.min_wall_distance_cm)
            self._v = self._v - (1.0 - math.exp(-dt * closeness / _TURN_TAU_S)) * into_wall * n
        new = self.xy + self._v * dt
        q, n, d = self._inward(new)
        if d < s.min_wall_distance_cm:
            new = q + n * s.min_wall_distance_cm
            self._v = self._v - min(float(self._v @ n), 0.0) * n
        self.xy = new
        return new


class LinearLaps:
    """Laps on a linear track: run end to end, stop at each end for the reward.

    A run covers the track between the two stopping points with a half-sine
    speed profile (smooth start and stop) whose mean is the lap's speed,
    drawn around ``mean_speed_cm_s``; a small Ornstein-Uhlenbeck wander moves
    the animal across the track.
    """

    def __init__(self, track: LinearTrack, settings: SimulationSettings, rng: np.random.Generator) -> None:
        start, end = np.asarray(track.start_cm, np.float64), np.asarray(track.end_cm, np.float64)
        length = float(np.linalg.norm(end - start))
        if length <= 2 * settings.end_stop_cm + 1.0:
            raise ValueError(
                f"the track is {length:.1f} cm long, too short to run between stops "
                f"{settings.end_stop_cm} cm from each end"
            )
        self._start = start
        self._dir = (end - start) / length
        self._perp = np.array([-self._dir[1], self._dir[0]])
        self._stops = (settings.end_stop_cm, length - settings.end_stop_cm)
        self._s = settings
        self._rng = rng
        self._end = 0
        self._along = self._stops[0]
        self._lateral = 0.0
        self._pause_left_s = rng.uniform(*settings.end_pause_s)
        self._run_s = 0.0
        self._run_len_s = 0.0
        self.xy = self._position()

    def _position(self) -> np.ndarray:
        return self._start + self._along * self._dir + self._lateral * self._perp

    def step(self, dt: float) -> np.ndarray:
        s, rng = self._s, self._rng
        if self._pause_left_s > 0:
            self._pause_left_s -= dt
            if self._pause_left_s <= 0:
                speed = s.mean_speed_cm_s * max(0.3, 1.0 + s.lap_speed_cv * rng.normal())
                self._run_len_s = (self._stops[1] - self._stops[0]) / speed
                self._run_s = 0.0
        else:
            self._run_s = min(self._run_s + dt, self._run_len_s)
            u = self._run_s / self._run_len_s
            frm, to = self._stops[self._end], self._stops[1 - self._end]
            self._along = frm + (to - frm) * 0.5 * (1.0 - math.cos(math.pi * u))
            if u >= 1.0:
                self._end = 1 - self._end
                self._pause_left_s = rng.uniform(*s.end_pause_s)
        decay = math.exp(-dt / s.velocity_tau_s)
        self._lateral = self._lateral * decay + s.track_lateral_sd_cm * math.sqrt(1 - decay * decay) * rng.normal()
        self.xy = self._position()
        return self.xy


class MazeRuns:
    """Runs through a maze (a track graph) from one dead end to another, stopping at each.

    At a dead end (a node on one edge only: the end of an arm, where the
    reward is) the animal stops for ``end_pause_s``, then runs to another dead
    end drawn at random, along the shortest way through the maze, with the
    half-sine speed profile of :class:`LinearLaps` over the whole run and the
    same small sideways wander. Runs start and stop ``end_stop_cm`` from the
    ends.
    """

    def __init__(self, maze: TrackGraph, settings: SimulationSettings, rng: np.random.Generator) -> None:
        nodes = np.asarray(maze.nodes_cm, np.float64)
        ends = np.array(maze.edges, np.int64)
        degree = np.bincount(ends.ravel(), minlength=len(nodes))
        self._dead_ends = np.flatnonzero(degree == 1)
        if self._dead_ends.size < 2:
            raise ValueError(
                f"the simulator runs between dead ends of a maze; this one has {self._dead_ends.size}, "
                "give it at least two arms that end"
            )
        lengths = np.asarray(maze.edge_lengths_cm, np.float64)
        weights = csr_matrix((np.concatenate([lengths, lengths]),
                              (np.concatenate([ends[:, 0], ends[:, 1]]), np.concatenate([ends[:, 1], ends[:, 0]]))),
                             shape=(len(nodes), len(nodes)))
        _, self._previous = shortest_path(weights, directed=False, return_predecessors=True)
        shortest_arm = min(lengths[np.any(ends == d, axis=1)].min() for d in self._dead_ends)
        if shortest_arm <= settings.end_stop_cm + 1.0:
            raise ValueError(
                f"an arm of the maze is {shortest_arm:.1f} cm long, too short to stop "
                f"{settings.end_stop_cm} cm from its end"
            )
        self._nodes = nodes
        self._s = settings
        self._rng = rng
        self._at = int(self._dead_ends[0])
        first_edge = ends[np.any(ends == self._at, axis=1)][0]
        self._set_path(np.array([self._at, int(first_edge[first_edge != self._at][0])]))
        self._along = self._stop_at[0]
        self._lateral = 0.0
        self._pause_left_s = rng.uniform(*settings.end_pause_s)
        self._run_s = 0.0
        self._run_len_s = 0.0
        self.xy = self._position()

    def _set_path(self, path: np.ndarray) -> None:
        points = self._nodes[path]
        seg = np.diff(points, axis=0)
        self._seg_len = np.hypot(seg[:, 0], seg[:, 1])
        self._seg_dir = seg / self._seg_len[:, None]
        self._seg_start = points[:-1]
        self._cum = np.concatenate([[0.0], np.cumsum(self._seg_len)])
        self._stop_at = (self._s.end_stop_cm, float(self._cum[-1]) - self._s.end_stop_cm)

    def _route(self, frm: int, to: int) -> np.ndarray:
        path = [to]
        while path[-1] != frm:
            path.append(int(self._previous[frm, path[-1]]))
        return np.array(path[::-1])

    def _position(self) -> np.ndarray:
        i = int(np.clip(np.searchsorted(self._cum, self._along, side="right") - 1, 0, self._seg_len.size - 1))
        d = self._seg_dir[i]
        perp = np.array([-d[1], d[0]])
        return self._seg_start[i] + (self._along - self._cum[i]) * d + self._lateral * perp

    def step(self, dt: float) -> np.ndarray:
        s, rng = self._s, self._rng
        if self._pause_left_s > 0:
            self._pause_left_s -= dt
            if self._pause_left_s <= 0:
                choices = self._dead_ends[self._dead_ends != self._at]
                target = int(choices[rng.integers(choices.size)])
                self._set_path(self._route(self._at, target))
                self._at = target
                self._along = self._stop_at[0]
                speed = s.mean_speed_cm_s * max(0.3, 1.0 + s.lap_speed_cv * rng.normal())
                self._run_len_s = (self._stop_at[1] - self._stop_at[0]) / speed
                self._run_s = 0.0
        else:
            self._run_s = min(self._run_s + dt, self._run_len_s)
            u = self._run_s / self._run_len_s
            frm, to = self._stop_at
            self._along = frm + (to - frm) * 0.5 * (1.0 - math.cos(math.pi * u))
            if u >= 1.0:
                self._pause_left_s = rng.uniform(*s.end_pause_s)
        decay = math.exp(-dt / s.velocity_tau_s)
        self._lateral = self._lateral * decay + s.track_lateral_sd_cm * math.sqrt(1 - decay * decay) * rng.normal()
        self.xy = self._position()
        return self.xy


def trajectory_for(
    environment: Environment, settings: SimulationSettings, rng: np.random.Generator
) -> OpenField | LinearLaps | MazeRuns:
    """The animal's way through ``environment``: foraging in an arena, laps on a track, runs through a maze."""
    if isinstance(environment, Arena):
        return OpenField(environment, settings, rng)
    if isinstance(environment, LinearTrack):
        return LinearLaps(environment, settings, rng)
    if isinstance(environment, TrackGraph):
        return MazeRuns(environment, settings, rng)
    raise ValueError(
        f"the simulator runs in an Arena, on a LinearTrack or through a TrackGraph, not a {type(environment).__name__}"
    )
