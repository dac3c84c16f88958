"""What the pipeline hands back for each message: decoded steps, learning progress, notices."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from decoder.inference.decoding import DecodedStep
from decoder.session.triggers import TriggerEvent


class StepOutput(NamedTuple):
    """One decoded step and what it triggered.

    Attributes
    ----------
    k : int
        Step number; the step ends at ``t_s = k * step_s``.
    t_s : float
        Data time of the step's end (s).
    step : DecodedStep
        The decoder's output (posterior, MAP, zone masses, ...).
    tracked_xy_cm, true_xy_cm : ndarray, shape (2,)
        Tracked position at ``t_s`` and, on a simulated rig, the true one
        (NaN when unknown).
    tracked_speed_cm_s : float
    error_cm : float
        Distance from the decoded position (``step.decoded_xy_cm``: the MAP,
        or the posterior mean where the fit chose it) to the true position
        (or the tracked one without truth); NaN when neither is known.
    events : tuple of TriggerEvent
    false_events : tuple of bool
        For each event, whether the animal was farther than the false margin
        from the zone (only judged where a position is known).
    armed : bool

    Notes
    -----
    A named tuple rather than a frozen dataclass: just as immutable, and
    built for a fraction of the cost, once per decoded step.
    """

    k: int
    t_s: float
    step: DecodedStep
    tracked_xy_cm: np.ndarray
    true_xy_cm: np.ndarray
    tracked_speed_cm_s: float
    error_cm: float
    events: tuple[TriggerEvent, ...]
    false_events: tuple[bool, ...]
    armed: bool


@dataclass(frozen=True, slots=True)
class LearningProgress:
    """How learning is going, every ``pipeline.LEARNING_REPORT_S`` of data time.

    Attributes
    ----------
    t_s : float
    occupancy_s : ndarray, shape (n_bins,)
        Running time per bin so far (s).
    coverage : float
        Fraction of the environment's valid bins visited so far.
    n_tuned_units : int or None
        Spatially tuned units, refreshed every ``pipeline.TUNING_REPORT_S``
        (None before); an estimate on bins about ``smooth_cm`` wide
        (``PlaceModel.n_tuned_units_so_far``), the exact count comes with the fit.
    learn_elapsed_s : float
    """

    t_s: float
    occupancy_s: np.ndarray
    coverage: float
    n_tuned_units: int | None
    learn_elapsed_s: float


@dataclass(frozen=True, slots=True)
class Notice:
    """A change of the session worth telling the operator and the log."""

    kind: str
    t_s: float
    detail: dict = field(default_factory=dict)
