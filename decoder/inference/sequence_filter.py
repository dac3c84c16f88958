"""The posterior log odds that a replay moves towards a zone (or away from it), updated bin by bin.

A candidate event's content bins are decoded one at a time with the uniform
prior (``decoder.session.replay_content``). :class:`SequenceFilter` reads
each bin's whole likelihood over positions, not a summary of it, and weighs
three hypotheses about the replayed place's distance ``d`` to each zone (the
``zone_distances_cm`` grid: along the track on a track or maze, straight in
an arena), discretised in levels of ``level_cm``:

* **towards**: from bin to bin ``d`` falls by a move drawn uniformly from
  ``speed_cm_s`` times the bin's length, widened by ``slack_cm`` on either
  side (a path that bends away from the shortest route, the decoding's
  jitter by a bin). Moves that would carry ``d`` below 0 are lost: a
  sequence that has reached the zone and stays there is no longer moving
  towards it, and this hypothesis pays for it;
* **away**: ``d`` rises likewise (moves beyond the grid's far end are lost);
* **no sequence**: ``d`` stays within ``slack_cm``, or, as likely, jumps to
  a level drawn from the start distribution, so that a stationary or a
  fragmented event reads as neither.

Each hypothesis is a hidden Markov model over the levels whose start is the
distribution of ``d`` under the uniform prior over positions (each level's
share of the decodable positions). A bin's emission at level ``d`` is its
likelihood averaged over the positions at that distance (uniform within the
level set), mixed with a uniform share ``stray_p``: a bin whose spikes come
from something else than the replay (the resting animal's own cells beyond
what the background explains, a stray burst) then costs a hypothesis a
bounded amount instead of ending it. Bins with too few spikes are passed
without evidence (time goes on, the moves apply). The forward algorithm
gives each hypothesis's log-likelihood of the bins so far
(``decoder.inference._sequence_kernels``), and

``log_odds[0] = log p(bins | towards) - log((p(bins | away) + p(bins | none)) / 2)``

is the posterior log odds that the replay moves towards the zone when
"towards" and "not towards" are equally likely a priori (the two others
sharing the rest equally); ``log_odds[1]`` is the same for away. A rule
that acts when it exceeds a threshold is a sequential test in Wald's sense
(Wald 1945, Ann. Math. Stat. 16:117): it decides as soon as the evidence is
strong, after few bins for a clear sequence, after more for a faint one.
Other prior odds shift the log odds by their logarithm, which a threshold
absorbs.

The speed range's default, 150-1000 cm/s, is the common-practice figure of
replay running 10-20 times faster than a rat runs (15-50 cm/s); from memory,
not from a bench.
"""

from __future__ import annotations

import copy
import math

import numpy as np

from decoder.inference._sequence_kernels import HYPOTHESES, sequence_step, sequence_step_numpy

#: Probability that the no-sequence hypothesis stays (within the slack) rather than jumps, per bin.
STAY_WEIGHT = 0.5


def uniform_moves(low_cm: float, high_cm: float, level_cm: float) -> tuple[np.ndarray, int]:
    """A move uniform on ``[low_cm, high_cm]`` as probabilities over whole levels.

    Level ``j`` covers the moves ``[(j - 1/2) level_cm, (j + 1/2) level_cm)``;
    its probability is the share of the interval that falls there.

    Returns
    -------
    p : ndarray of float64, shape (K,)
        Sums to 1.
    lo : int
        The level of ``p[0]``.
    """
    if not high_cm >= low_cm:
        raise ValueError(f"a move's range must not be empty, got [{low_cm}, {high_cm}] cm")
    lo = int(math.floor(low_cm / level_cm + 0.5))
    hi = int(math.floor(high_cm / level_cm + 0.5))
    if high_cm == low_cm:
        p = np.zeros(hi - lo + 1)
        p[-1] = 1.0
        return p, lo
    j = np.arange(lo, hi + 1)
    edges_lo = np.maximum((j - 0.5) * level_cm, low_cm)
    edges_hi = np.minimum((j + 0.5) * level_cm, high_cm)
    p = np.maximum(edges_hi - edges_lo, 0.0) / (high_cm - low_cm)
    return p / p.sum(), lo


def _kernel_of(backend: str):
    """The compiled step (``"numba"``) or its numpy twin (``"numpy"``)."""
    if backend not in ("numba", "numpy"):
        raise ValueError(f"backend must be 'numba' or 'numpy', got {backend!r}")
    return sequence_step if backend == "numba" else sequence_step_numpy


class SequenceFilter:
    """Three forward filters per zone over the replayed place's distance to it, one content bin at a time.

    Parameters
    ----------
    distance_cm : ndarray of float64, shape (n_zones, n_bins)
        Each position's distance to each zone (NaN: none; a zone without positions gets NaN odds).
    valid_mask : ndarray of bool, shape (n_bins,)
        The positions the decoder decodes over.
    level_cm : float
        Width of a distance level (the environment's bin).
    bin_s : float
        The content bins' length.
    speed_cm_s : (float, float), default (150, 1000)
        The replay's speed range along the distance (see the module docstring).
    slack_cm : float, default 3.0
        Widening of the moves on either side; the no-sequence hypothesis stays within it.
    stray_p : float, default 0.1
        Share of a bin's likelihood spread uniformly over the levels, in [0, 1).
    backend : {"numba", "numpy"}, default "numba"
        The compiled kernel or its numpy twin.

    Examples
    --------
    >>> d = np.arange(10.0)[None, :] * 10.0       # one zone; positions 0, 10, ..., 90 cm from it
    >>> f = SequenceFilter(d, np.ones(10, bool), level_cm=10.0, bin_s=0.02, speed_cm_s=(300, 700))
    >>> for x in (9, 8, 6, 5, 3):                 # the replayed place nears the zone at about 500 cm/s
    ...     f.step(np.eye(10)[x] * 0.9 + 0.01, observed=True)
    >>> towards, away = f.log_odds()[:, 0]
    >>> bool(towards > 3 and away < -3)
    True
    """

    def __init__(self, distance_cm: np.ndarray, valid_mask: np.ndarray, *, level_cm: float, bin_s: float,
                 speed_cm_s: tuple[float, float] = (150.0, 1000.0), slack_cm: float = 3.0,
                 stray_p: float = 0.1, backend: str = "numba") -> None:
        d = np.atleast_2d(np.asarray(distance_cm, np.float64))
        valid = np.asarray(valid_mask, bool)
        if valid.shape != (d.shape[1],):
            raise ValueError(f"valid_mask must have one flag per position ({d.shape[1]}), got shape {valid.shape}")
        if not (level_cm > 0 and bin_s > 0):
            raise ValueError(f"level_cm and bin_s must be positive, got {level_cm!r} and {bin_s!r}")
        lo, hi = (float(v) for v in speed_cm_s)
        if not 0 <= lo <= hi < math.inf:
            raise ValueError(f"speed_cm_s must be a range 0 <= low <= high cm/s, got {speed_cm_s!r}")
        if not 0 <= slack_cm < math.inf:
            raise ValueError(f"slack_cm must be a distance >= 0 cm, got {slack_cm!r}")
        if not 0 <= stray_p < 1:
            raise ValueError(f"stray_p must lie in [0, 1), got {stray_p!r}")
        self._kernel = _kernel_of(backend)
        self.level_cm, self.bin_s = float(level_cm), float(bin_s)
        self.speed_cm_s, self.slack_cm, self.stray_p = (lo, hi), float(slack_cm), float(stray_p)
        on = valid[None, :] & np.isfinite(d)
        level = np.where(on, np.floor(np.nan_to_num(d) / level_cm + 0.5), -1).astype(np.int64)
        self.n_levels_ = np.array([row.max() + 1 if (row >= 0).any() else 0 for row in level], np.int64)
        width = max(1, int(self.n_levels_.max(initial=0)))  # a session may have no zones at all
        count = np.zeros((d.shape[0], width))
        for z, row in enumerate(level):
            count[z] = np.bincount(row[row >= 0], minlength=width)
        self.level_of_bin_ = level
        self.start_ = count / np.maximum(count.sum(axis=1, keepdims=True), 1.0)
        with np.errstate(divide="ignore"):
            self.inv_count_ = np.where(count > 0, 1.0 / count, 0.0)
        # Towards: the distance falls by speed * bin_s, widened by the slack on either side.
        self.step_p_, self.step_lo_ = uniform_moves(-(hi * bin_s + slack_cm), -lo * bin_s + slack_cm, level_cm)
        self.stay_p_, stay_lo = uniform_moves(-slack_cm, slack_cm, level_cm)
        assert stay_lo == -(self.stay_p_.size - 1) // 2
        self._alpha = np.zeros((d.shape[0], len(HYPOTHESES), width))
        self._log_lik = np.zeros((d.shape[0], len(HYPOTHESES)))
        self._log_odds = np.zeros((2, d.shape[0]))
        self._scratch = np.empty((2, width))
        self.reset()

    def reset(self) -> None:
        """A new event: every hypothesis starts from the start distribution, no bins seen."""
        self._alpha[:] = self.start_[:, None, :]
        self._log_lik[:] = 0.0
        self._log_lik[self.n_levels_ == 0] = math.nan
        self._log_odds[:] = np.where(self.n_levels_ == 0, math.nan, 0.0)
        self.n_steps = 0

    def step(self, posterior: np.ndarray, observed: bool) -> None:
        """Take the event's next bin: its posterior over positions (n_bins,), summing to 1.

        ``observed`` False passes the bin without its evidence (too few spikes); time still goes on.
        """
        self._kernel(np.asarray(posterior, np.float64), bool(observed), self.n_steps > 0, self.level_of_bin_,
                     self.inv_count_, self.start_, self.n_levels_, self.stray_p, self.step_p_, self.step_lo_,
                     self.stay_p_, STAY_WEIGHT, self._alpha, self._log_lik, self._log_odds, self._scratch)
        self.n_steps += 1

    def copy(self, backend: str | None = None) -> SequenceFilter:
        """The same filter, reset, on ``backend`` (``"numba"`` or ``"numpy"``; None keeps this one's)."""
        twin = copy.copy(self)
        if backend is not None:
            twin._kernel = _kernel_of(backend)
        twin._alpha, twin._log_lik, twin._log_odds, twin._scratch = (
            a.copy() for a in (self._alpha, self._log_lik, self._log_odds, self._scratch))
        twin.reset()
        return twin

    @property
    def log_likelihood(self) -> np.ndarray:
        """Each hypothesis's log-likelihood of the bins so far, shape (n_zones, 3) (``HYPOTHESES`` order)."""
        return self._log_lik.copy()

    def log_odds(self) -> np.ndarray:
        """Posterior log odds of towards and of away against the rest, shape (2, n_zones) (equal prior odds).

        0 before any bin; NaN for a zone without positions or where no hypothesis explains the bins.
        """
        return self._log_odds.copy()
