"""The offline ripple reference: zero-phase band-pass and Hilbert envelope on a whole session.

What the online detector is judged against (``tests/test_ripple_detector.py``,
``bench/ripples.py``): it sees the whole signal at once, so its filter has no
delay (``scipy.signal.filtfilt`` runs the band-pass forwards and backwards)
and its envelope is the magnitude of the analytic signal
(``scipy.signal.hilbert``). Each channel's envelope is z-scored with its
mean and s.d. over the session, the z-scores are averaged over channels,
and an event is a run above ``threshold_sd`` lasting at least
``min_duration_s`` (common practice: 3 s.d., 15 ms).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy import signal

__all__ = ["OfflineRipples", "offline_ripples"]


class OfflineRipples(NamedTuple):
    """The reference's events and its score trace.

    Attributes
    ----------
    onset_s, offset_s : ndarray of float64, shape (n_events,)
        First sample above the threshold and the first below it after.
    mean_z : ndarray of float64, shape (n_samples,)
        The channels' mean z-scored envelope.
    """

    onset_s: np.ndarray
    offset_s: np.ndarray
    mean_z: np.ndarray


def offline_ripples(samples_uv: np.ndarray, rate_hz: float, t0_s: float = 0.0,
                    band_hz: tuple[float, float] = (150.0, 250.0), order: int = 3,
                    threshold_sd: float = 3.0, min_duration_s: float = 0.015) -> OfflineRipples:
    """Ripples of a whole recording, found with hindsight.

    Parameters
    ----------
    samples_uv : ndarray, shape (n_samples, n_channels)
    rate_hz : float
    t0_s : float
        Data time of the first sample.
    band_hz : (float, float)
    order : int
        Butterworth order of the prototype (the band-pass has twice the
        poles; filtfilt squares its magnitude response).
    threshold_sd, min_duration_s : float

    Returns
    -------
    OfflineRipples
    """
    b, a = signal.butter(order, band_hz, btype="bandpass", fs=rate_hz)
    y = signal.filtfilt(b, a, np.asarray(samples_uv, dtype=np.float64), axis=0)
    env = np.abs(signal.hilbert(y, axis=0))
    z = ((env - env.mean(axis=0)) / env.std(axis=0)).mean(axis=1)
    above = np.concatenate([[False], z >= threshold_sd, [False]])
    edges = np.flatnonzero(np.diff(above.astype(np.int8)))
    on, off = edges[0::2], edges[1::2]
    keep = off - on >= int(round(min_duration_s * rate_hz))
    return OfflineRipples(t0_s + on[keep] / rate_hz, t0_s + off[keep] / rate_hz, z)
