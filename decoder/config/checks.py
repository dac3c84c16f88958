"""The config's error and the checks its tables share."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np


class ConfigError(ValueError):
    """A configuration value that cannot be used; the message names it."""


def _positive_int(owner: str, field_name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{owner}: {field_name} must be a whole number of at least 1, got {value!r}")
    return int(value)


def _positive_seconds(owner: str, field_name: str, value: Any) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {field_name} must be a number of seconds, got {value!r}") from None
    if not (math.isfinite(out) and out > 0):
        raise ValueError(f"{owner}: {field_name} must be a positive, finite number of seconds, got {value!r}")
    return out


def _optional_speed(owner: str, field_name: str, value: Any) -> float | None:
    if value is None:
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: {field_name} must be a speed in cm/s or None, got {value!r}") from None
    if not (math.isfinite(out) and out >= 0):
        raise ValueError(f"{owner}: {field_name} must be a finite, non-negative speed in cm/s, got {value!r}")
    return out


def retired_key(cls, key: str, where: str) -> None:
    """Refuse a key ``cls`` no longer takes (its ``RETIRED`` map), with the sentence that says what to write instead."""
    why = getattr(cls, "RETIRED", {}).get(key)
    if why is not None:
        raise ConfigError(f"{where} sets {key}, which is no longer a key: {why}")


def _from_table(cls, table: dict | None, where: str):
    """Build dataclass ``cls`` from a TOML table, rejecting unknown keys."""
    table = dict(table or {})
    for key in table:
        retired_key(cls, key, f"[{where}]")
    names = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(table) - names)
    if unknown:
        raise ConfigError(f"[{where}] has unknown key(s) {unknown}; known keys are {sorted(names)}")
    try:
        return cls(**table)
    except ConfigError:
        raise
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"[{where}]: {exc}") from None


def _positive(where: str, **values: float) -> None:
    for key, value in values.items():
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not value > 0:
            raise ConfigError(f"[{where}] {key} must be a positive number, got {value!r}")
