"""What every environment shares: the :class:`Environment` interface and the geometry helpers of its kinds.

An environment maps tracked 2-D positions ``(x_cm, y_cm)`` of shape ``(n, 2)``
to flat bin indices, measures distances the way the animal can travel,
smooths maps over its bins and serialises to a JSON-friendly dict. The kinds
live beside this module (:mod:`decoder.space.arenas`,
:mod:`decoder.space.track_graphs`); :mod:`decoder.space.environments` is the
public home of all of them, and importing it makes every kind known to
:meth:`Environment.from_dict`.
"""

from __future__ import annotations

import abc
import inspect
import json
import math
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

#: Largest number of bins an environment may have. A 500 x 500 grid already
#: needs 2 MB per unit for a rate map, so a finer grid is a mistaken bin size.
MAX_BINS = 250_000

#: Relative slack used where a ratio of lengths is rounded up to a whole
#: number of bins, so that 100 cm / 2.5 cm stays 40 bins despite rounding.
_RATIO_SLACK = 1e-9


def positive_length(name: str, value: Any) -> float:
    """``value`` as a positive, finite float of cm, or a ValueError naming ``name``."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number of cm, got {value!r}") from None
    if not math.isfinite(out) or out <= 0:
        raise ValueError(f"{name} must be a positive, finite number of cm, got {value!r}")
    return out


def read_point(name: str, value: Any) -> tuple[float, float]:
    """``value`` as a finite ``(x_cm, y_cm)`` pair, or a ValueError naming ``name``."""
    arr = np.asarray(value, dtype=np.float64) if is_numeric(value) else None
    if arr is None or arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be a finite (x_cm, y_cm) pair, got {value!r}")
    return float(arr[0]), float(arr[1])


def is_numeric(value: Any) -> bool:
    """Whether numpy reads ``value`` as an array of floats."""
    try:
        np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        return False
    return True


def whole_bins(length_cm: float, bin_cm: float) -> int:
    """Fewest bins of ``bin_cm`` that cover ``length_cm`` (at least 1), forgiving rounding error."""
    ratio = length_cm / bin_cm
    return max(1, math.ceil(ratio - _RATIO_SLACK * max(1.0, ratio)))


def read_positions(name: str, xy_cm: Any) -> np.ndarray:
    """``xy_cm`` as a float64 array of shape (n, 2), or a ValueError naming ``name``."""
    if not is_numeric(xy_cm):
        raise ValueError(f"{name} must be an array of (x_cm, y_cm) positions")
    xy = np.asarray(xy_cm, dtype=np.float64)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"{name} must have shape (n, 2), got {xy.shape}")
    return xy


def freeze(arr: np.ndarray) -> np.ndarray:
    """``arr`` made read-only, so that an environment's geometry cannot change under a model."""
    arr.setflags(write=False)
    return arr


class Environment(abc.ABC):
    """What every environment offers: bins, distances, smoothing, a dict form.

    Attributes
    ----------
    bin_cm : float
        Nominal bin size in cm (side of a grid square, length of a track bin).
    n_bins : int
        Number of bins on the flat bin axis.
    bin_centers_cm : ndarray of float64, shape (n_bins, 2)
        Centre of each bin in the arena's frame.
    valid_mask : ndarray of bool, shape (n_bins,)
        Bins inside the geometry.
    bin_size : float
        Area of a bin in cm² (arena) or its mean length in cm (track, graph).
    ndim_spatial : int
        2 for an arena, 1 for a track or graph.
    """

    ndim_spatial: ClassVar[int]
    bin_cm: float
    n_bins: int
    bin_centers_cm: np.ndarray
    valid_mask: np.ndarray
    bin_size: float

    #: Every concrete kind by class name, filled in as each is defined: what
    #: :meth:`from_dict` can rebuild. A registry rather than a list here, so
    #: that this module need not import the kinds that build on it.
    _kinds: ClassVar[dict[str, type[Environment]]] = {}

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if not inspect.isabstract(cls):
            Environment._kinds[cls.__name__] = cls

    @property
    def grid_shape(self) -> tuple[int, int] | None:
        """``(ny, nx)`` for a grid arena, ``None`` otherwise."""
        return None

    @abc.abstractmethod
    def bin_index(self, xy_cm: np.ndarray) -> np.ndarray:
        """Flat bin of each position.

        Parameters
        ----------
        xy_cm : array_like of float64, shape (n, 2)

        Returns
        -------
        ndarray of int64, shape (n,)
            ``-1`` for NaN, for positions outside the geometry and for
            positions in invalid bins.
        """

    @abc.abstractmethod
    def distance_cm(self, a_xy_cm: np.ndarray, b_xy_cm: np.ndarray) -> np.ndarray:
        """Distance the animal would travel from each ``a`` to each ``b``.

        Parameters
        ----------
        a_xy_cm, b_xy_cm : array_like of float64, shape (n, 2)
            Positions; a shape (1, 2) argument is paired with every row of
            the other.

        Returns
        -------
        ndarray of float64, shape (n,)
            NaN where either position is lost (or off the track).
        """

    @abc.abstractmethod
    def outline_cm(self) -> Any:
        """The geometry for drawing, in cm."""

    @abc.abstractmethod
    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly settings that :meth:`Environment.from_dict` rebuilds exactly."""

    @abc.abstractmethod
    def _smooth_masked(
        self, values: np.ndarray, mask_f: np.ndarray, sigma_cm: float
    ) -> tuple[np.ndarray, np.ndarray]:
        """Numerator ``G*(v·m)`` of shape (k, n_bins) and denominator ``G*m`` of shape (n_bins,)."""

    def linearize(self, xy_cm: np.ndarray) -> np.ndarray:
        """Position along the track in cm; only tracks and graphs have one."""
        raise NotImplementedError(f"{type(self).__name__} has no linear position; use a LinearTrack or TrackGraph")

    def bin_distance_matrix_cm(self) -> np.ndarray:
        """Distances between all bin centres along a track or graph."""
        raise NotImplementedError(
            f"{type(self).__name__} has no bin distance matrix (it would be n_bins² entries); "
            "work on the grid instead, for example with distance_cm on bin centres"
        )

    def tracked_bin_kernel(self, noise_sd_cm: float) -> np.ndarray:
        """Which bin a tracked position falls in, given the bin of the true one; only a heading ring has it so far."""
        raise NotImplementedError(
            f"{type(self).__name__} does not yet model the tracker's noise in its bins; pass a noise s.d. of 0"
        )

    def smooth(self, values: np.ndarray, mask: np.ndarray, sigma_cm: float) -> np.ndarray:
        """Gaussian smoothing restricted to ``mask``, normalised by the mask's weight.

        Each output bin inside the mask is ``G*(v·m) / G*m``: a weighted mean
        of the values in masked bins only, so that unvisited bins neither
        pull a map towards zero nor leak across walls. Bins outside the mask
        are 0. Values outside the mask are ignored, even if NaN.

        Parameters
        ----------
        values : array_like of float64, shape (k, n_bins) or (n_bins,)
        mask : array_like of bool, shape (n_bins,)
        sigma_cm : float
            Standard deviation of the Gaussian; 0 returns ``values`` with
            zeros outside the mask.

        Returns
        -------
        ndarray of float64, the shape of ``values``
            Never NaN.

        References
        ----------
        Knutsson H, Westin C-F (1993) Normalized and differential convolution:
        methods for interpolation and filtering of incomplete and uncertain
        data. Proceedings of the IEEE Conference on Computer Vision and
        Pattern Recognition, 515-523.
        """
        vals = np.asarray(values, dtype=np.float64)
        one_map = vals.ndim == 1
        vals2 = vals[np.newaxis] if one_map else vals
        if vals2.ndim != 2 or vals2.shape[1] != self.n_bins:
            raise ValueError(f"values must have shape (k, {self.n_bins}) or ({self.n_bins},), got {vals.shape}")
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != (self.n_bins,):
            raise ValueError(f"mask must be a boolean array of shape ({self.n_bins},), got {m.dtype} {m.shape}")
        try:
            sigma = float(sigma_cm)
        except (TypeError, ValueError):
            raise ValueError(f"sigma_cm must be a number of cm, got {sigma_cm!r}") from None
        if not math.isfinite(sigma) or sigma < 0:
            raise ValueError(f"sigma_cm must be zero or a positive, finite number of cm, got {sigma_cm!r}")
        if not np.all(np.isfinite(vals2[:, m])):
            raise ValueError("values hold a NaN or infinite value inside the mask; mask those bins out")
        masked = np.where(m, vals2, 0.0)
        if sigma == 0 or not m.any():
            out = masked
        else:
            num, den = self._smooth_masked(masked, m.astype(np.float64), sigma)
            # G*m is positive in every masked bin (the kernel's centre weight);
            # the guard only keeps float underflow far from the mask out of the division.
            ok = m & (den > 0)
            out = np.zeros_like(num)
            np.divide(num, den, out=out, where=ok)
        return out[0] if one_map else out

    @staticmethod
    def from_dict(d: Mapping[str, Any]) -> Environment:
        """Rebuild an environment from :meth:`to_dict` output (or its JSON).

        Parameters
        ----------
        d : mapping
            Must hold ``"kind"`` (``"Arena"``, ``"TrackGraph"`` or
            ``"LinearTrack"``) and that kind's settings.
        """
        if not isinstance(d, Mapping) or "kind" not in d:
            raise ValueError("an environment dict must be a mapping with a 'kind' entry")
        kinds = Environment._kinds
        kind = d["kind"]
        if kind not in kinds:
            raise ValueError(f"unknown environment kind {kind!r}; expected one of {sorted(kinds)}")
        cls = kinds[kind]
        fields = {k: v for k, v in d.items() if k != "kind"}
        params = inspect.signature(cls.__init__).parameters
        takes_any = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values())
        named = {
            name for name, p in params.items() if name != "self" and p.kind is not inspect.Parameter.VAR_KEYWORD
        }
        missing = sorted(
            name for name in named if params[name].default is inspect.Parameter.empty and name not in fields
        )
        unknown = sorted(set(fields) - named) if not takes_any else []
        if missing or unknown:
            raise ValueError(f"cannot rebuild a {kind}: missing entries {missing}, unknown entries {unknown}")
        return cls(**fields)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Environment):
            return NotImplemented
        return type(self) is type(other) and self.to_dict() == other.to_dict()

    def __hash__(self) -> int:
        return hash(json.dumps(self.to_dict(), sort_keys=True))

    def __repr__(self) -> str:
        settings = ", ".join(f"{k}={v!r}" for k, v in self.to_dict().items() if k != "kind")
        return f"{type(self).__name__}({settings})"

    def _pair_positions(self, a_xy_cm: Any, b_xy_cm: Any) -> tuple[np.ndarray, np.ndarray]:
        a = read_positions("a_xy_cm", a_xy_cm)
        b = read_positions("b_xy_cm", b_xy_cm)
        if len(a) != len(b) and 1 not in (len(a), len(b)):
            raise ValueError(f"a_xy_cm has {len(a)} positions and b_xy_cm has {len(b)}; give equal numbers or one")
        return np.broadcast_arrays(a, b)

