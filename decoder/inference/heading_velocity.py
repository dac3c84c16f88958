"""The heading ring's movement model that knows angular velocity: a joint state of heading and turning speed.

A head turns smoothly: over 20 ms its angular velocity hardly changes,
while over a few hundred ms it changes sign. A random walk on the heading
alone must be wide enough to follow the fastest turns, and then lets the
prior spread both ways at every step. :class:`HeadingVelocity` instead
carries the angular velocity in the filter's state, as the constant-velocity
model of target tracking does (Bar-Shalom, Li and Kirubarajan 2001, ch. 6):
the velocity is an Ornstein-Uhlenbeck process of stationary s.d.
``sd_deg_s`` and correlation time ``time_constant_s``, discretised on
``N_VELOCITY_BINS`` bins, and the heading turns by the velocity times the
step. The decoder's compiled step (``_kernels.predict_heading_velocity``,
``_kernels.carry_heading_velocity``, transition kind
``VELOCITY_TRANSITION``) predicts the joint state and reports its marginal
over the velocity as the heading's posterior, so everything downstream
(point estimate, HPD, zones, triggers) is unchanged. Its parameters are
learned from the tracked heading (``decoder.encoding.heading_motion``).

References
----------
Bar-Shalom Y, Li XR, Kirubarajan T (2001). Estimation with Applications to
Tracking and Navigation. Wiley (the discretised white-noise acceleration
and Singer models, ch. 6; from memory).

Uhlenbeck GE, Ornstein LS (1930). On the theory of the Brownian motion.
Phys Rev 36:823-841 (the process and its exact one-step transition).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from decoder.inference.checks import positive_finite

#: Angular-velocity bins of the joint state: 21 over +-3 s.d. is about a third
#: of an s.d. a bin, finer than one step's change of velocity at 20 ms steps
#: with a 0.3 s correlation time (0.35 s.d.), for a state of 60 x 21 on 6-degree bins.
N_VELOCITY_BINS = 21

#: The velocity bins reach this many stationary s.d. either side of 0.
VELOCITY_SPAN_SD = 3.0


def _normal_cdf(z: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.vectorize(math.erf, otypes=[np.float64])(z / math.sqrt(2.0)))


@dataclass(frozen=True)
class HeadingVelocity:
    """An Ornstein-Uhlenbeck angular velocity that turns the heading.

    Parameters
    ----------
    sd_deg_s : float
        Stationary s.d. of the angular head velocity, degrees per second.
    time_constant_s : float
        Its correlation time, s.

    Examples
    --------
    >>> model = HeadingVelocity(sd_deg_s=90.0, time_constant_s=0.3)
    >>> velocity, transition, prior, shift = model.discretised(step_s=0.02, bin_deg=6.0)
    >>> transition.shape, bool(np.allclose(transition.sum(axis=1), 1.0)), round(float(prior @ velocity), 9)
    ((21, 21), True, 0.0)
    """

    sd_deg_s: float
    time_constant_s: float

    def __post_init__(self) -> None:
        positive_finite("sd_deg_s", self.sd_deg_s)
        positive_finite("time_constant_s", self.time_constant_s)

    def discretised(self, step_s: float, bin_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The velocity bins and the arrays of the decoder's joint state for steps of ``step_s``.

        Over one step the velocity goes from ``w`` to ``N(phi w, q^2)``,
        ``phi = exp(-step_s / time_constant_s)``, ``q = sd sqrt(1 - phi^2)``
        (the exact transition, Uhlenbeck and Ornstein 1930); each row of the
        transition is that normal's mass in each velocity bin (bins split
        half-way between centres, the outer two reaching to infinity).

        Parameters
        ----------
        step_s : float
            Decoding step, s.
        bin_deg : float
            Heading bin width, degrees.

        Returns
        -------
        velocity_deg_s : ndarray of float64, shape (m,)
            Bin centres, evenly spaced over ``+- VELOCITY_SPAN_SD`` s.d.
        transition : ndarray of float64, shape (m, m)
            Row-stochastic velocity transition per step.
        prior : ndarray of float64, shape (m,)
            Its stationary distribution (sums to 1): the velocity of a fresh
            start and of the uniform jump.
        shift_bins : ndarray of float64, shape (m,)
            Heading turn per step of each velocity bin, in heading bins.
        """
        step_s = positive_finite("step_s", step_s)
        bin_deg = positive_finite("bin_deg", bin_deg)
        sd = self.sd_deg_s
        velocity = np.linspace(-VELOCITY_SPAN_SD * sd, VELOCITY_SPAN_SD * sd, N_VELOCITY_BINS)
        phi = math.exp(-step_s / self.time_constant_s)
        q = sd * math.sqrt(-math.expm1(-2.0 * step_s / self.time_constant_s))
        edges = np.concatenate([[-np.inf], 0.5 * (velocity[1:] + velocity[:-1]), [np.inf]])
        cdf = _normal_cdf((edges[np.newaxis, :] - phi * velocity[:, np.newaxis]) / q)
        transition = np.diff(cdf, axis=1)
        transition /= transition.sum(axis=1, keepdims=True)
        # The stationary distribution: the left eigenvector for eigenvalue 1.
        values, vectors = np.linalg.eig(transition.T)
        prior = np.abs(np.real(vectors[:, np.argmin(np.abs(values - 1.0))]))
        prior /= prior.sum()
        return velocity, np.ascontiguousarray(transition), prior, velocity * step_s / bin_deg
