"""The decoding steps of a session: which close when, the spikes they count, and their decoding.

Steps end at whole multiples of the step length on the spike clock,
``t_k = k * step_s``, so that a live run and its replay close the same steps
whatever the first message was. Step ``k`` closes once the spike stream's
watermark (its newest timestamp or heartbeat) has passed ``t_k`` by the
allowed lateness; the window of step ``k`` is ``(t_k - window_s, t_k]``.
"""

from __future__ import annotations

import logging
import math

import numpy as np

from decoder.config import DecoderSettings
from decoder.encoding.heading_motion import heading_velocity_of
from decoder.encoding.mark_model import MarkModel
from decoder.encoding.movement import default_uniform_weight
from decoder.encoding.place_model import PlaceModel
from decoder.inference.binning import SpikeWindow
from decoder.inference.decoding import BayesDecoder, DecodedStep
from decoder.session.marks import MarkStream
from decoder.space.environments import Environment

logger = logging.getLogger(__name__)

#: Steps closed by one message at most; beyond it the schedule skips ahead
#: (counted as ``steps_skipped``), so one message can never stall the loop.
MAX_STEPS_PER_MESSAGE = 500


def build_decoder(model: PlaceModel, environment: Environment, settings: DecoderSettings,
                  zone_masks: np.ndarray, rate_floor_hz: float, marks: MarkModel | None = None,
                  max_marks_per_step: int | None = None) -> BayesDecoder:
    """The session's decoder for a fitted model, as ``settings.method`` asks.

    ``"sliding_window"``: windows of ``window_s`` with ``settings.prior`` and
    ``random_walk_sd_cm``. ``"filter"``: windows of ``step_s`` (each spike
    counted once), the model's learned movement (walk s.d. for the
    environment's bins, uniform jump) and ``settings.likelihood_temperature``,
    or, where that is unset, the model's temperature fitted for ``step_s``
    (``PlaceModel.likelihood_temperature``; fitted here on first use, right
    after the model's fit), the point estimate chosen with that fit
    (``PlaceModel.point_estimate``) as the steps' decoded position, and the
    drift of the walk towards the decoded velocity fitted with it
    (``PlaceModel.drift``; ``settings.drift_gain`` overrides its gain), or on
    a heading ring without a drift the joint state of heading and angular
    velocity the same fit chose (``encoding.heading_motion``); the
    sliding window reports the MAP. With ``marks`` the filter's temperature,
    point estimate and drift are fitted afresh on held-out steps decoded
    with their waveform marks as well (``PlaceModel.calibrate``), since the
    marks' terms are tempered with the units', unless the model holds such a
    fit already (a loaded model file keeps its fits, not its held-out spikes). A model without a learned movement model (saved
    by an earlier version) falls back to ``random_walk_sd_cm`` and the
    default jump, one that cannot fit a temperature to 1 and the MAP, each with a warning.

    Parameters
    ----------
    model : PlaceModel
        Fitted.
    environment : Environment
    settings : DecoderSettings
    zone_masks : ndarray of bool, shape (n_zones, n_bins)
    rate_floor_hz : float
    marks : MarkModel, optional
        The fitted mark model that decodes beside the units.
    max_marks_per_step : int, optional
        ``[marks] max_spikes_per_step``: a held-out step weighs at most as many marks as a live one.

    Returns
    -------
    BayesDecoder
    """
    common = dict(zone_masks=zone_masks, rate_floor_hz=rate_floor_hz, prior=settings.prior)
    if settings.method == "sliding_window":
        return BayesDecoder(model.rate_maps_hz_, environment, model.visited_mask_, window_s=settings.window_s,
                            random_walk_sd_cm=settings.random_walk_sd_cm, **common)
    try:
        movement = model.movement_model(settings.step_s)
        walk_sd_cm = movement.walk_sd_cm(environment.bin_cm)
        uniform_weight = movement.uniform_weight
    except ValueError as exc:
        logger.warning("%s; the filter uses random_walk_sd_cm = %g cm instead", exc, settings.random_walk_sd_cm)
        walk_sd_cm = settings.random_walk_sd_cm
        uniform_weight = default_uniform_weight(settings.step_s)
    temperature, point_estimate, (drift_gain, time_constant_s) = settings.likelihood_temperature, "map", (0.0, 1.0)
    fitted = model.temperature_fits_.get(float(settings.step_s))
    if marks is not None and not (fitted is not None and fitted.with_marks):
        try:
            model.calibrate(settings.step_s, marks, max_marks_per_step)
        except ValueError as exc:
            logger.warning("%s; the filter is calibrated without the marks", exc)
    try:
        point_estimate = model.point_estimate(settings.step_s)
        drift_gain, time_constant_s = model.drift(settings.step_s)
        if temperature is None:
            temperature = model.likelihood_temperature(settings.step_s)
    except ValueError as exc:
        logger.warning("%s; the filter decodes the MAP with likelihood_temperature = %g and no drift", exc,
                       temperature or 1.0)
        temperature = temperature or 1.0
    if settings.drift_gain is not None:
        drift_gain = settings.drift_gain
    heading_velocity = heading_velocity_of(model.temperature_fits_.get(settings.step_s)) if drift_gain == 0 else None
    return BayesDecoder(
        model.rate_maps_hz_, environment, model.visited_mask_, window_s=settings.step_s,
        random_walk_sd_cm=walk_sd_cm, uniform_weight=uniform_weight, likelihood_temperature=temperature,
        drift_gain=drift_gain, velocity_time_constant_s=time_constant_s, heading_velocity=heading_velocity,
        point_estimate=point_estimate, **common,
    )


def model_problem(model: PlaceModel, environment: Environment, marks_enabled: bool) -> str | None:
    """Why ``model`` cannot decode a session in ``environment``, or None if it can.

    A model decodes from its units, from its mark model (``PlaceModel.mark_model_``)
    where the session's ``[marks]`` is enabled, or from both; one with
    neither would decode nothing but its prior, step after step.

    Parameters
    ----------
    model : PlaceModel
        Loaded from a file or fitted.
    environment : Environment
        The session's.
    marks_enabled : bool
        Whether the session's ``[marks]`` table is enabled.

    Returns
    -------
    str or None
        A sentence that says what to do, for a refusal.
    """
    if not hasattr(model, "rate_maps_hz_"):
        return "the model was never fitted; fit it (or load a fitted one) first"
    if model.environment != environment:
        if type(model.environment) is type(environment) and model.environment.bin_cm != environment.bin_cm:
            return (f"the model's bins are {model.environment.bin_cm} cm, the session's "
                    f"{environment.bin_cm} cm; use a model learnt with this config's environment")
        return (f"the model was learnt in another environment ({model.environment!r}, the session's is "
                f"{environment!r}); use a model learnt with this config's environment")
    ids = np.asarray(model.unit_ids_)
    rates = np.asarray(model.rate_maps_hz_)
    if ids.ndim != 1 or rates.shape != (ids.size, environment.n_bins) \
            or np.shape(model.visited_mask_) != (environment.n_bins,):
        return (f"the model's maps have shape {rates.shape} for {ids.size} units; "
                f"this environment needs ({ids.size}, {environment.n_bins})")
    if not np.all(np.isfinite(rates)) or np.any(rates < 0):
        return "the model's rate maps hold negative or non-finite rates"
    marks = model.mark_model_
    if marks is not None and marks.environment != environment:
        return ("the model's mark model was learnt in another environment; use a model learnt with this config's "
                "environment")
    if ids.size == 0:
        if marks is None:
            return ("the model has no units and no mark model, so it has nothing to decode from; use the model "
                    "file of a session that learnt units or marks")
        if not marks_enabled:
            return ("the model decodes from waveform marks only (it has no units) and this config's [marks] is "
                    "not enabled; set enabled = true under [marks] to decode with it")
    return None


def filter_figures(model: PlaceModel, decoder: BayesDecoder) -> dict:
    """The filter's readiness figures: its movement model and drift, temperature and decoded position.

    Beside the settings the decoder runs with, the held-out figures of the
    fit behind them (``decoder.encoding.calibration.TemperatureFit``) where
    the model made one for this step: the 95 % HPD coverage (and the tracked
    noise s.d. it was scored with), and the median
    error of the MAP and of the posterior mean that chose ``point_estimate``.

    Parameters
    ----------
    model : PlaceModel
        Fitted.
    decoder : BayesDecoder
        The filter :func:`build_decoder` made for ``model``.

    Returns
    -------
    dict of str to float or str
    """
    figures = {
        "step_s": decoder.window_s,
        "walk_sd_cm": decoder.random_walk_sd_cm,
        "uniform_weight": decoder.uniform_weight,
        "likelihood_temperature": decoder.likelihood_temperature,
        "point_estimate": decoder.point_estimate,
        "drift_gain": decoder.drift_gain,
        "velocity_time_constant_s": decoder.velocity_time_constant_s,
        "angular_velocity_sd_deg_s": getattr(decoder.heading_velocity, "sd_deg_s", 0.0),
        "angular_velocity_time_constant_s": getattr(decoder.heading_velocity, "time_constant_s", 0.0),
    }
    fit = model.temperature_fits_.get(decoder.window_s)
    if fit is not None:
        figures.update(held_out_coverage=fit.coverage, held_out_map_median_cm=fit.map_median_cm,
                       held_out_mean_median_cm=fit.mean_median_cm, held_out_with_marks=fit.with_marks,
                       held_out_tracked_noise_sd=fit.tracked_noise_sd)
    return figures


class StepSchedule:
    """Which decoding steps a watermark closes.

    Parameters
    ----------
    step_s : float
        Step length (s); step ``k`` ends at ``k * step_s``.
    allowed_lateness_s : float
        How far past a step's end the watermark must be before it closes.
    """

    def __init__(self, step_s: float, allowed_lateness_s: float) -> None:
        self.step_s = float(step_s)
        self.allowed_lateness_s = float(allowed_lateness_s)
        self.next_k: int | None = None

    def start_at(self, t_s: float) -> None:
        """Make the first step the first one ending after ``t_s``."""
        self.next_k = math.floor(t_s / self.step_s) + 1

    def step_end_s(self, k: int) -> float:
        return k * self.step_s

    def stop(self) -> None:
        """No step is due until the next :meth:`start_at` (the spike clock restarted)."""
        self.next_k = None

    def due(self, watermark_s: float) -> list[int]:
        """Steps that close at this watermark, in order; each is returned once."""
        if self.next_k is None:
            return []
        last_k = math.floor((watermark_s - self.allowed_lateness_s) / self.step_s + 1e-9)
        if last_k < self.next_k:
            return []
        ks = list(range(self.next_k, last_k + 1))
        self.next_k = last_k + 1
        return ks


class DecodingSteps:
    """Spike intake and step decoding for one installed model.

    Parameters
    ----------
    decoder : BayesDecoder
    unit_ids : ndarray of int64, shape (n_units,)
        The unit of each decoder row.
    schedule : StepSchedule
        The session's schedule; kept across models.
    counters : dict of str to int
        The session's counters: ``unknown_units``, ``late_spikes`` and
        ``steps_skipped`` are counted here.
    marks : MarkStream, optional
        The session's marked spikes, when a mark model decodes beside the units.
    """

    def __init__(self, decoder: BayesDecoder, unit_ids: np.ndarray, schedule: StepSchedule,
                 counters: dict[str, int], marks: MarkStream | None = None) -> None:
        ids = np.asarray(unit_ids, np.int64)
        # Sorted for the compiled lookup; should a model name a unit twice, its last row takes the spikes.
        self._known_ids, last_in_reversed = np.unique(ids[::-1], return_index=True)
        self._row_of_known = (ids.size - 1 - last_in_reversed).astype(np.int64)
        self.decoder = decoder
        self.schedule = schedule
        self.counters = counters
        self.n_units = int(ids.size)
        self.window = SpikeWindow(self.n_units, decoder.window_s)
        self.marks = marks

    def take_spikes(self, t_s: np.ndarray, unit_ids: np.ndarray) -> None:
        """Hold a batch of spikes (``t_s`` sorted, shape (n,) each) for the steps still to close."""
        next_k = self.schedule.next_k
        closed_until_s = self.schedule.step_end_s(next_k - 1) if next_k is not None else -math.inf
        n_unknown, n_late = self.window.add_units(t_s, unit_ids, self._known_ids, self._row_of_known, closed_until_s)
        if n_unknown:
            self.counters["unknown_units"] += n_unknown
        if n_late:
            self.counters["late_spikes"] += n_late

    def take_marks(self, batch: tuple[np.ndarray, np.ndarray, np.ndarray]
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """Hold a batch of checked marked spikes (times, groups, marks) for the steps still to close.

        Returns the spikes of the groups the mark model knows as times, model
        rows and marks (``MarkStream.take``), or None without a mark model.
        """
        if self.marks is None:
            return None
        next_k = self.schedule.next_k
        return self.marks.take(batch, self.schedule.step_end_s(next_k - 1) if next_k is not None else -math.inf)

    def due(self, watermark_s: float) -> list[int]:
        """The steps this watermark closes, at most ``MAX_STEPS_PER_MESSAGE`` (the newest)."""
        ks = self.schedule.due(watermark_s)
        if len(ks) > MAX_STEPS_PER_MESSAGE:
            self.counters["steps_skipped"] += len(ks) - MAX_STEPS_PER_MESSAGE
            ks = ks[-MAX_STEPS_PER_MESSAGE:]
            # The skipped steps break the filter's chain of priors.
            self.decoder.reset()
        return ks

    def decode(self, k: int) -> tuple[float, DecodedStep]:
        """Decode step ``k``: its end time (s) and the decoder's output."""
        t_s = self.schedule.step_end_s(k)
        if self.marks is None:
            return t_s, self.window.decode(self.decoder, t_s)
        return t_s, self.window.decode(self.decoder, t_s, *self.marks.terms(t_s))

    def restart(self) -> None:
        """Start afresh after the spike source restarted: no prior, no held spikes."""
        self.decoder.reset()
        self.window = SpikeWindow(self.n_units, self.window.window_s)
        if self.marks is not None:
            self.marks.restart()
