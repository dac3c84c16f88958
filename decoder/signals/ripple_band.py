"""The ripple band: a causal band-pass run chunk by chunk, its state carried across chunks.

A Butterworth band-pass designed with ``scipy.signal.butter`` as second-order
sections; the detector's compiled kernel (``_kernels.ripple_chunk``) runs it
in the form and state layout of ``scipy.signal.sosfilt``, the state carried
from one chunk to the next, so that a signal filtered in chunks of any size
equals the whole signal filtered at once by ``sosfilt`` (to rounding;
``tests/test_ripple_band.py`` checks it).

Group delay is what an online detector pays for the filter: the envelope of
the output lags the zero-phase envelope by about the group delay at the
band's centre. A low order keeps it short; :func:`group_delay_s` measures
it, and ``bench/ripples.py`` reports it.

References
----------
S. Butterworth (1930), "On the theory of filter amplifiers", Wireless
Engineer 7:536-541 (the maximally flat design ``scipy.signal.butter`` makes; citation from memory).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

__all__ = ["RippleBand", "design_ripple_band", "group_delay_s"]


def design_ripple_band(rate_hz: float, band_hz: tuple[float, float], order: int) -> np.ndarray:
    """The band-pass as second-order sections.

    Parameters
    ----------
    rate_hz : float
        Sample rate (Hz); the band must lie below its half.
    band_hz : (float, float)
        Pass band (Hz); 150-250 Hz for ripples (common practice).
    order : int
        Butterworth order of the low-pass prototype; the band-pass has twice
        as many poles, in ``order`` sections.

    Returns
    -------
    ndarray of float64, shape (order, 6)

    Raises
    ------
    ValueError
        For a band that is not inside (0, rate_hz / 2), or an order below 1.
    """
    low, high = (float(f) for f in band_hz)
    if not (0 < low < high < rate_hz / 2):
        raise ValueError(f"the ripple band {band_hz} Hz must lie inside (0, {rate_hz / 2:g}) Hz, "
                         f"half the sample rate of {rate_hz:g} Hz; raise the rate or lower the band")
    if isinstance(order, bool) or not isinstance(order, int) or order < 1:
        raise ValueError(f"the filter order must be a whole number of at least 1, got {order!r}")
    return signal.butter(order, (low, high), btype="bandpass", fs=rate_hz, output="sos")


def group_delay_s(sos: np.ndarray, freq_hz: float, rate_hz: float) -> float:
    """Group delay of ``sos`` at ``freq_hz`` (s): minus the derivative of the phase.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    freq_hz, rate_hz : float

    Returns
    -------
    float
    """
    df = 0.5
    _, h = signal.sosfreqz(sos, worN=np.array([freq_hz - df, freq_hz + df]), fs=rate_hz)
    dphase = np.angle(h[1] / h[0])
    return float(-dphase / (2 * math.pi * 2 * df))


class RippleBand:
    """The ripple band-pass of every channel: its sections and the state carried from chunk to chunk.

    Parameters
    ----------
    rate_hz : float
        Sample rate (Hz).
    n_channels : int
    band_hz : (float, float), default (150, 250)
    order : int, default 2

    Attributes
    ----------
    sos_ : ndarray, shape (order, 6)
        The sections.
    zi_ : ndarray, shape (order, 2, n_channels)
        The state carried from chunk to chunk (``sosfilt``'s layout for ``axis=0``);
        the detector's compiled kernel updates it in place.

    Examples
    --------
    >>> band = RippleBand(1500.0, 4)
    >>> band.sos_.shape, band.zi_.shape
    ((2, 6), (2, 2, 4))
    """

    def __init__(self, rate_hz: float, n_channels: int, band_hz: tuple[float, float] = (150.0, 250.0),
                 order: int = 2) -> None:
        self.rate_hz = float(rate_hz)
        self.n_channels = int(n_channels)
        self.band_hz = band_hz
        self.order = order
        self.sos_ = design_ripple_band(self.rate_hz, band_hz, order)
        self.zi_ = np.zeros((self.sos_.shape[0], 2, self.n_channels))

    def reset(self) -> None:
        """Forget the past (after a gap in the signal): the filter starts from rest."""
        self.zi_[...] = 0.0

    def group_delay_s(self) -> float:
        """Group delay at the band's centre (s)."""
        return group_delay_s(self.sos_, 0.5 * (self.band_hz[0] + self.band_hz[1]), self.rate_hz)
