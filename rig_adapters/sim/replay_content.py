"""Replay content: during each simulated ripple, place cells fire a compressed sequence of a trajectory.

While the animal rests, hippocampal place cells fire during sharp-wave
ripples in sequences that sweep through the environment about 10-20 times
faster than the animal runs (common practice). :class:`ReplayMaker` gives
each ripple the simulated LFP draws (:attr:`rig_adapters.sim.lfp.LfpSynth.ripples`)
one such sequence: a path along the track or maze, drawn either to end at the
goal (``goal_fraction`` of the ripples) or between two random points, run at
a speed drawn from ``speed_cm_s`` over the ripple's span. During the ripple
every place cell fires, on top of its ordinary spikes, as an inhomogeneous
Poisson process at ``rate_gain`` times its field's rate at the replayed
position (thinning, as in :mod:`rig_adapters.sim.cells`). The path and the
choice are the ground truth (:attr:`ReplayMaker.replays`).

The content a replay has is a property of the path it ran, measured with the
environment's own metric: along the track, the way the decoder's content
measures (``decoder.session.replay_content.zone_distances_cm``) and the
paths themselves are. :attr:`Replay.towards_goal` is the one definition of
"a sequence moving towards the goal" that benchmarks and tests score the
content rules against. It is not :attr:`Replay.to_goal` (the draw): a path
between two random points moves towards the goal about half the time, and its
content then is a sequence towards the goal however it was drawn.

Its settings are :class:`~rig_adapters.sim.settings.ReplaySettings`. Its random numbers come from a generator of its own, so that a session
without ``[simulation.replay]`` is unchanged.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from decoder.space.environments import Environment, TrackGraph
from rig_adapters.sim.cells import GroundTruth, rate_of_pairs
from rig_adapters.sim.lfp import Ripple
from rig_adapters.sim.settings import ReplaySettings

#: Neighbouring bins along a path are at most this many bin widths apart.
_NEIGHBOUR_BINS = 1.5
#: A path moves towards the goal when it ends nearer to it, along the track, by at least this
#: share of its length: mostly towards it, not a path that nears the goal's junction and turns off.
TOWARDS_SHARE = 0.5


class Replay(NamedTuple):
    """One replayed sequence: the ground truth of a ripple's content.

    Attributes
    ----------
    ripple : Ripple
        The ripple it fills (``start_s`` to ``end_s``).
    to_goal : bool
        Whether the path was drawn to end at the goal.
    path_xy_cm : ndarray of float64, shape (k, 2)
        The path's points (bin centres), run at constant speed from the
        ripple's start to its end.
    speed_cm_s : float
    length_cm : float
        The path's length along the track.
    goal_distance_cm : tuple of float
        Distance along the track from the goal to the path's first and last point.
    """

    ripple: Ripple
    to_goal: bool
    path_xy_cm: np.ndarray
    speed_cm_s: float
    length_cm: float
    goal_distance_cm: tuple[float, float]

    @property
    def towards_goal(self) -> bool:
        """Whether the path's content is a sequence moving towards the goal (see the module's docstring).

        It ends nearer to the goal along the track than it began by at least
        ``TOWARDS_SHARE`` of its length.
        """
        first, last = self.goal_distance_cm
        return self.length_cm > 0 and first - last >= TOWARDS_SHARE * self.length_cm

    def position_cm(self, t_s: np.ndarray) -> np.ndarray:
        """The replayed position at data times ``t_s`` (shape (n,)) in the ripple, shape (n, 2)."""
        seg = np.hypot(*np.diff(self.path_xy_cm, axis=0).T)
        along = np.concatenate([[0.0], np.cumsum(seg)])
        r = self.ripple
        u = np.clip((np.asarray(t_s, np.float64) - r.start_s) / (r.end_s - r.start_s), 0.0, 1.0) * along[-1]
        return np.column_stack([np.interp(u, along, self.path_xy_cm[:, 0]), np.interp(u, along, self.path_xy_cm[:, 1])])


class ReplayMaker:
    """Replay spikes for each simulated ripple, released tick by tick.

    Parameters
    ----------
    environment : TrackGraph
        A track or maze (the along-track distances give the paths).
    truth : GroundTruth
        The session's cells; place cells replay.
    settings : ReplaySettings
    acquisition_rate_hz : float
        Spike times are whole samples of this clock.
    seed : int or sequence of int

    Attributes
    ----------
    replays : list of Replay
        Every ripple's content so far, in time order.
    """

    def __init__(self, environment: Environment, truth: GroundTruth, settings: ReplaySettings,
                 acquisition_rate_hz: float, seed: Any) -> None:
        if not isinstance(environment, TrackGraph):
            raise ValueError(f"replay content is simulated on a track or maze (along-track paths), "
                             f"not in a {type(environment).__name__}; leave [simulation.replay] out")
        self.settings = settings
        self.replays: list[Replay] = []
        self._truth = truth
        self._fs = float(acquisition_rate_hz)
        self._rng = np.random.default_rng(seed)
        valid = np.flatnonzero(environment.valid_mask)
        self._centres = environment.bin_centers_cm[valid]
        self._distance = environment.bin_distance_matrix_cm()[np.ix_(valid, valid)]
        self._step_cm = _NEIGHBOUR_BINS * environment.bin_cm
        goal = np.asarray(settings.goal_cm, np.float64)
        gap = np.hypot(*(self._centres - goal).T)
        if gap.min() > environment.bin_cm:
            raise ValueError(f"replay.goal_cm {settings.goal_cm} lies off the track; give a point on it")
        self._goal = int(np.argmin(gap))
        self._place_rows = np.flatnonzero(np.array([c == "place" for c in truth.cell_type]))
        self._bound_hz = settings.rate_gain * truth.max_rate_hz[self._place_rows]
        self._done = 0
        self._waiting = (np.zeros(0, np.int64), np.zeros(0, np.int64))

    def spikes(self, ripples: list[Ripple], s0: int, s1: int) -> tuple[np.ndarray, np.ndarray]:
        """Replay spikes in acquisition samples ``[s0, s1)``: sample numbers and unit ids, in time order.

        ``ripples`` is the LFP's ripple list so far; a ripple not seen before
        gets its replay now, and its spikes after ``s1`` wait for later ticks.
        """
        samples, rows = self._waiting
        for ripple in ripples[self._done:]:
            replay = self._draw(ripple)
            self.replays.append(replay)
            new_samples, new_rows = self._fire(replay)
            samples, rows = np.concatenate([samples, new_samples]), np.concatenate([rows, new_rows])
        self._done = len(ripples)
        due = samples < s1
        self._waiting = (samples[~due], rows[~due])
        # A ripple begins on the LFP's sample clock, up to half an LFP sample before this tick.
        samples, rows = np.maximum(samples[due], s0), rows[due]
        order = np.argsort(samples, kind="stable")
        return samples[order], self._truth.unit_ids[rows[order]]

    def _draw(self, ripple: Ripple) -> Replay:
        s, rng = self.settings, self._rng
        speed = float(rng.uniform(*s.speed_cm_s))
        length = speed * (ripple.end_s - ripple.start_s)
        to_goal = bool(rng.random() < s.goal_fraction)
        if to_goal:
            end = self._goal
            start = self._bin_at(self._distance[end], length)
        else:
            start = int(rng.integers(self._distance.shape[0]))
            end = self._bin_at(self._distance[start], length)
        route = self._route(start, end)
        d = self._distance
        length = float(d[route[:-1], route[1:]].sum())
        return Replay(ripple, to_goal, self._centres[route], speed, length,
                      (float(d[route[0], self._goal]), float(d[route[-1], self._goal])))

    def _bin_at(self, distance_cm: np.ndarray, length_cm: float) -> int:
        """A bin drawn among those nearest to ``length_cm`` away (within a bin's width of the nearest)."""
        miss = np.abs(distance_cm - length_cm)
        near = np.flatnonzero(miss <= miss.min() + self._step_cm)
        return int(near[self._rng.integers(near.size)])

    def _route(self, start: int, end: int) -> np.ndarray:
        """Bins from ``start`` to ``end``, each a neighbour of the last and nearer to ``end`` along the track."""
        d = self._distance
        path = [start]
        while path[-1] != end:
            here = path[-1]
            near = np.flatnonzero(d[here] <= self._step_cm)
            nxt = int(near[np.argmin(d[near, end])])
            if d[nxt, end] >= d[here, end]:
                break
            path.append(nxt)
        return np.array(path if len(path) > 1 else [start, start])

    def _fire(self, replay: Replay) -> tuple[np.ndarray, np.ndarray]:
        """The place cells' spikes over the ripple: thinning of a homogeneous process at each cell's bound."""
        r, rng = replay.ripple, self._rng
        counts = rng.poisson(self._bound_hz * (r.end_s - r.start_s))
        rows = np.repeat(self._place_rows, counts)
        t = rng.uniform(r.start_s, r.end_s, rows.size)
        rate = self.settings.rate_gain * rate_of_pairs(self._truth, rows, replay.position_cm(t))
        keep = rng.random(rows.size) * np.repeat(self._bound_hz, counts) < rate
        return np.floor(t[keep] * self._fs).astype(np.int64), rows[keep]
