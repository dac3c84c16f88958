"""Bayesian decoding of position from one window of spike counts.

:class:`BayesDecoder` turns the spike counts of one window into a posterior
over the environment's bins, either with a uniform prior (each window on its
own) or with a state-space prior (a causal filter: the previous posterior,
moved by a Gaussian random walk, is the prior of the next window).
:class:`RandomWalk` is that transition. The arithmetic lives in
``decoder.inference._kernels``; this module validates inputs, precomputes what does
not change between windows and summarises each posterior.

References
----------
Zhang K, Ginzburg I, McNaughton BL, Sejnowski TJ (1998). Interpreting
neuronal population activity by reconstruction: unified framework with
application to hippocampal place cells. J Neurophysiol 79:1017-1044.

Brown EN, Frank LM, Tang D, Quirk MC, Wilson MA (1998). A statistical
paradigm for neural spike train decoding applied to position prediction
from ensemble firing patterns of rat hippocampal place cells. J Neurosci
18:7411-7425.
"""

from __future__ import annotations

import logging
import math
from typing import Any, NamedTuple

import numpy as np

from decoder.inference import _kernels
from decoder.inference.checks import bin_mask, kernel_set, positive_finite
from decoder.inference.floored_rates import FlooredRates, floored_rates
from decoder.inference.heading_velocity import HeadingVelocity
from decoder.inference.random_walk import RandomWalk
from decoder.space.environments import Environment
from decoder.space.headings import HeadingRing

logger = logging.getLogger(__name__)

#: Probability mass of the highest-posterior-density region reported per step.
HPD_MASS = 0.95

#: The drift per step (and each displacement folded into the velocity) is
#: at most this many s.d. of the walk: the tilted walk stays well inside the
#: walk's cut-off (``random_walk.TRUNCATE_SD``), and a jump of the decoded
#: point between two modes counts as a fast run, not as a teleport.
MAX_DRIFT_SD = 2.0

#: Largest spike count of one unit in one window; beyond this the input is
#: not spike data (a unit firing at 1 kHz for 1000 s would reach it).
MAX_COUNT = 1e6

PRIORS = ("uniform", "state_space")
POINT_ESTIMATES = ("map", "mean")
_INT64 = np.dtype(np.int64)
_FLOAT64 = np.dtype(np.float64)


class DecodedStep(NamedTuple):
    """The decoder's answer for one window.

    Attributes
    ----------
    posterior : ndarray of float64, shape (n_bins,), read-only
        Probability of each bin; sums to 1, exactly 0 outside the valid bins.
    map_bin : int
        Bin of highest posterior probability (the first one on a tie).
    map_xy_cm : ndarray of float64, shape (2,), read-only
        Centre of ``map_bin``.
    mean_xy_cm : ndarray of float64, shape (2,), read-only
        Posterior mean of the bin centres. On a track graph this average of
        positions may lie off the track (between two arms).
    hpd95_size : float
        Size of the 95% highest-posterior-density region: cm² in an arena,
        cm on a track or graph.
    peak_prob : float
        Posterior probability of ``map_bin``.
    zone_mass : ndarray of float64, shape (n_zones,), read-only
        Posterior mass inside each zone.
    n_spikes : int
        Spikes in the window.
    decoded_xy_cm : ndarray of float64, shape (2,), read-only
        The decoded position: ``map_xy_cm`` or ``mean_xy_cm``, as the
        decoder's ``point_estimate`` says (for the filter chosen at fit time
        from held-out learning data, ``decoder.encoding.calibration``). The
        session scores, shows and exports this one; rules about the MAP
        use ``map_bin``.

    Notes
    -----
    The arrays are views of one buffer that belongs to this step alone
    (the decoder allocates one per window and never writes to it again), so
    a step may be kept for as long as needed. A named tuple rather than a
    frozen dataclass: just as immutable, and built for a fraction of the
    cost, once per decoded window.
    """

    posterior: np.ndarray
    map_bin: int
    map_xy_cm: np.ndarray
    mean_xy_cm: np.ndarray
    hpd95_size: float
    peak_prob: float
    zone_mass: np.ndarray
    n_spikes: int
    decoded_xy_cm: np.ndarray


class HeldOutPass(NamedTuple):
    """What :meth:`BayesDecoder.decode_held_out` keeps of each window (``n_steps`` of them).

    Attributes
    ----------
    points_cm : ndarray of float64, shape (n_steps, 4)
        MAP centre (x, y) and posterior mean (x, y) of each window.
    above_true : ndarray of float64, shape (n_steps,)
        Posterior mass of the bins more probable than the window's known
        bin: the known bin lies in the HPD region of mass ``m`` when this is
        below ``m``. NaN where the bin is unknown.
    n_hpd : ndarray of int64, shape (n_steps,)
        Bins in each window's 95 % HPD region.
    kept : ndarray of float64, shape (n_kept, n_bins)
        The posteriors of the windows asked for, in order.
    """

    points_cm: np.ndarray
    above_true: np.ndarray
    n_hpd: np.ndarray
    kept: np.ndarray


class BayesDecoder:
    """Posterior over position from the spike counts of one window.

    Under the independent-Poisson model a unit with rate map ``lambda_i(x)``
    fires ``n_i`` spikes in a window of ``window_s`` with probability
    ``Poisson(n_i; window_s * lambda_i(x))`` (Zhang et al. 1998). With
    ``prior="uniform"`` each window is decoded on its own. With
    ``prior="state_space"`` the decoder is a causal filter (Brown et al.
    1998): the first window after construction or :meth:`reset` uses the
    uniform prior over the valid bins, every later one uses the previous
    posterior moved one step by a :class:`RandomWalk`. Should that prior
    have no mass where the spikes point (the product underflows), the window
    is decoded with the uniform prior instead and ``underflow_resets`` counts it.
    With ``uniform_weight > 0`` the walk is mixed with a jump to anywhere, so
    the prior has mass everywhere and that cannot happen; with
    ``likelihood_temperature > 1`` every window's log-likelihood is divided
    by it, which widens the posterior of overdispersed, correlated counts
    (``decoder.encoding.calibration``). Both together, with windows that do
    not overlap, are the filter of ``decoder.inference.filtering.filter_posteriors``.

    Parameters
    ----------
    rate_maps_hz : ndarray of float64, shape (n_units, n_bins), or FlooredRates
        Firing-rate map of each unit (Hz); must be finite and non-negative
        on the valid bins (other bins are ignored, NaN allowed there). Or
        the maps as ``decoder.inference.floored_rates.floored_rates`` made
        them for these valid bins and ``rate_floor_hz``, when several
        decoders share them.
        ``n_units`` may be 0 for a decoder that takes its whole likelihood
        from waveform marks (``mark_log_like`` of :meth:`decode`).
    environment : Environment
    valid_mask : ndarray of bool, shape (n_bins,)
        Bins to decode over, normally the place model's visited bins; it is
        combined with ``environment.valid_mask``. Other bins get posterior 0.
    window_s : float
        Length of the spike-count window in seconds.
    prior : {"uniform", "state_space"}, default "uniform"
    random_walk_sd_cm : float, default 3.0
        S.d. of the random walk per decoded window (cm), for ``"state_space"``.
    uniform_weight : float, default 0.0
        Probability per window of a jump to a uniformly drawn valid bin, in
        [0, 1), for ``"state_space"``: the prior is ``(1 - uniform_weight)``
        times the moved posterior plus ``uniform_weight / n_valid`` on every
        valid bin. Posterior values below ``_kernels.UNIFORM_CUTOFF *
        uniform_weight / n_valid`` are then stored as 0.
    likelihood_temperature : float, default 1.0
        The log-likelihood is divided by it (> 0; > 1 widens the posterior).
    drift_gain : float, default 0.0
        In [0, 1], for ``"state_space"``: the walk is tilted towards
        ``drift_gain`` times the decoded velocity (``_kernels.drift_tilt``),
        so the prior moves with a running animal or a turning head; 0 is
        the plain walk, bit for bit. The velocity is the decoder's own: the
        displacement of the posterior mean per window, averaged
        exponentially, never the tracker's.
    velocity_time_constant_s : float, default 1.0
        Time constant of that average (s of data time).
    heading_velocity : HeadingVelocity, optional
        On a heading ring with ``"state_space"``: the filter's state is
        heading and angular velocity together, the velocity this
        Ornstein-Uhlenbeck process and the heading turning by it
        (``decoder.inference.heading_velocity``), in place of the random
        walk; the posterior reported is the heading's (the joint state's
        marginal). Not with a drift.
    zone_masks : ndarray of bool, shape (n_zones, n_bins), optional
        Bins of each target zone; the posterior mass in each is reported.
    rate_floor_hz : float, default 0.01
        Rates below this are raised to it, so that a spike where a unit never
        fired lowers the likelihood there instead of ruling the bin out
        (common practice).
    point_estimate : {"map", "mean"}, default "map"
        Which of the MAP bin's centre and the posterior mean each step
        reports as its ``decoded_xy_cm``.
    backend : {"numba", "numpy"}, default "numba"
        Compiled kernels, or their plain numpy twins (the benchmark baseline).

    Attributes
    ----------
    valid_mask : ndarray of bool, shape (n_bins,)
        The bins decoded over (``valid_mask & environment.valid_mask``).
    n_units, n_bins, n_zones : int
    transition : RandomWalk or None
        The state-space transition; ``None`` for the uniform prior.
    underflow_resets : int
        Windows in which the state-space prior underflowed and was replaced
        by the uniform prior.

    Examples
    --------
    >>> from decoder.space.environments import LinearTrack
    >>> track = LinearTrack((0, 0), (100, 0), bin_cm=10)
    >>> rates = np.full((2, 10), 1.0); rates[0, 2] = 20.0; rates[1, 7] = 20.0
    >>> dec = BayesDecoder(rates, track, track.valid_mask, window_s=0.25)
    >>> step = dec.decode(np.array([0]), np.array([3]))
    >>> step.map_bin, step.map_xy_cm.tolist()
    (2, [25.0, 0.0])
    """

    def __init__(
        self,
        rate_maps_hz: np.ndarray | FlooredRates,
        environment: Environment,
        valid_mask: np.ndarray,
        window_s: float,
        *,
        prior: str = "uniform",
        random_walk_sd_cm: float = 3.0,
        uniform_weight: float = 0.0,
        likelihood_temperature: float = 1.0,
        drift_gain: float = 0.0,
        velocity_time_constant_s: float = 1.0,
        heading_velocity: HeadingVelocity | None = None,
        zone_masks: np.ndarray | None = None,
        rate_floor_hz: float = 0.01,
        point_estimate: str = "map",
        backend: str = "numba",
    ) -> None:
        n_bins = environment.n_bins
        self.environment = environment
        self.window_s = positive_finite("window_s", window_s)
        if prior not in PRIORS:
            raise ValueError(f"prior must be one of {PRIORS}, got {prior!r}")
        self.prior = prior
        self.random_walk_sd_cm = positive_finite("random_walk_sd_cm", random_walk_sd_cm)
        self.rate_floor_hz = positive_finite("rate_floor_hz", rate_floor_hz)
        self.likelihood_temperature = positive_finite("likelihood_temperature", likelihood_temperature)
        if (
            isinstance(uniform_weight, bool)
            or not isinstance(uniform_weight, (int, float, np.integer, np.floating))
            or not 0 <= uniform_weight < 1
        ):
            raise ValueError(f"uniform_weight must be a probability in [0, 1), got {uniform_weight!r}")
        self.uniform_weight = float(uniform_weight)
        if isinstance(drift_gain, bool) or not isinstance(drift_gain, (int, float, np.integer, np.floating)) or not (
            0 <= drift_gain <= 1
        ):
            raise ValueError(f"drift_gain must be a number in [0, 1], got {drift_gain!r}")
        self.drift_gain = float(drift_gain)
        self.velocity_time_constant_s = positive_finite("velocity_time_constant_s", velocity_time_constant_s)
        if heading_velocity is not None and not (
            isinstance(heading_velocity, HeadingVelocity) and isinstance(environment, HeadingRing)
            and prior == "state_space" and self.drift_gain == 0.0
        ):
            raise ValueError(
                "heading_velocity must be a HeadingVelocity, for a heading ring decoded with the state-space "
                f"prior and no drift; got {heading_velocity!r} with {type(environment).__name__}, prior {prior!r} "
                f"and drift_gain {self.drift_gain:g}"
            )
        self.heading_velocity = heading_velocity
        if point_estimate not in POINT_ESTIMATES:
            raise ValueError(f"point_estimate must be one of {POINT_ESTIMATES}, got {point_estimate!r}")
        self.point_estimate = point_estimate
        # Where decoded_xy_cm starts in a step's buffer: the MAP centre, or the mean after it.
        self._decoded_at = n_bins + (2 if point_estimate == "mean" else 0)
        self.backend = backend
        self._k = kernel_set(backend)

        valid = bin_mask("valid_mask", valid_mask, n_bins) & environment.valid_mask
        if not valid.any():
            raise ValueError("no bin is valid: valid_mask and the environment's valid_mask share no bin")
        # The kernels get a writable array (one compiled type); users a read-only view.
        self._valid = valid
        self.valid_mask = valid.view()
        self.valid_mask.setflags(write=False)

        if isinstance(rate_maps_hz, FlooredRates):
            rates = rate_maps_hz
            if rates.rate_floor_hz != self.rate_floor_hz or not np.array_equal(rates.valid, valid):
                raise ValueError("the floored rates were made for other valid bins or another rate floor")
        else:
            rates = floored_rates(rate_maps_hz, valid, self.rate_floor_hz)
        self.n_units, self.n_bins = rates.floored_hz.shape
        # Both terms of the log-likelihood are linear in them, so dividing
        # here tempers every window, and the in-place updates stay exact.
        # By 1.0 it would change no bit, so it is left out (and the
        # logarithm shared: no kernel writes to it).
        self._log_rate = rates.log_floored
        if self.likelihood_temperature != 1.0:
            self._log_rate = rates.log_floored / self.likelihood_temperature
        self._floored_hz = rates.floored_hz
        with np.errstate(over="ignore"):
            self._expected_total = self.window_s * rates.total_hz / self.likelihood_temperature
        if not np.all(np.isfinite(self._expected_total)):
            raise ValueError(
                "rate_maps_hz sum to an infinite expected spike count; check the units (Hz) of the maps"
            )

        if zone_masks is None:
            zone_masks = np.zeros((0, n_bins), bool)
        zones = np.asarray(zone_masks)
        if zones.ndim != 2 or zones.shape[1] != n_bins or zones.dtype != np.bool_:
            raise ValueError(
                f"zone_masks must be a boolean array of shape (n_zones, {n_bins}), "
                f"got {zones.dtype} of shape {zones.shape}"
            )
        self.n_zones = zones.shape[0]
        self._bin_size = float(environment.bin_size)
        self._zone_start = np.concatenate([[0], np.cumsum(zones.sum(axis=1))]).astype(np.int64)
        self._zone_bins = np.ascontiguousarray(np.nonzero(zones)[1], dtype=np.int64)

        self.transition = None
        if prior == "state_space":
            self.transition = RandomWalk(environment, valid, self.random_walk_sd_cm, backend)
        centers = np.asarray(environment.bin_centers_cm, dtype=np.float64)
        self._centers_x = np.ascontiguousarray(centers[:, 0])
        self._centers_y = np.ascontiguousarray(centers[:, 1])
        self._uniform = valid.astype(np.float64)

        # decode_step's arguments between the window and the previous
        # posterior, and after it; the arrays it keeps between calls are
        # ``_state``, ``_unit_counts`` and ``_log_like``.
        walk = self.transition
        walk_arrays, dense = (np.zeros(1),) * 3, np.zeros((1, 1))
        joint_predicted = None
        if walk is None:
            kind = _kernels.NO_TRANSITION
        elif heading_velocity is not None:
            # The joint state's arrays ride in the walk's slots (see _kernels.decode_step).
            _, dense, velocity_prior, shift_bins = heading_velocity.discretised(self.window_s, environment.bin_cm)
            joint = np.zeros(n_bins * velocity_prior.size)
            kind, walk_arrays = _kernels.VELOCITY_TRANSITION, (shift_bins, velocity_prior, joint)
            joint_predicted = np.zeros(joint.size)
        elif walk._transition is None:
            kind, walk_arrays = _kernels.GRID_TRANSITION, (walk._kernel_1d, walk._mask_f, walk._inv_norm)
        else:
            kind, dense = _kernels.DENSE_TRANSITION, walk._transition
        ny, nx = environment.grid_shape if kind == _kernels.GRID_TRANSITION else (1, n_bins)
        reach = walk_arrays[0].size // 2
        self._state = np.zeros(_kernels.STATE_SIZE, np.int64)
        self._state[_kernels.STATE_UPDATES] = -1
        self._drift = np.zeros(_kernels.DRIFT_SIZE)
        if walk is not None:
            self._drift[_kernels.DRIFT_GAIN] = self.drift_gain
            self._drift[_kernels.DRIFT_ALPHA] = -math.expm1(-self.window_s / self.velocity_time_constant_s)
            self._drift[_kernels.DRIFT_INV_VAR] = 1.0 / walk.sd_cm**2
            self._drift[_kernels.DRIFT_MAX_CM] = MAX_DRIFT_SD * walk.sd_cm
            self._drift[_kernels.DRIFT_BIN_CM] = environment.bin_cm
        self._unit_counts = np.zeros((3, self.n_units))
        self._log_like = np.empty(n_bins)
        self._args_before = (
            MAX_COUNT,
            self._log_rate,
            self._expected_total,
            self._valid,
            self._uniform,
            self.uniform_weight,
            self.uniform_weight / float(valid.sum()),
            kind,
            ny,
            nx,
            *walk_arrays,
            walk.interior if walk is not None else np.zeros(1, bool),
            dense,
            self._centers_x,
            self._centers_y,
            self._zone_start,
            self._zone_bins,
            HPD_MASS,
            self._state,
            self._drift,
            self._unit_counts,
            np.empty(self.n_units, np.int64),  # unit_rows
            self._log_like,
        )
        self._args_after = (
            np.empty(n_bins),  # predicted
            np.empty(n_bins),  # scratch
            # grid_scratch: two copies of the grid padded by the walk's reach
            # (zeros: padding that is never written must hold numbers)
            np.zeros((2 * ny + 2 * reach) * (nx + 2 * reach)) if joint_predicted is None else joint_predicted,
        )
        self._out_size = n_bins + 4 + self.n_zones
        # The last posterior's own buffer (posterior, MAP and mean centres,
        # zone masses), or a placeholder before the first step; read-only
        # like every buffer handed out, so that the kernel compiles once.
        self._previous = np.zeros(self._out_size)
        self._previous.setflags(write=False)
        # The marks' terms of a window (rows: log-likelihood, expected count,
        # their sum with the units' part), or no rows for a window without.
        self._mark_terms = np.zeros((3, n_bins))
        self._no_marks = np.zeros((0, n_bins))
        self.underflow_resets = 0

    def reset(self) -> None:
        """Forget the previous posterior: the next window uses the uniform prior.

        The log-likelihood is recomputed afresh at the next window too, so a
        reset decoder gives the same numbers as a new one.
        """
        self._state[_kernels.STATE_UPDATES] = -1
        self._state[_kernels.STATE_HAS_PREVIOUS] = 0

    def _read_counts(self, fired_rows: Any, fired_counts: Any) -> tuple[np.ndarray, np.ndarray]:
        # The pipeline passes contiguous int64 rows and float64 counts: those
        # go straight through; values are checked inside decode_step.
        if (
            type(fired_rows) is np.ndarray
            and type(fired_counts) is np.ndarray
            and fired_rows.dtype is _INT64
            and fired_counts.dtype is _FLOAT64
            and fired_rows.ndim == 1
            and fired_counts.ndim == 1
            and fired_rows.shape == fired_counts.shape
            and fired_rows.flags.c_contiguous
            and fired_counts.flags.c_contiguous
        ):
            return fired_rows, fired_counts
        rows = np.asarray(fired_rows)
        counts = np.asarray(fired_counts)
        if rows.ndim != 1 or counts.ndim != 1:
            raise ValueError(
                f"fired_rows and fired_counts must be one-dimensional, got shapes {rows.shape} and {counts.shape}"
            )
        if rows.size != counts.size:
            raise ValueError(f"fired_rows has {rows.size} entries but fired_counts has {counts.size}")
        if rows.size == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.float64)
        if rows.dtype.kind not in "iu":
            raise ValueError(f"fired_rows must hold integer model rows, got dtype {rows.dtype}")
        if counts.dtype.kind not in "iuf":
            raise ValueError(f"fired_counts must be numeric, got dtype {counts.dtype}")
        return np.ascontiguousarray(rows, dtype=np.int64), np.ascontiguousarray(counts, dtype=np.float64)

    def _bad_entry(self, rows: np.ndarray, counts: np.ndarray, bad: int) -> ValueError:
        row, count = int(rows[bad]), float(counts[bad])
        if not 0 <= row < self.n_units:
            return ValueError(f"fired_rows holds row {row}, outside the model's rows 0..{self.n_units - 1}")
        if not np.isfinite(count):
            return ValueError(f"fired_counts holds a NaN or infinite count ({count}) for row {row}")
        if count < 0:
            return ValueError(f"fired_counts holds a negative count ({count:g}) for row {row}; spike counts are >= 0")
        if count >= MAX_COUNT:
            return ValueError(f"fired_counts holds {count:g} spikes for row {row}, more than {MAX_COUNT:g}")
        return ValueError(f"fired_counts must hold whole numbers of spikes, got {count:g} for row {row}")

    def _marks(self, mark_log_like: np.ndarray | None, mark_expected: np.ndarray | None) -> np.ndarray:
        """The kernel's ``mark_terms`` for a window: the marks' two terms, tempered, or no rows."""
        if mark_log_like is None and mark_expected is None:
            return self._no_marks
        terms = self._mark_terms
        for row, name, value in ((0, "mark_log_like", mark_log_like), (1, "mark_expected", mark_expected)):
            arr = np.asarray(value, dtype=np.float64) if value is not None else None
            if arr is None or arr.shape != (self.n_bins,):
                raise ValueError(
                    f"{name} must be a float array of shape ({self.n_bins},) given together with the other; "
                    f"got {None if arr is None else arr.shape}"
                )
            if not np.all(np.isfinite(arr[self._valid])):
                raise ValueError(f"{name} holds a NaN or infinite value on a valid bin; floor the intensities")
            # Tempered like the units' terms, whose rates were divided at construction.
            np.divide(arr, self.likelihood_temperature, out=terms[row])
        return terms

    @property
    def rates_hz(self) -> np.ndarray:
        """The rate maps the likelihood uses, floored at ``rate_floor_hz`` (Hz), shape (n_units, n_bins); read-only."""
        return self._floored_hz

    def decode(self, fired_rows: np.ndarray, fired_counts: np.ndarray, mark_log_like: np.ndarray | None = None,
               mark_expected: np.ndarray | None = None) -> DecodedStep:
        """Decode one window.

        Parameters
        ----------
        fired_rows : ndarray of int, shape (k,)
            Model rows (``0..n_units-1``) of the units that fired; repeats add up.
        fired_counts : ndarray of int or float, shape (k,)
            Their spike counts in the window (whole numbers, >= 0).
        mark_log_like : ndarray of float64, shape (n_bins,), optional
            The window's log-likelihood from other encoding models, added to
            the units' Poisson terms before the prior: for waveform marks
            the sum over the window's marked spikes of ``log lambda(x, m)``
            (``decoder.encoding.mark_model``). Finite on the valid bins.
        mark_expected : ndarray of float64, shape (n_bins,), optional
            Its expected-count term, subtracted: the marks' ground-process
            rate integrated over the window. Given with ``mark_log_like``.
            Both are divided by ``likelihood_temperature`` like the units' terms.

        Returns
        -------
        DecodedStep
            Its arrays are views of one buffer of its own, which no later
            call writes to, so a caller may keep the step.

        Raises
        ------
        ValueError
            For arrays of the wrong shape or type, rows out of range, or
            negative, fractional or non-finite counts. The decoder's state is
            unchanged when this is raised.

        Notes
        -----
        Consecutive windows mostly share their spikes, so the log-likelihood
        is updated where counts changed rather than recomputed (afresh at
        least every ``_kernels.LIKELIHOOD_REFRESH_STEPS`` windows and after
        :meth:`reset`). The result therefore depends, within rounding (about
        1e-13 relative), on the windows decoded since the last reset, and is
        the same, bit for bit, whenever the same windows are decoded in the
        same order from construction or a reset, as live runs and their
        replays are.
        """
        rows, counts = self._read_counts(fired_rows, fired_counts)
        marks = self._marks(mark_log_like, mark_expected)
        buf = np.empty(self._out_size)
        status, map_bin, n_hpd, n_spikes, peak = self._k.decode_step(
            rows, counts, *self._args_before, self._previous, marks, *self._args_after, buf
        )
        if status >= 0:
            raise self._bad_entry(rows, counts, status)
        return self._step(buf, status, map_bin, n_hpd, n_spikes, peak)

    def decode_held(self, held_t_s: np.ndarray, held_rows: np.ndarray, start: int, stop: int,
                    t_end_s: float, mark_log_like: np.ndarray | None = None,
                    mark_expected: np.ndarray | None = None) -> tuple[DecodedStep, int]:
        """Count and decode the window ``(t_end_s - window_s, t_end_s]`` of held spikes, in one call.

        The same step, bit for bit, as counting the window's spikes per row
        and passing them to :meth:`decode`; for a caller that keeps its
        spikes in sorted arrays (``binning.SpikeWindow``).

        Parameters
        ----------
        held_t_s : ndarray of float64, shape (n,)
            Spike times, sorted over ``start:stop``.
        held_rows : ndarray of int64, shape (n,)
            Model row (``0..n_units-1``) of each spike.
        start, stop : int
            The held part of the arrays.
        t_end_s : float
        mark_log_like, mark_expected : ndarray of float64, shape (n_bins,), optional
            The window's terms from waveform marks, as in :meth:`decode`.

        Returns
        -------
        step : DecodedStep
        first : int
            Index of the first held spike inside the window or after it:
            the spikes before it are older than this window.

        Raises
        ------
        ValueError
            For a spike of the window whose row is out of range (the
            decoder's state is then unchanged).
        """
        marks = self._marks(mark_log_like, mark_expected)
        buf = np.empty(self._out_size)
        status, map_bin, n_hpd, n_spikes, peak, first = self._k.decode_window_step(
            held_t_s, held_rows, start, stop, t_end_s, self.window_s,
            *self._args_before, self._previous, marks, *self._args_after, buf,
        )
        if status >= 0:
            raise ValueError(
                f"held spike {status} has row {int(held_rows[status])}, outside the model's rows 0..{self.n_units - 1}"
            )
        return self._step(buf, status, map_bin, n_hpd, n_spikes, peak), first

    def decode_held_out(self, fired_rows: np.ndarray, fired_counts: np.ndarray, step_start: np.ndarray,
                        true_bins: np.ndarray, keep: np.ndarray, mark_log_like: np.ndarray | None = None,
                        mark_expected: np.ndarray | None = None) -> HeldOutPass:
        """Decode consecutive windows and score each against a known bin, in one compiled call.

        The same windows, bit for bit, as :meth:`decode` called on each in
        turn (the posterior carried from one to the next); for calibration,
        which decodes thousands of held-out windows per pass and keeps only
        these figures of each.

        Parameters
        ----------
        fired_rows : ndarray of int64, shape (n_fired,)
        fired_counts : ndarray of float64, shape (n_fired,)
            Every window's fired rows and counts (as :meth:`decode` takes
            them), end to end; window ``i`` holds ``step_start[i]:step_start[i + 1]``.
        step_start : ndarray of int64, shape (n_steps + 1,)
        true_bins : ndarray of int64, shape (n_steps,)
            The known bin of each window; -1 where unknown.
        keep : ndarray of bool, shape (n_steps,)
            Windows whose whole posterior is returned.
        mark_log_like : ndarray of float64, shape (n_steps, n_bins), optional
            Each window's ``mark_log_like`` (as in :meth:`decode`).
        mark_expected : ndarray of float64, shape (n_bins,), optional
            The marks' expected count, the same for every window.

        Returns
        -------
        HeldOutPass

        Raises
        ------
        ValueError
            As :meth:`decode` does, for the first window with a bad entry or
            mark terms that are not finite on a valid bin.
        """
        n_steps = true_bins.shape[0]
        if mark_log_like is None:
            log_like, expected, terms = np.zeros((0, self.n_bins)), np.zeros(self.n_bins), self._no_marks
        else:
            log_like = np.ascontiguousarray(mark_log_like, dtype=np.float64)
            expected = np.ascontiguousarray(mark_expected, dtype=np.float64)
            if log_like.shape != (n_steps, self.n_bins) or expected.shape != (self.n_bins,):
                raise ValueError(f"mark_log_like must have shape ({n_steps}, {self.n_bins}) and mark_expected "
                                 f"({self.n_bins},); got {log_like.shape} and {expected.shape}")
            if not (np.isfinite(log_like[:, self._valid]).all() and np.isfinite(expected[self._valid]).all()):
                raise ValueError("mark_log_like or mark_expected holds a NaN or infinite value on a valid bin; "
                                 "floor the intensities")
            terms = self._mark_terms
        buffers = np.empty((3, self._out_size))
        buffers[2] = self._previous
        held = HeldOutPass(np.empty((n_steps, 4)), np.full(n_steps, np.nan), np.empty(n_steps, np.int64),
                           np.empty((int(np.count_nonzero(keep)), self.n_bins)))
        window, bad, underflows, last = self._k.decode_held_out(
            fired_rows, fired_counts, step_start, true_bins, keep, log_like, expected, self.likelihood_temperature,
            self.transition is not None, self._args_before, buffers, terms, self._args_after, *held,
        )
        self._note_underflows(underflows)
        if last != 2:
            self._previous = buffers[last].copy()
            self._previous.setflags(write=False)
        if window >= 0:
            a = step_start[window]
            raise self._bad_entry(fired_rows[a:], fired_counts[a:], bad)
        return held

    def _note_underflows(self, n: int) -> None:
        """Count ``n`` windows whose state-space prior underflowed."""
        if not n:
            return
        self.underflow_resets += n
        # Loud once, then quiet: a pathological stream could repeat this at every step.
        log = logger.warning if self.underflow_resets == n else logger.debug
        log(
            "state-space prior underflowed (no prior mass where the spikes point); "
            "decoding this window with the uniform prior (%d so far)",
            self.underflow_resets,
        )

    def _step(self, buf: np.ndarray, status: int, map_bin: int, n_hpd: int, n_spikes: int,
              peak: float) -> DecodedStep:
        """The DecodedStep of a window the kernel decoded into ``buf``."""
        if status == _kernels.STEP_UNDERFLOW:
            self._note_underflows(1)
        # Read-only from here on: the caller gets views of it, and the next
        # step reads it as the previous posterior.
        buf.setflags(write=False)
        if self.transition is not None:
            self._previous = buf
        n, d = self.n_bins, self._decoded_at
        # Positional, in field order: keywords cost a microsecond here.
        return DecodedStep(
            buf[:n], map_bin, buf[n : n + 2], buf[n + 2 : n + 4], n_hpd * self._bin_size, peak, buf[n + 4 :], n_spikes,
            buf[d : d + 2],
        )
