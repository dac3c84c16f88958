"""A simulated session: spikes, tracker frames and sync pulses from a generative model.

:class:`SimulatedSession` plays an invented animal in an environment from
``decoder.space.environments`` and yields the typed messages of ``decoder.messages``
that a real rig would send, in data-time order, one short chunk at a time so
that an hour-long session never holds whole-session arrays. It is pure: no
sockets, files or wall clock; everything random comes from one seeded
``numpy.random.Generator``, so a seed gives the same session every time.
``rig_adapters.sim.simulated_rig`` is the process that publishes it.

What the rig looks like
-----------------------
Three sources, each announced once at the start, each with its own sequence
numbers:

``"ephys"`` (kind ``spikes``, clock ``"acquisition"``, 30 kHz)
    Spike batches with times quantised to the sample clock, sync pulses, and
    heartbeats at the end of every chunk. Its clock is data time.
``"tracker"`` (kind ``tracker``, clock ``"camera"``)
    Noisy frames at ``tracker_rate_hz`` with lost frames and short dropouts,
    and the same sync pulses; all its times run on the camera's clock, which
    is offset and drifts against the acquisition clock, so the receiver must
    align the two from the sync pulses. Like a real camera it sends no
    heartbeats (its frames tell its progress, and the protocol asks
    heartbeats of spike sources only) unless ``position_heartbeats`` is set.
``"truth"`` (kind ``tracker``, clock ``"acquisition"``)
    The noise-free position, for scoring decoding errors and false triggers;
    never for decoding.

The animal forages in an open field (a velocity Ornstein-Uhlenbeck process
that slides along walls, with pauses), runs laps on a linear track or runs
between the arms' ends of a maze (pausing at each end, where the reward is):
:mod:`rig_adapters.sim.trajectories`. The cells are place cells (Gaussian
fields), grid cells (the cosine model), non-spatial cells and fast-spiking
interneurons, firing as inhomogeneous Poisson processes with a dead time:
:mod:`rig_adapters.sim.cells`. What they draw from, with the nuisances of real
recordings, is :class:`~rig_adapters.sim.settings.SimulationSettings`.
"""

from __future__ import annotations

import heapq
import math
from collections import deque
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from decoder.messages import (
    GroupAnnounce,
    Heartbeat,
    InputMessage,
    MarkedSpikes,
    SourceAnnounce,
    SpikeBatch,
    SyncPulse,
    TrackerFrames,
)
from decoder.signals.lfp_chunk import LfpChunk
from decoder.space.environments import Environment, HeadingRing
from rig_adapters.sim.cells import GroundTruth, SpikeTrains, draw_cells
from rig_adapters.sim.heading import (
    HeadTurning,
    draw_heading_cells,
    tracked_heading,
    true_heading,
)
from rig_adapters.sim.lfp import LfpSynth
from rig_adapters.sim.marks import Tetrodes
from rig_adapters.sim.replay_content import ReplayMaker
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.trajectories import trajectory_for

__all__ = [
    "ACQUISITION_CLOCK", "FRAME_QUALITY", "LFP_SOURCE", "SPIKE_SOURCE", "TRACKER_CLOCK", "TRACKER_SOURCE",
    "TRUTH_SOURCE",
    "Chunk", "SimulatedSession", "SimulationSettings",
]

SPIKE_SOURCE = "ephys"
#: The LFP source (with ``[simulation.lfp]``): chunks on the acquisition clock, not announced.
LFP_SOURCE = "lfp"
TRACKER_SOURCE = "tracker"
TRUTH_SOURCE = "truth"
ACQUISITION_CLOCK = "acquisition"
TRACKER_CLOCK = "camera"

#: Quality of every frame the tracker did not lose, on the 0..255 scale.
FRAME_QUALITY = 200

#: Longest step of the motion integrator (s); chunks are cut into steps this short or shorter.
_MOTION_STEP_S = 0.01
#: The simulated LFP follows the speed over this window (s): theta while running, ripples at rest.
_LFP_SPEED_WINDOW_S = 0.25


@dataclass(frozen=True)
class Chunk:
    """The messages of one tick, to be sent once acquisition time reaches ``t_end_s``."""

    t_end_s: float
    messages: tuple[InputMessage, ...]


class SimulatedSession:
    """A simulated recording session, generated chunk by chunk.

    Parameters
    ----------
    environment : decoder.space.environments.Arena, LinearTrack or TrackGraph
        Where the animal runs: it forages in an arena, runs laps on a track
        and runs between the ends of a maze's arms.
    settings : SimulationSettings
    seed : int
        Seed of the one random generator behind everything; a seed gives the
        same session every time.

    Examples
    --------
    >>> from decoder.space.environments import Arena
    >>> session = SimulatedSession(Arena.circle((45, 45), 45, bin_cm=3), SimulationSettings(), seed=1)
    >>> kinds = {type(m).__name__ for m in session.messages(until_s=2.0)}
    >>> sorted(kinds)
    ['Heartbeat', 'SourceAnnounce', 'SpikeBatch', 'SyncPulse', 'TrackerFrames']
    """

    def __init__(self, environment: Environment, settings: SimulationSettings, seed: int) -> None:
        if not isinstance(settings, SimulationSettings):
            raise ValueError(f"settings must be a SimulationSettings, got {type(settings).__name__}")
        self.environment = environment
        self.settings = settings
        self._rng = np.random.default_rng(seed)
        rng = self._rng
        # On a heading ring the session's "position" is the heading as a ring point (rig_adapters.sim.heading).
        self._heading = isinstance(environment, HeadingRing)
        if self._heading:
            self._motion, self._truth = HeadTurning(environment, settings, rng), draw_heading_cells(settings, rng)
        else:
            self._motion = trajectory_for(environment, settings, rng)
            self._truth = draw_cells(environment, settings, rng)
        self._trains = SpikeTrains(self._truth, settings, rng)
        # Marks draw from their own generator: a session without them is unchanged.
        self.tetrodes = Tetrodes(settings.marks, self._truth.unit_ids, seed) if settings.marks is not None else None
        self._drift = 1.0 + settings.tracker_drift_ppm * 1e-6
        self._seq = {SPIKE_SOURCE: 0, TRACKER_SOURCE: 0, TRUTH_SOURCE: 0}
        self._announced = False
        self._tick = 0
        self._next_frame = 0
        self._next_truth = 0
        self._pulse_id = 1
        self._next_pulse_s = rng.uniform(*settings.sync_interval_s)
        self._dropout = self._next_dropout(0.0)
        # Its own generator: turning the LFP on changes no other draw of the session.
        self.lfp = LfpSynth(settings.lfp, [seed, 14]) if settings.lfp is not None else None
        self.replay = (ReplayMaker(environment, self._truth, settings.replay, settings.acquisition_rate_hz, [seed, 15])
                       if settings.replay is not None else None)
        self._seq[LFP_SOURCE] = 0
        self._lfp_path: deque[tuple[float, np.ndarray]] = deque()

    def ground_truth(self) -> GroundTruth:
        """The cells' fields and the tracker's clock, as drawn for this session."""
        return self._truth

    # -- messages ------------------------------------------------------------------

    def _message(self, cls: type, source: str, **fields: Any) -> InputMessage:
        msg = cls(source=source, seq=self._seq[source], **fields)
        self._seq[source] += 1
        return msg

    def _announcements(self) -> tuple[InputMessage, ...]:
        s = self.settings
        units = self._truth.unit_ids
        if self.tetrodes is not None:
            units = self.tetrodes.sorted_unit_ids if s.marks.send == "both" else np.zeros(0, np.int64)
        out = [self._message(SourceAnnounce, SPIKE_SOURCE, kind="spikes", clock=ACQUISITION_CLOCK,
                             sample_rate_hz=s.acquisition_rate_hz, unit_ids=units)]
        if self.tetrodes is not None:
            groups = self.tetrodes.group_ids
            out.append(self._message(GroupAnnounce, SPIKE_SOURCE, group_ids=groups,
                                     group_channels=np.full(groups.size, s.marks.channels)))
        return (
            *out,
            self._message(SourceAnnounce, TRACKER_SOURCE, kind="tracker", clock=TRACKER_CLOCK,
                          sample_rate_hz=s.tracker_rate_hz),
            self._message(SourceAnnounce, TRUTH_SOURCE, kind="tracker", clock=ACQUISITION_CLOCK,
                          sample_rate_hz=s.tracker_rate_hz),
        )

    def chunks(self, until_s: float | None = None) -> Iterator[Chunk]:
        """Yield the session chunk by chunk, continuing where the last call stopped.

        The first chunk holds the three source announcements (``t_end_s`` 0);
        each later one covers one tick of acquisition time and ends with a
        heartbeat from the spike source (and from the tracker and the truth
        stream with ``position_heartbeats``).

        Parameters
        ----------
        until_s : float or None
            Stop once the chunks cover acquisition time up to ``until_s``
            (the last chunk may reach up to one tick past it); None runs on
            for as long as the caller keeps asking.
        """
        if until_s is not None and not (isinstance(until_s, (int, float)) and math.isfinite(until_s)):
            raise ValueError(f"until_s must be a finite number of seconds or None, got {until_s!r}")
        if not self._announced:
            self._announced = True
            yield Chunk(0.0, self._announcements())
        spt = self.settings.samples_per_tick
        fs = self.settings.acquisition_rate_hz
        while until_s is None or self._tick * spt / fs < until_s - 1e-12:
            yield self._next_chunk()

    def messages(self, until_s: float | None = None) -> Iterator[InputMessage]:
        """The messages of :meth:`chunks`, one by one, in data-time order."""
        for chunk in self.chunks(until_s):
            yield from chunk.messages

    def _next_chunk(self) -> Chunk:
        s = self.settings
        fs = s.acquisition_rate_hz
        spt = s.samples_per_tick
        s0, s1 = self._tick * spt, (self._tick + 1) * spt
        t0, t1 = s0 / fs, s1 / fs
        self._tick += 1

        n_steps = max(1, int(math.ceil(s.tick_s / _MOTION_STEP_S - 1e-9)))
        path_t = np.linspace(t0, t1, n_steps + 1)
        path_xy = np.empty((n_steps + 1, 2))
        path_xy[0] = self._motion.xy
        for i in range(n_steps):
            path_xy[i + 1] = self._motion.step(s.tick_s / n_steps)

        def position(t: np.ndarray) -> np.ndarray:
            return np.column_stack([np.interp(t, path_t, path_xy[:, 0]), np.interp(t, path_t, path_xy[:, 1])])

        pulse_t = None
        if self._next_pulse_s < t1:
            pulse_t = self._next_pulse_s
            pulse_id = self._pulse_id
            self._pulse_id += 1
            self._next_pulse_s += self._rng.uniform(*s.sync_interval_s)

        # The LFP first: a ripple it draws in this tick fills with replay spikes from this tick on.
        lfp = self._lfp_chunks(t0, t1, path_xy) if self.lfp is not None else []
        ephys: list[tuple[float, InputMessage]] = []
        spike_samples, spike_units = self._trains.spikes(self._tick - 1, s0, s1, position)
        if self.replay is not None:
            replay_samples, replay_units = self.replay.spikes(self.lfp.ripples, s0, s1)
            if replay_samples.size:
                spike_samples = np.concatenate([spike_samples, replay_samples])
                spike_units = np.concatenate([spike_units, replay_units])
                order = np.argsort(spike_samples, kind="stable")
                spike_samples, spike_units = spike_samples[order], spike_units[order]
        spike_t = spike_samples / fs
        if self.tetrodes is not None:
            spike_t, spike_units = self.tetrodes.with_multi_unit(spike_t, spike_units, t0, t1)
        pulse_ephys_t = math.floor(pulse_t * fs) / fs if pulse_t is not None else math.inf
        before = int(np.searchsorted(spike_t, pulse_ephys_t, side="left"))
        if before > 0:
            ephys.extend(self._spike_messages(spike_t[:before], spike_units[:before]))
        if pulse_t is not None:
            ephys.append((pulse_ephys_t, self._message(SyncPulse, SPIKE_SOURCE, t_s=pulse_ephys_t, pulse_id=pulse_id)))
        if before < spike_t.size:
            ephys.extend(self._spike_messages(spike_t[before:], spike_units[before:]))
        ephys.append((t1, self._message(Heartbeat, SPIKE_SOURCE, t_s=t1)))

        tracker: list[tuple[float, InputMessage]] = []
        frame_t_acq, frame_t_trk, frame_xy, frame_q, frame_hd = self._tracker_frames(t0, t1, position)
        if pulse_t is not None:
            pulse_trk_t = float(self._truth.tracker_time_s(pulse_t)) + self._rng.normal(0.0, s.sync_jitter_s)
            # Jitter must not carry the pulse past the chunk's end, where a
            # heartbeat (if sent) promises that everything before it has been sent.
            lo, hi = self._truth.tracker_time_s(np.array([t0, t1]))
            pulse_trk_t = min(max(pulse_trk_t, float(lo)), float(np.nextafter(hi, -np.inf)))
        else:
            pulse_trk_t = math.inf
        before = int(np.searchsorted(frame_t_trk, pulse_trk_t, side="left"))
        if before > 0:
            msg = self._message(TrackerFrames, TRACKER_SOURCE, t_s=frame_t_trk[:before], xy_cm=frame_xy[:before],
                                head_dir_rad=None if frame_hd is None else frame_hd[:before], quality=frame_q[:before])
            tracker.append((float(frame_t_acq[0]), msg))
        if pulse_t is not None:
            msg = self._message(SyncPulse, TRACKER_SOURCE, t_s=pulse_trk_t, pulse_id=pulse_id)
            tracker.append(((pulse_trk_t - s.tracker_offset_s) / self._drift, msg))
        if before < frame_t_trk.size:
            msg = self._message(TrackerFrames, TRACKER_SOURCE, t_s=frame_t_trk[before:], xy_cm=frame_xy[before:],
                                head_dir_rad=None if frame_hd is None else frame_hd[before:], quality=frame_q[before:])
            tracker.append((float(frame_t_acq[before]), msg))
        if s.position_heartbeats:
            tracker.append((t1, self._message(Heartbeat, TRACKER_SOURCE, t_s=float(self._truth.tracker_time_s(t1)))))

        truth: list[tuple[float, InputMessage]] = []
        j0, j1 = self._next_truth, int(math.ceil(t1 * s.tracker_rate_hz - 1e-9))
        if j1 > j0:
            t = np.arange(j0, j1) / s.tracker_rate_hz
            xy, hd = position(t), None
            if self._heading:
                xy, hd = true_heading(xy)
            msg = self._message(TrackerFrames, TRUTH_SOURCE, t_s=t, xy_cm=xy, head_dir_rad=hd,
                                quality=np.full(t.size, 255))
            truth.append((float(t[0]), msg))
        self._next_truth = max(j1, j0)
        if s.position_heartbeats:
            truth.append((t1, self._message(Heartbeat, TRUTH_SOURCE, t_s=t1)))

        merged = heapq.merge(ephys, tracker, truth, lfp, key=lambda item: item[0])
        return Chunk(t1, tuple(msg for _, msg in merged))

    def _lfp_chunks(self, t0: float, t1: float, path_xy: np.ndarray) -> list[tuple[float, InputMessage]]:
        """The tick's LFP as chunks of ``lfp.chunk_s``, each keyed by its end (when a rig could send it)."""
        s = self.settings.lfp
        # Speed over the last quarter second, as a tracker would measure it: the path's
        # sideways wander makes the speed over one motion step meaningless.
        recent = self._lfp_path
        recent.append((t1, path_xy[-1]))
        while len(recent) > 1 and recent[0][0] < t1 - _LFP_SPEED_WINDOW_S:
            recent.popleft()
        (ta, xa), (tb, xb) = recent[0], recent[-1]
        speed_cm_s = float(np.hypot(*(xb - xa)) / (tb - ta)) if tb > ta else 0.0
        n0, n1 = int(round(t0 * s.rate_hz)), int(round(t1 * s.rate_hz))
        t = np.arange(n0, n1) / s.rate_hz
        x = self.lfp.block(np.full(t.size, speed_cm_s))
        if s.sample_format == "int16":
            x = np.clip(np.round(x / s.uv_per_count), -32768, 32767).astype(np.int16)
            scale = s.uv_per_count
        else:
            x, scale = x.astype(np.float32), 1.0
        out = []
        step = s.samples_per_chunk
        for i in range(0, x.shape[0], step):
            msg = self._message(LfpChunk, LFP_SOURCE, t_s=float(t[i]), rate_hz=s.rate_hz, samples=x[i:i + step],
                                uv_per_count=scale)
            out.append(((n0 + min(i + step, t.size)) / s.rate_hz, msg))
        return out

    def _spike_messages(self, t: np.ndarray, units: np.ndarray) -> list[tuple[float, InputMessage]]:
        """A non-empty run of spikes as the spike source sends it: a spike batch, marked spikes, or both."""
        if self.tetrodes is None:
            return [(float(t[0]), self._message(SpikeBatch, SPIKE_SOURCE, t_s=t, unit_id=units))]
        out = []
        if self.settings.marks.send == "both":
            sorted_ = np.isin(units, self.tetrodes.sorted_unit_ids)
            if sorted_.any():
                msg = self._message(SpikeBatch, SPIKE_SOURCE, t_s=t[sorted_], unit_id=units[sorted_])
                out.append((float(t[0]), msg))
        t_m, groups, marks, _ = self.tetrodes.marks(t, units)
        if t_m.size:
            out.append((float(t[0]), self._message(MarkedSpikes, SPIKE_SOURCE, t_s=t_m, group_id=groups, marks_uv=marks)))
        return out

    def _next_dropout(self, after_s: float) -> tuple[float, float]:
        start = after_s + self._rng.exponential(self.settings.dropout_interval_s)
        return start, start + self._rng.uniform(*self.settings.dropout_duration_s)

    def _tracker_frames(self, t0: float, t1: float, position: Any) -> tuple[np.ndarray, ...]:
        """Frames captured in acquisition time ``[t0, t1)``.

        Frame k is captured when the tracker's clock reads
        ``tracker_offset_s + k / tracker_rate_hz``.

        Returns
        -------
        t_acq, t_tracker : ndarray of float64, shape (n,)
        xy_cm : ndarray of float64, shape (n, 2)
            NaN for a lost frame.
        quality : ndarray of int64, shape (n,)
            0 for a lost frame.
        hd_rad : ndarray of float64, shape (n,), or None
            The tracked heading on a heading ring (NaN where unknown); None elsewhere.
        """
        s = self.settings
        per_acq_s = s.tracker_rate_hz * self._drift
        k0, k1 = self._next_frame, int(math.ceil(t1 * per_acq_s - 1e-9))
        self._next_frame = max(k1, k0)
        k = np.arange(k0, k1)
        t_acq = k / per_acq_s
        t_trk = s.tracker_offset_s + k / s.tracker_rate_hz
        xy = position(t_acq) + self._rng.normal(0.0, s.tracker_noise_cm, (k.size, 2))
        lost = self._rng.random(k.size) < s.lost_frame_prob
        for i, t in enumerate(t_acq):
            while t >= self._dropout[1]:
                self._dropout = self._next_dropout(self._dropout[1])
            lost[i] |= t >= self._dropout[0]
        if s.tracker_outlier_prob > 0:
            astray = self._rng.random(k.size) < s.tracker_outlier_prob
            xy[astray] += self._rng.normal(0.0, s.tracker_outlier_cm, (int(np.count_nonzero(astray)), 2))
        xy[lost] = np.nan
        quality = np.where(lost, 0, FRAME_QUALITY)
        hd = None
        if self._heading:
            xy, hd = tracked_heading(position(t_acq), lost, s, self._rng)
        return t_acq, t_trk, xy, quality, hd
