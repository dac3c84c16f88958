"""The content of candidate replay events: short bins decoded with the uniform prior, and causal sequence measures.

While a detected ripple lasts, place cells may fire a compressed sequence that
sweeps through the environment many times faster than the animal runs. The
behavioural decoding (its filter, its movement model, its step schedule) does
not follow such jumps and is left as it is; beside it, :class:`ReplayContent`
decodes a second schedule of short non-overlapping bins of ``bin_s`` (10-20 ms
is common practice) from the event's start, each bin on its own with the
uniform prior over the model's bins, with the plain Poisson likelihood of the
sorted units and, when a mark model decodes beside them, the marks' terms
(``sum_k log lambda(x, m_k)`` over the bin's marked spikes and their expected
count, ``MarkModel.log_intensity_sum`` and ``expected_count``: what a
behavioural step adds, untempered here like the units' terms), until
the event's LFP offset (the ripple envelope falling back, :meth:`ReplayContent.close`)
or ``max_event_s`` after the start, whichever comes first. A bin is decoded
once the spikes have passed its end and the LFP its start, so that no bin
begins after the offset.

The resting animal's own place cells go on firing while a replay runs,
and a bin's likelihood that counts their spikes as the replay's is pulled
towards the animal's place, or to a compromise between it and the replayed
place. When the pipeline knows where the animal rests (its tracked
position at the detection, :meth:`ReplayContent.begin`), each bin's
spikes are decoded as the superposition of two Poisson processes (the
intensities add): the replay's at the decoded place ``x`` and the resting
animal's own at its tracked place ``a``, both from the learned model, so a
unit's rate is ``r(x) + r(a)`` and a marked spike's intensity
``lambda(x, m) + lambda(a, m)``. The background's expected count does not
depend on ``x`` and drops out of the posterior. Without a tracked position
(lost, or off the model's bins) the bins are decoded as before.

The bins start ``lead_s`` before the LFP onset: the replay's spikes begin
before the ripple envelope is high enough to cross the detection threshold
(on the simulated rig the crossing comes 14-32 ms, median 21, after a
ripple's start), and a sequence seen from its start tells its direction
sooner; the spikes before the onset are in the past when the ripple is
detected, so those bins are decoded at once. A fixed lead, not a search for
where the population burst began: at rest the animal's own place cells fire
at a steady rate, and a look back that follows the spike count over a few ms
at a time takes those bins for the burst as often as not, so the event
begins with bins decoded at the animal's own place, which read as a
sequence leaving it.

As the event unfolds, after each bin and using only the bins so far,
:class:`SequenceMeasures` gives for each zone

* the posterior mass in the zone averaged over the event's bins so far;
* the posterior log odds that the replay moves towards the zone, and away
  from it, from the sequence filter
  (:class:`decoder.inference.sequence_filter.SequenceFilter`): every bin of
  the event so far weighed by its whole likelihood over the distance to the
  zone, against a replay moving the other way or no sequence at all: the one
  measure the sequence rules judge (``ContentBin.log_odds``, ``min_log_odds``);
* reported beside it, judged by no rule: Kendall's rank correlation (tau-b)
  between the bins' times and their decoded distance to the zone (the
  posterior median of the distance). A rank correlation, because one bin
  decoded far away (a bin where the resting animal's own place cells
  outnumber the replay's spikes) changes at most ``n - 1`` of its
  ``n (n - 1) / 2`` pairs, where it would swing a least-squares line; the
  median, because a bin's posterior often holds the replayed place and a
  diffuse remainder (spikes no place explains well), and the mean follows
  the remainder towards the environment's middle where the median stays
  with the bulk of the mass;
* the weighted correlation between time and the decoded distance to the zone,
  every (bin, position) pair weighted by its posterior probability, and the
  slope (cm/s) of the weighted least-squares line of distance on time: a
  negative slope with a strong correlation is a sequence moving towards the
  zone. This is a causal, truncated form of the line fitting of Davidson,
  Kloosterman & Wilson (2009, Neuron 63:497), our own design: the line is
  fitted over the bins seen so far, not the whole event, and it is fitted to
  the distance to a zone, which serves an open field, a track or a maze alike.
  Reported, judged by no rule.

The judgement of the zone mass and the log odds by content rules is the
trigger bank's (``TriggerBank.content``), beneath the same caps as every rule.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from decoder.encoding.mark_model import MarkModel
from decoder.inference.decoding import BayesDecoder
from decoder.inference.sequence_filter import SequenceFilter
from decoder.space.environments import Environment

#: Spikes are held this much longer than the longest event and its lead, for the detection's latency (s).
_HOLD_MARGIN_S = 0.5


def zone_distances_cm(environment: Environment, zone_masks: np.ndarray) -> np.ndarray:
    """Distance from each bin centre to the nearest bin centre of each zone.

    Along the track on a track or graph (``bin_distance_matrix_cm``),
    straight in an arena.

    Parameters
    ----------
    environment : Environment
    zone_masks : ndarray of bool, shape (n_zones, n_bins)

    Returns
    -------
    ndarray of float64, shape (n_zones, n_bins)
        0 inside a zone; NaN everywhere for a zone without bins.
    """
    masks = np.asarray(zone_masks, bool)
    try:
        full = environment.bin_distance_matrix_cm()
    except NotImplementedError:
        full = None
    out = np.full((masks.shape[0], environment.n_bins), np.nan)
    centres = environment.bin_centers_cm
    for z, mask in enumerate(masks):
        if not mask.any():
            continue
        if full is not None:
            out[z] = full[:, mask].min(axis=1)
        else:
            inside = centres[mask]
            out[z] = np.min(np.hypot(centres[:, None, 0] - inside[None, :, 0],
                                     centres[:, None, 1] - inside[None, :, 1]), axis=1)
    return out


def units_background(rates_hz: np.ndarray, rows: np.ndarray, counts: np.ndarray, resting_bin: int) -> np.ndarray:
    """What the resting animal's own firing changes in a bin's units' log-likelihood, shape (n_bins,).

    With the rates ``r_i(x) + r_i(a)`` (a place ``x`` replayed, the animal
    at ``a``), the spike term ``sum_i n_i log(r_i(x) + r_i(a))`` is the
    plain one plus ``sum_i n_i log(1 + r_i(a) / r_i(x))``, returned here;
    the background's expected count, ``window * sum_i r_i(a)``, does not
    depend on ``x`` and drops out.

    Parameters
    ----------
    rates_hz : ndarray of float64, shape (n_units, n_bins)
        The floored rate maps (``BayesDecoder.rates_hz``).
    rows : ndarray of int64, shape (k,)
        Units that fired, each once.
    counts : ndarray of float64, shape (k,)
        Their spike counts.
    resting_bin : int
        The animal's bin ``a``.
    """
    r = rates_hz[rows]
    return counts @ np.log1p(r[:, resting_bin, None] / r)


def marks_with_background(marks: MarkModel, rows: np.ndarray, marks_uv: np.ndarray, resting_bin: int,
                          out: np.ndarray, scratch: tuple[np.ndarray, ...], one: np.ndarray) -> None:
    """``sum_k log(lambda(x, m_k) + lambda(a, m_k))`` over a bin's marked spikes, into ``out`` (n_bins,).

    The marks' spike term when the resting animal's place ``a`` fires beside
    the replay (the intensities of two Poisson processes add); the
    background's expected count does not depend on ``x`` and drops out.
    Each spike's ``log lambda(x, m_k)`` comes from
    :meth:`MarkModel.log_intensity_sum` over that spike alone, into ``one``
    (n_bins,).
    """
    out[:] = 0.0
    for k in range(rows.size):
        marks.log_intensity_sum(rows[k:k + 1], marks_uv[k:k + 1], one, scratch)
        out += np.logaddexp(one, one[resting_bin])


class SequenceMeasures:
    """Causal content measures of one event, updated bin by bin from running sums.

    Parameters
    ----------
    zone_masks : ndarray of bool, shape (n_zones, n_bins)
    distance_cm : ndarray of float64, shape (n_zones, n_bins)
        Distance of each bin to each zone (:func:`zone_distances_cm`).

    Notes
    -----
    With weights ``w = P(x | bin k)`` over bins ``k`` (times ``t_k``) and
    positions ``x`` (distance ``d(x)`` to the zone), the weighted means,
    covariance and correlation are the textbook weighted Pearson ones:
    ``cov(t, d) = sum w (t - t̄)(d - d̄) / sum w`` and
    ``r = cov(t, d) / sqrt(cov(t, t) cov(d, d))``; the slope is
    ``cov(t, d) / cov(t, t)``. Each posterior sums to 1, so after ``n`` bins
    ``sum w = n``, and six running sums per zone give every figure exactly
    (no stored posteriors). Positions with NaN distance (bins off the model)
    carry no posterior mass.

    Kendall's tau-b of the bins' times ``t_k`` and median distances ``m_k``
    (the least ``d`` with ``sum_{x: d(x) <= d} P(x | k) >= 1/2``, the lower
    weighted median): ``S = sum_{j<k} sign(m_k - m_j)`` (times only
    increase) over ``sqrt(n0 (n0 - n_ties))`` with ``n0 = n (n - 1) / 2``
    and ``n_ties`` the pairs of equal ``m``; ``S`` grows by one sum per bin.
    """

    def __init__(self, zone_masks: np.ndarray, distance_cm: np.ndarray) -> None:
        self._mask = np.asarray(zone_masks, np.float64)
        d = np.asarray(distance_cm, np.float64)
        self._d = np.nan_to_num(d, nan=0.0)
        self._d2 = self._d**2
        # Each zone's bins by distance, for the posterior median of the distance.
        self._by_distance = np.argsort(self._d, axis=1, kind="stable")
        self._sorted_d = np.take_along_axis(self._d, self._by_distance, axis=1)
        self.reset()

    def reset(self) -> None:
        """A new event: no bins yet."""
        n_zones = self._mask.shape[0]
        self.n_bins = 0
        self._t0 = math.nan
        self._st = self._stt = 0.0
        self._sd, self._sdd, self._std, self._mass = (np.zeros(n_zones) for _ in range(4))
        self._medians: list[np.ndarray] = []
        self._concordance = np.zeros(n_zones)
        self._ties = np.zeros(n_zones)

    def add(self, t_s: float, posterior: np.ndarray) -> None:
        """Take one bin: its centre time ``t_s`` and its posterior, shape (n_bins,), summing to 1."""
        if self.n_bins == 0:
            self._t0 = t_s
        t = t_s - self._t0  # relative times keep the sums well conditioned
        d = self._d @ posterior
        self.n_bins += 1
        self._st += t
        self._stt += t * t
        self._sd += d
        self._sdd += self._d2 @ posterior
        self._std += t * d
        self._mass += self._mask @ posterior
        median = self.median_distance(posterior)
        if self._medians:
            earlier = np.array(self._medians)
            self._concordance += np.sign(median - earlier).sum(axis=0)
            self._ties += np.count_nonzero(median == earlier, axis=0)
        self._medians.append(median)

    def median_distance(self, posterior: np.ndarray) -> np.ndarray:
        """The posterior median of the distance to each zone (cm), shape (n_zones,).

        The lower weighted median: the least distance whose cumulative
        posterior mass reaches half the total.
        """
        mass = np.cumsum(np.asarray(posterior, np.float64)[self._by_distance], axis=1)
        at = [int(np.searchsorted(row, 0.5 * row[-1])) for row in mass]
        return self._sorted_d[np.arange(len(at)), at]

    def rank_correlation(self) -> np.ndarray:
        """Kendall's tau-b of the bins' times and median distances to each zone, shape (n_zones,).

        NaN before two bins, or where every median distance is the same.
        Reported for each bin; no rule judges it (the sequence rules judge
        the sequence filter's log odds).
        """
        n0 = self.n_bins * (self.n_bins - 1) / 2
        with np.errstate(invalid="ignore", divide="ignore"):
            tau = np.where(n0 - self._ties > 0, self._concordance / np.sqrt(n0 * (n0 - self._ties)), np.nan)
        return tau

    @property
    def mean_mass(self) -> np.ndarray:
        """Posterior mass in each zone averaged over the event's bins so far, shape (n_zones,)."""
        return self._mass / self.n_bins if self.n_bins else np.full(self._mass.shape, np.nan)

    def line(self) -> tuple[np.ndarray, np.ndarray]:
        """Weighted correlation of time and distance to each zone, and the line's slope (cm/s).

        Reported for each bin (the issue's line fit); no rule judges it.

        Returns
        -------
        correlation, slope_cm_s : ndarray of float64, shape (n_zones,)
            NaN before two bins, or where the distance does not vary.
        """
        n = self.n_bins
        var_t = n * self._stt - self._st**2
        cov = n * self._std - self._st * self._sd
        var_d = n * self._sdd - self._sd**2
        with np.errstate(invalid="ignore", divide="ignore"):
            ok = (var_t > 0) & (var_d > 1e-12 * np.maximum(n * self._sdd, 1e-300))
            r = np.where(ok, cov / np.sqrt(np.maximum(var_t * var_d, 1e-300)), np.nan)
            slope = np.where(ok, cov / var_t if var_t > 0 else np.nan, np.nan)
        return np.clip(r, -1.0, 1.0), slope


class ContentBin(NamedTuple):
    """One decoded bin of a candidate event and the event's measures so far.

    Attributes
    ----------
    t_s : float
        Data time of the bin's end (a bin that ended before the ripple's detection is decoded at it).
    onset_s : float
        The event's onset (its detection's threshold crossing; it names the event).
    start_s : float
        The event's start, where its first bin begins.
    index : int
        0 for the event's first bin.
    n_used : int
        The event's bins so far with at least ``min_spikes`` spikes: those the measures cover.
    posterior : ndarray of float64, shape (n_bins,)
    map_xy_cm : ndarray of float64, shape (2,)
    n_spikes : int
        Sorted units' spikes and marked spikes decoded in the bin.
    mean_mass : ndarray of float64, shape (n_zones,)
        Zone mass averaged over the event's bins so far (NaN before the first one used).
    rank_correlation : ndarray of float64, shape (n_zones,)
        Kendall's tau-b of time and median decoded distance to each zone over
        the bins so far (negative: moving towards the zone). Reported; no rule judges it.
    correlation, slope_cm_s : ndarray of float64, shape (n_zones,)
        Weighted correlation of time and distance to each zone over the bins
        so far, and the fitted line's slope (negative: moving towards the zone).
        Reported; no rule judges them.
    log_odds : ndarray of float64, shape (2, n_zones)
        The posterior log odds that the event's replay moves towards each zone
        (row 0) and away from it (row 1), over every bin so far
        (:meth:`decoder.inference.sequence_filter.SequenceFilter.log_odds`):
        what the sequence rules judge (``min_log_odds``).
    n_marks_over_cap : int
        Marked spikes of the bin beyond ``max_marks_per_bin``, left out.
    """

    t_s: float
    onset_s: float
    start_s: float
    index: int
    n_used: int
    posterior: np.ndarray
    map_xy_cm: np.ndarray
    n_spikes: int
    mean_mass: np.ndarray
    rank_correlation: np.ndarray
    correlation: np.ndarray
    slope_cm_s: np.ndarray
    log_odds: np.ndarray
    n_marks_over_cap: int = 0


class ReplayContent:
    """The second step schedule: a candidate event's short bins, decoded as the spikes arrive.

    Parameters
    ----------
    decoder : BayesDecoder
        Uniform prior, ``window_s`` the content bin (:meth:`for_model` builds it).
    unit_ids : ndarray of int64, shape (n_units,)
        The unit of each decoder row; spikes of other units are ignored here
        (the behavioural steps count them).
    zone_masks : ndarray of bool, shape (n_zones, n_bins)
    distance_cm : ndarray of float64, shape (n_zones, n_bins)
    max_event_s : float
        Bins are decoded from the event's start up to this long after it at most.
    lead_s : float, default 0.0
        The event's first bin starts this long before its LFP onset.
    min_spikes : int, default 1
        A bin with fewer spikes is decoded and reported but left out of the
        event's measures: with the uniform prior, an empty bin's posterior
        is the prior itself, whose median distance to a zone would pull every
        line towards the environment's middle (bins without spikes are left
        out of line fitting in common practice). The event goes on: it ends
        with the LFP, not with a lull in the spikes. Marked spikes count as spikes.
    marks : MarkModel, optional
        A fitted mark model: each bin adds the marks' log-likelihood and
        expected count of its marked spikes (:meth:`take_marks`), as a
        behavioural step does. The decoder may then have no unit at all.
    max_marks_per_bin : int, default 2000
        Marked spikes decoded per bin at most (``[marks] max_spikes_per_step``);
        beyond, the rest are left out and reported (``ContentBin.n_marks_over_cap``).
    speed_cm_s, slack_cm, stray_p
        The sequence filter's replay speed range (cm/s), slack (cm) and stray
        share (:class:`~decoder.inference.sequence_filter.SequenceFilter`); its
        distance levels are the environment's bins. Every bin of the event
        goes through it, those below ``min_spikes`` without their evidence.

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (100, 0), bin_cm=10)
    >>> rates = np.full((10, 10), 0.5) + 60.0 * np.eye(10)
    >>> masks = np.zeros((1, 10), bool); masks[0, 9] = True
    >>> content = ReplayContent.for_model(rates, track, track.valid_mask, masks, bin_s=0.02, max_event_s=0.1)
    >>> t = np.arange(0.001, 0.1, 0.004); units = np.minimum((t * 100).astype(np.int64), 9)
    >>> content.take_spikes(t, units)
    >>> content.begin(0.0)
    >>> last = content.due(0.1)[-1]
    >>> last.index, bool(last.correlation[0] < -0.9), bool(last.slope_cm_s[0] < 0)
    (4, True, True)
    """

    def __init__(self, decoder: BayesDecoder, unit_ids: np.ndarray, zone_masks: np.ndarray,
                 distance_cm: np.ndarray, max_event_s: float, lead_s: float = 0.0, min_spikes: int = 1,
                 marks: MarkModel | None = None, max_marks_per_bin: int = 2000,
                 speed_cm_s: tuple[float, float] = (150.0, 1000.0), slack_cm: float = 3.0,
                 stray_p: float = 0.1) -> None:
        if decoder.transition is not None:
            raise ValueError("content bins are decoded with the uniform prior: replay content jumps, and the "
                             "behavioural movement model does not hold; build the decoder with prior='uniform'")
        if not max_event_s >= decoder.window_s:
            raise ValueError(f"max_event_s ({max_event_s}) must hold at least one bin of {decoder.window_s} s")
        if not 0.0 <= lead_s <= max_event_s:
            raise ValueError(f"lead_s ({lead_s}) must lie within 0..max_event_s ({max_event_s}) s")
        ids = np.asarray(unit_ids, np.int64)
        self._known_ids, first = np.unique(ids, return_index=True)
        self._row_of_known = first.astype(np.int64)
        self.decoder = decoder
        self.bin_s = decoder.window_s
        self.max_event_s = float(max_event_s)
        self.lead_s = float(lead_s)
        self.min_spikes = int(min_spikes)
        self.measures = SequenceMeasures(zone_masks, distance_cm)
        self.sequence = SequenceFilter(distance_cm, decoder.valid_mask, level_cm=decoder.environment.bin_cm,
                                       bin_s=self.bin_s, speed_cm_s=speed_cm_s, slack_cm=slack_cm, stray_p=stray_p)
        self._n_units = ids.size
        self._t = np.zeros(0)
        self._rows = np.zeros(0, np.int64)
        self._onset_s = math.nan
        self._resting_bin = -1
        self._start_s = math.nan
        self._offset_s = math.inf
        self._next = 0
        self.marks = marks
        self.max_marks_per_bin = int(max_marks_per_bin)
        if marks is not None:
            self._mark_width = int(marks.group_channels_.max())
            self._mark_t = np.zeros(0)
            self._mark_rows = np.zeros(0, np.int64)
            self._mark_uv = np.zeros((0, self._mark_width), np.float32)
            self._mark_scratch = marks.scratch()
            self._mark_log_like = np.empty(marks.environment.n_bins)
            self._mark_one = np.empty(marks.environment.n_bins)
            # The marks' ground-process rate over one bin: the expected count a behavioural step subtracts.
            self._mark_expected = marks.expected_count(self.bin_s)

    @classmethod
    def for_model(cls, rate_maps_hz: np.ndarray, environment: Environment, valid_mask: np.ndarray,
                  zone_masks: np.ndarray, *, bin_s: float, max_event_s: float, lead_s: float = 0.0,
                  unit_ids: np.ndarray | None = None, rate_floor_hz: float = 0.01,
                  min_spikes: int = 1, marks: MarkModel | None = None,
                  max_marks_per_bin: int = 2000, **sequence: float | tuple[float, float]) -> ReplayContent:
        """Content decoding for rate maps (shape (n_units, n_bins), Hz) and ``marks``, with the uniform prior.

        ``sequence``: the sequence filter's ``speed_cm_s``, ``slack_cm``, ``stray_p`` (their defaults otherwise).
        """
        decoder = BayesDecoder(rate_maps_hz, environment, valid_mask, window_s=bin_s, prior="uniform",
                               zone_masks=zone_masks, rate_floor_hz=rate_floor_hz)
        ids = np.arange(decoder.n_units) if unit_ids is None else unit_ids
        return cls(decoder, ids, zone_masks, zone_distances_cm(environment, zone_masks), max_event_s, lead_s,
                   min_spikes, marks, max_marks_per_bin, **sequence)

    @property
    def active(self) -> bool:
        """Whether an event's bins are still to be decoded."""
        return not math.isnan(self._onset_s)

    def take_spikes(self, t_s: np.ndarray, unit_ids: np.ndarray) -> None:
        """Hold a batch of spikes (times in s and unit ids, shape (n,) each) for the events to come."""
        t = np.asarray(t_s, np.float64)
        if not t.size or not self._known_ids.size:
            return
        ids = np.asarray(unit_ids, np.int64)
        at = np.minimum(np.searchsorted(self._known_ids, ids), self._known_ids.size - 1)
        known = self._known_ids[at] == ids
        t, rows = t[known], self._row_of_known[at[known]]
        keep_from = t[-1] - self.max_event_s - self.lead_s - _HOLD_MARGIN_S
        old = int(np.searchsorted(self._t, keep_from))
        self._t = np.concatenate([self._t[old:], t])
        self._rows = np.concatenate([self._rows[old:], rows])
        if t.size and self._t.size > t.size and self._t[-t.size - 1] > t[0]:
            order = np.argsort(self._t, kind="stable")
            self._t, self._rows = self._t[order], self._rows[order]

    def take_marks(self, t_s: np.ndarray, rows: np.ndarray, marks_uv: np.ndarray) -> None:
        """Hold a batch of checked marked spikes for the events to come.

        Parameters
        ----------
        t_s : ndarray of float64, shape (n,)
            Times (s), sorted.
        rows : ndarray of int64, shape (n,)
            The mark model's row of each spike's group (``MarkModel.rows_of``,
            looked up once per batch by ``MarkStream.take``); -1, a group the
            model does not know, is left out here (the behavioural steps count them).
        marks_uv : ndarray of float32, shape (n, n_channels)
        """
        t = np.asarray(t_s, np.float64)
        if self.marks is None or not t.size:
            return
        rows = np.asarray(rows, np.int64)
        known = rows >= 0
        t, rows = t[known], rows[known]
        if not t.size:
            return
        given = np.asarray(marks_uv, np.float32)[known][:, : self._mark_width]
        # Narrower marks padded with zeros, as the behavioural window pads a group of fewer channels.
        uv = np.zeros((t.size, self._mark_width), np.float32)
        uv[:, : given.shape[1]] = given
        keep_from = t[-1] - self.max_event_s - self.lead_s - _HOLD_MARGIN_S
        old = int(np.searchsorted(self._mark_t, keep_from))
        self._mark_t = np.concatenate([self._mark_t[old:], t])
        self._mark_rows = np.concatenate([self._mark_rows[old:], rows])
        self._mark_uv = np.concatenate([self._mark_uv[old:], uv])
        if self._mark_t.size > t.size and self._mark_t[-t.size - 1] > t[0]:
            order = np.argsort(self._mark_t, kind="stable")
            self._mark_t, self._mark_rows = self._mark_t[order], self._mark_rows[order]
            self._mark_uv = self._mark_uv[order]

    @property
    def onset_s(self) -> float:
        """The current event's onset (NaN when none is active)."""
        return self._onset_s

    def begin(self, onset_s: float, resting_xy_cm: np.ndarray | None = None) -> None:
        """A candidate event detected with its LFP onset at ``onset_s`` (data time): a running one ends.

        Its bins start ``lead_s`` before the onset. ``resting_xy_cm`` (shape
        (2,)), the animal's tracked position, adds its own place's firing to
        every bin as a background (see the module's docstring); NaN, None or
        a place off the model's bins adds none.
        """
        self._resting_bin = -1
        if resting_xy_cm is not None:
            xy = np.asarray(resting_xy_cm, np.float64).reshape(1, 2)
            if np.all(np.isfinite(xy)):
                b = int(self.decoder.environment.bin_index(xy)[0])
                if b >= 0 and self.decoder.valid_mask[b]:
                    self._resting_bin = b
        self._onset_s = float(onset_s)
        self._start_s = self._onset_s - self.lead_s
        self._offset_s = math.inf
        self._next = 0
        self.measures.reset()
        self.sequence.reset()

    def close(self, offset_s: float) -> None:
        """The current event's LFP offset: no bin that begins at or after ``offset_s`` is decoded."""
        self._offset_s = float(offset_s)

    def end(self) -> None:
        """No more bins for the current event."""
        self._onset_s = math.nan

    def due(self, watermark_s: float, lfp_s: float = math.inf) -> list[ContentBin]:
        """Decode the current event's bins that are complete.

        Parameters
        ----------
        watermark_s : float
            The spike stream's time: a bin is decoded once it is past the bin's end.
        lfp_s : float, default inf
            The LFP's time: until :meth:`close` gives the offset, a bin is
            decoded only once the LFP has passed its start with the event
            still on (inf: do not wait for it).
        """
        out: list[ContentBin] = []
        while self.active:
            start = self._start_s + self._next * self.bin_s
            stop = start + self.bin_s
            if start >= self._offset_s or stop - self._start_s > self.max_event_s + 1e-9:
                self.end()
                break
            if stop > watermark_s or (self._offset_s == math.inf and start > lfp_s):
                break
            out.append(self._decode(start, stop))
            self._next += 1
        return out

    def _decode(self, start: float, stop: float) -> ContentBin:
        a, b = np.searchsorted(self._t, (start, stop), side="left")
        counts = np.bincount(self._rows[a:b], minlength=self._n_units)
        rows = np.flatnonzero(counts).astype(np.int64)
        fired = counts[rows].astype(np.float64)
        n_marks = over_cap = 0
        rest = self._resting_bin
        log_like, expected = None, None
        if self.marks is not None:
            c, d = np.searchsorted(self._mark_t, (start, stop), side="left")
            n_marks = min(int(d - c), self.max_marks_per_bin)
            over_cap = int(d - c) - n_marks
            mark_rows, mark_uv = self._mark_rows[c:c + n_marks], self._mark_uv[c:c + n_marks]
            if rest < 0:
                self.marks.log_intensity_sum(mark_rows, mark_uv, self._mark_log_like, self._mark_scratch)
            else:
                marks_with_background(self.marks, mark_rows, mark_uv, rest, self._mark_log_like,
                                      self._mark_scratch, self._mark_one)
            log_like, expected = self._mark_log_like, self._mark_expected
        if rest >= 0 and rows.size:
            units = units_background(self.decoder.rates_hz, rows, fired, rest)
            log_like = units if log_like is None else log_like + units
            expected = np.zeros_like(units) if expected is None else expected
        step = self.decoder.decode(rows, fired, log_like, expected)
        n_spikes = step.n_spikes + n_marks
        m = self.measures
        used = n_spikes >= self.min_spikes
        if used:
            m.add(0.5 * (start + stop), step.posterior)
        self.sequence.step(step.posterior, observed=used)
        r, slope = m.line()
        return ContentBin(stop, self._onset_s, self._start_s, self._next, m.n_bins, step.posterior, step.map_xy_cm,
                          n_spikes, m.mean_mass, m.rank_correlation(), r, slope,
                          self.sequence.log_odds(), over_cap)
