"""Judging decoded steps against where the animal was: zone membership, decoding error, false events.

An event is false when the animal was known to be farther than the false
margin from its zone: the margin forgives a decoded position that runs a
little ahead of the animal, as it does around a zone's edge, and the
judgement is left out wherever no position is known.
"""

from __future__ import annotations

import math

import numpy as np

from decoder.config import TriggerRule
from decoder.space.environments import Arena, Environment
from decoder.space.zones import Zone
from decoder.session.triggers import TriggerEvent

#: Zone bins compared at once when measuring distances on a grid (bounds the
#: temporary array to n_bins * 256 * 2 floats).
_ZONE_CHUNK = 256


class StepJudge:
    """Where the animal was at a step, measured against the zones and the decoded position.

    Parameters
    ----------
    environment : Environment
    zones : sequence of Zone
    zone_masks : ndarray of bool, shape (n_zones, n_bins)
        The bins of each zone (``decoder.space.zones.zone_masks``).
    rules : sequence of TriggerRule
    false_margin_cm : float
        An event is false only when the animal was farther than this from the zone.
    """

    def __init__(self, environment: Environment, zones: tuple[Zone, ...], zone_masks: np.ndarray,
                 rules: tuple[TriggerRule, ...], false_margin_cm: float) -> None:
        self.environment = environment
        self.zones = tuple(zones)
        self.zone_names = [z.name for z in self.zones]
        self._euclidean = type(environment).distance_cm is Arena.distance_cm
        # Rules that fire with the animal outside their zone by design: their events are never false.
        self._outside_rules = {r.name for r in rules if r.tracked == "outside"}
        self.near_zone = self._near_zone_masks(zone_masks, float(false_margin_cm))

    def zone_flags(self, x_cm: float, y_cm: float) -> list[bool]:
        """Whether the position lies in each zone (False for a NaN position)."""
        env = self.environment
        return [z.contains_point(x_cm, y_cm, env) for z in self.zones]

    def error_cm(self, map_xy_cm: np.ndarray, x_cm: float, y_cm: float) -> float:
        """Distance from the MAP ``map_xy_cm`` (2,) to the position ``(x_cm, y_cm)``; NaN if unknown."""
        if not (math.isfinite(x_cm) and math.isfinite(y_cm)):
            return math.nan
        if self._euclidean:
            # Arena.distance_cm's formula on scalars: one call instead of a dozen on (1, 2) arrays.
            mx, my = map_xy_cm.tolist()
            return math.hypot(mx - x_cm, my - y_cm)
        return float(self.environment.distance_cm(map_xy_cm[None, :], np.array([[x_cm, y_cm]]))[0])

    def is_false(self, event: TriggerEvent, xy_cm: np.ndarray) -> bool:
        """Whether ``event`` came with the animal, at ``xy_cm`` (2,), known to be far from its zone."""
        if event.rule in self._outside_rules:
            return False
        b = int(self.environment.bin_index(xy_cm[None, :])[0])
        if b < 0:
            return False
        return not bool(self.near_zone[self.zone_names.index(event.zone), b])

    def _near_zone_masks(self, zone_masks: np.ndarray, margin_cm: float) -> np.ndarray:
        """Bins within ``margin_cm`` (plus one bin) of each zone, along the graph on a track."""
        env = self.environment
        near = np.zeros_like(zone_masks)
        for i, mask in enumerate(zone_masks):
            zone_bins = np.flatnonzero(mask)
            if env.grid_shape is None:
                dist = env.bin_distance_matrix_cm()[zone_bins].min(axis=0)
            else:
                centers = env.bin_centers_cm
                dist = np.full(env.n_bins, np.inf)
                for start in range(0, zone_bins.size, _ZONE_CHUNK):
                    chunk = centers[zone_bins[start:start + _ZONE_CHUNK]]
                    d = np.sqrt(((centers[:, None, :] - chunk[None, :, :]) ** 2).sum(-1)).min(axis=1)
                    dist = np.minimum(dist, d)
            near[i] = dist <= margin_cm + env.bin_cm
        return near
