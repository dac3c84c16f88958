"""The one check every ``[simulation...]`` table gets before its dataclass is built."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from typing import Any


def known_keys(cls: type, table: Mapping[str, Any] | None, where: str) -> dict[str, Any]:
    """``table`` as a dict of ``cls``'s fields; a key that is none of them (most often a typo) is refused.

    Parameters
    ----------
    cls : dataclass type
    table : mapping or None
        The TOML table; None or empty for all defaults.
    where : str
        The table's name in the config, e.g. ``"simulation.lfp"``.

    Raises
    ------
    ValueError
        Naming the unknown keys and the known ones.
    """
    d = dict(table or {})
    names = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(d) - names)
    if unknown:
        raise ValueError(f"[{where}] has unknown key(s) {unknown}; known keys are {sorted(names)}")
    return d
