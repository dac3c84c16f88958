"""The session's marked spikes (clusterless decoding): checks, artefact guard, learning and decoding windows.

Marked spikes come from the spike source (PROTOCOL.md, "Marked spikes") and
move its data time like spike batches. Here they are checked against the
groups the source announced (an unknown group, a mark of the wrong width for
its group and a group announced again with another channel count are
counted by reason and left out), passed through the same artefact guard as
sorted spikes with each group standing for a unit, and then either learned
(placed at the tracked position once the tracker has passed their time) or
held for the decoding steps, whose windows they enter as the marks'
log-likelihood and expected count (``decoder.inference.decoding.BayesDecoder``).
While learning, each spike goes to the mark model with its time and the
place model's cross-validation fold of that time, so that the filter's
temperature can be fitted on held-out steps with their marks
(``PlaceModel.calibrate``).
"""

from __future__ import annotations

import logging
from collections.abc import Callable

import numpy as np

from decoder.config import MarkSettings, SessionSettings
from decoder.encoding.mark_model import MarkModel
from decoder.messages import GroupAnnounce, MarkedSpikes
from decoder.session.artefacts import SpikeSanity
from decoder.session.tracking import TrackHistory
from decoder.space.environments import Environment

log = logging.getLogger(__name__)

#: Marked spikes waiting for the tracker to pass their time while learning;
#: beyond, the oldest are dropped and counted (a minute of 32 tetrodes).
MAX_PENDING_MARKS = 200_000

#: The counters this module keeps in the session's counters.
COUNTERS = ("mark_unknown_group", "mark_wrong_width", "mark_group_changed", "mark_artefact_spikes",
            "mark_late_spikes", "mark_spikes_over_cap", "mark_pending_dropped")


class MarkStream:
    """Marked spikes of one session.

    Parameters
    ----------
    settings : MarkSettings
    session : SessionSettings
        The artefact guard's window and population rule.
    environment : Environment
    smooth_cm, min_speed_cm_s, rate_floor_hz : float
        The place model's settings, shared by the mark model.
    counters : dict of str to int
        The session's counters; :data:`COUNTERS` are added and counted here.
    """

    def __init__(self, settings: MarkSettings, session: SessionSettings, environment: Environment,
                 smooth_cm: float, min_speed_cm_s: float, rate_floor_hz: float, counters: dict[str, int]) -> None:
        self.settings = settings
        self.environment = environment
        self.counters = counters
        for name in COUNTERS:
            counters.setdefault(name, 0)
        self.channels: dict[int, int] = {}
        self.sanity = SpikeSanity(settings.artefact_ceiling_hz, session.artefact_window_s,
                                  session.artefact_population_fraction, session.artefact_population_window_s,
                                  session.artefact_population_min_units)
        self._model_kwargs = dict(bandwidth_uv=settings.bandwidth_uv, smooth_cm=smooth_cm,
                                  min_speed_cm_s=min_speed_cm_s, max_spikes_per_group=settings.max_spikes_per_group,
                                  cutoff_sd=settings.cutoff_sd, rate_floor_hz=rate_floor_hz, seed=settings.seed,
                                  merge_sd=settings.merge_sd)
        self.learning: MarkModel | None = None
        self._fold_of: Callable[[np.ndarray], np.ndarray] | None = None
        self._pending: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        self._n_pending = 0
        self.decoding: MarkModel | None = None
        self._window_s = 0.0
        self._held: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []

    # -- checks --------------------------------------------------------------

    def announce(self, msg: GroupAnnounce) -> None:
        """Take the groups a source announced; a known group keeps its channel count."""
        for gid, n in zip(msg.group_ids.tolist(), msg.group_channels.tolist()):
            known = self.channels.get(gid)
            if known is not None and known != n:
                self.counters["mark_group_changed"] += 1
                log.warning("group %d was announced with %d channels and now with %d; its marks of %d channels "
                            "are refused (restart the session to change an electrode group)", gid, known, n, n)
                continue
            self.channels[gid] = n
            if self.learning is not None:
                self.learning.add_group(gid, n)

    def accept(self, msg: MarkedSpikes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The batch's spikes of known groups at their announced width, past the artefact guard."""
        t, g, m = msg.t_s, msg.group_id, msg.marks_uv
        width = m.shape[1]
        known = np.array([self.channels.get(gid, 0) for gid in g.tolist()], np.int64)
        unknown = known == 0
        wrong = ~unknown & (known != width)
        if unknown.any():
            self.counters["mark_unknown_group"] += int(unknown.sum())
            log.warning("%d marked spikes of groups the source never announced (for example %d); left out",
                        int(unknown.sum()), int(g[unknown][0]))
        if wrong.any():
            self.counters["mark_wrong_width"] += int(wrong.sum())
            log.warning("%d marked spikes of %d channels for a group announced with %d; left out",
                        int(wrong.sum()), width, int(known[wrong][0]))
        keep = ~(unknown | wrong)
        if t.size and keep.any():
            sane = self.sanity.keep(t[keep], g[keep])
            if not sane.all():
                self.counters["mark_artefact_spikes"] += int(sane.size - np.count_nonzero(sane))
                keep[np.flatnonzero(keep)[~sane]] = False
        if keep.all():
            return t, g, m
        return t[keep], g[keep], m[keep]

    # -- learning ------------------------------------------------------------

    def start_learning(self, fold_of: Callable[[np.ndarray], np.ndarray]) -> None:
        """Learn a new mark model from here on, each spike in the fold ``fold_of(t_s)`` (the place model's ``fold_of``)."""
        self.learning = MarkModel(self.environment, **self._model_kwargs)
        self._fold_of = fold_of
        for gid, n in self.channels.items():
            self.learning.add_group(gid, n)
        self._pending, self._n_pending = [], 0

    def learn(self, batch: tuple[np.ndarray, np.ndarray, np.ndarray], tracked: TrackHistory) -> None:
        """Hold a batch until the tracker has passed its time, and place what it has passed."""
        if batch[0].size:
            self._pending.append(batch)
            self._n_pending += batch[0].size
            while self._n_pending > MAX_PENDING_MARKS:
                t, g, m = self._pending.pop(0)
                self._n_pending -= t.size
                self.counters["mark_pending_dropped"] += t.size
                # Never placed (no tracked position reached them), yet a live step would decode them:
                # the held-out steps of calibration keep them, as they keep spikes that are not placed.
                self.learning.held_out.add(t, g, m)
        self.settle(tracked, tracked.newest_t_s)

    def settle(self, tracked: TrackHistory, until_s: float) -> None:
        """Place the held spikes at or before ``until_s`` at the tracked position and speed."""
        while self._pending and self._pending[0][0].size:
            t, g, m = self._pending[0]
            n = int(np.searchsorted(t, until_s, side="right"))
            if n == 0:
                return
            where = np.array([tracked.at_xy(ti) for ti in t[:n].tolist()]).reshape(n, 3)
            self.learning.update(g[:n], m[:n], where[:, :2], where[:, 2], t_s=t[:n], folds=self._fold_of(t[:n]))
            self._n_pending -= n
            if n == t.size:
                self._pending.pop(0)
            else:
                self._pending[0] = (t[n:], g[n:], m[n:])
                return

    def fit(self, occupancy_s: np.ndarray, valid_mask: np.ndarray, tracked: TrackHistory) -> MarkModel | None:
        """Fit the mark model learned so far on the place model's occupancy and bins (ValueError if impossible).

        None when the source announced no group: the session decodes its sorted units alone.
        """
        self.settle(tracked, tracked.newest_t_s)
        if self.learning.n_groups == 0:
            log.warning("[marks] is enabled but the spike source announced no electrode group ('groups', "
                        "PROTOCOL.md); decoding without marks")
            return None
        return self.learning.fit(occupancy_s, valid_mask)

    # -- decoding ------------------------------------------------------------

    def install(self, model: MarkModel | None, window_s: float) -> None:
        """Decode with ``model`` (None: no marks) over windows of ``window_s``; nothing held."""
        self.decoding = model
        self._window_s = window_s
        self._held = []
        if model is not None:
            self._scratch = model.scratch()
            self._log_like = np.empty(model.environment.n_bins)
            self._expected = model.expected_count(window_s)

    def take(self, batch: tuple[np.ndarray, np.ndarray, np.ndarray],
             closed_until_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """Hold a batch for the steps still to close; spikes of steps already decoded are counted late.

        Returns
        -------
        tuple of ndarray or None
            The batch's spikes of groups the model knows, late ones included:
            times, model rows and marks (the content bins' input, so that
            each batch's groups are looked up once); None without a model.
        """
        t, g, m = batch
        if self.decoding is None:
            return None
        rows = self.decoding.rows_of(g)
        if (rows < 0).any():
            # Announced after the model was fitted: the model has nothing on them.
            self.counters["mark_unknown_group"] += int((rows < 0).sum())
            t, rows, m = t[rows >= 0], rows[rows >= 0], m[rows >= 0]
        late = int(np.searchsorted(t, closed_until_s, side="right"))
        if late:
            self.counters["mark_late_spikes"] += late
        if t.size > late:
            self._held.append((t[late:], rows[late:], m[late:]))
        return t, rows, m

    def restart(self) -> None:
        """Forget the held spikes (the spike source restarted its clock)."""
        self._held = []

    def terms(self, t_end_s: float) -> tuple[np.ndarray, np.ndarray] | tuple[None, None]:
        """The window ``(t_end_s - window_s, t_end_s]``: marks' log-likelihood and expected count, each (n_bins,).

        Spikes before the window are forgotten (windows only move forward).
        """
        if self.decoding is None:
            return None, None
        start = t_end_s - self._window_s
        held = [(t, g, m) for t, g, m in self._held if t[-1] > start]
        self._held = held
        parts = [(t, g, m) for t, g, m in held if t[0] <= t_end_s]
        if parts:
            t = np.concatenate([p[0] for p in parts])
            inside = (t > start) & (t <= t_end_s)
            rows = np.concatenate([p[1] for p in parts])[inside]
            width = int(self.decoding.group_channels_.max())
            marks = np.zeros((int(inside.sum()), width), np.float32)
            at = 0
            for (pt, _, pm), keep in zip(parts, np.split(inside, np.cumsum([p[0].size for p in parts])[:-1])):
                k = int(keep.sum())
                marks[at:at + k, : pm.shape[1]] = pm[keep]
                at += k
        else:
            rows, marks = np.zeros(0, np.int64), np.zeros((0, int(self.decoding.group_channels_.max())), np.float32)
        self.counters["mark_spikes_over_cap"] += self.decoding.window_log_intensity(
            rows, marks, self._log_like, self._scratch, self.settings.max_spikes_per_step)
        return self._log_like, self._expected
