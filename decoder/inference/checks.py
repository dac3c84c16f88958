"""Argument checks and the choice of kernels that the decoder and its transition share."""

from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import numpy as np

from decoder.inference import _kernels

BACKENDS = ("numba", "numpy")

_KERNEL_NAMES = ("convolve_separable", "decode_step", "decode_window_step", "decode_held_out", "mass_above")


def kernel_set(backend: str) -> SimpleNamespace:
    """The compiled kernels (``"numba"``) or their numpy twins (``"numpy"``), by their compiled names."""
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {BACKENDS}, got {backend!r}")
    suffix = "" if backend == "numba" else "_numpy"
    return SimpleNamespace(**{name: getattr(_kernels, name + suffix) for name in _KERNEL_NAMES})


def positive_finite(name: str, value: Any) -> float:
    """``value`` as a float; ValueError naming ``name`` unless it is a positive, finite number."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name} must be a positive number, got {value!r}")
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive, finite number, got {value!r}")
    return float(value)


def bin_mask(name: str, mask: Any, n_bins: int) -> np.ndarray:
    """``mask`` as an array; ValueError naming ``name`` unless it is boolean of shape ``(n_bins,)``."""
    arr = np.asarray(mask)
    if arr.shape != (n_bins,) or arr.dtype != np.bool_:
        raise ValueError(
            f"{name} must be a boolean array of shape ({n_bins},), got {arr.dtype} of shape {arr.shape}"
        )
    return arr
