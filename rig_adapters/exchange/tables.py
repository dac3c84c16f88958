"""``placeloop export --format parquet|csv``: decoded steps and events as tables for pandas and the like.

Two files, ``steps.<ext>`` (one row per decoded step, columns
:data:`~rig_adapters.exchange.decoded.STEP_COLUMNS` and ``zone_mass_<zone>``)
and ``events.<ext>`` (one row per event,
:data:`~rig_adapters.exchange.decoded.EVENT_COLUMNS`), written by Apache
Arrow's Parquet or CSV writer. Units are in the column names; times are
data-time seconds, wall stamps seconds since the Unix epoch.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rig_adapters.exchange.decoded import EVENT_COLUMNS, DecodedSession

__all__ = ["TABLE_FORMATS", "require_pyarrow", "write_tables"]

TABLE_FORMATS = ("parquet", "csv")

_INTEGER_COLUMNS = {"n_spikes", "event_id"}
_BOOL_COLUMNS = {"armed", "far_from_zone"}


def require_pyarrow():
    """pyarrow with its CSV and Parquet writers, or an ImportError saying what to install."""
    try:
        import pyarrow
        import pyarrow.csv
        import pyarrow.parquet
    except ImportError:
        raise ImportError("table export needs pyarrow: pip install 'placeloop[nwb]'") from None
    return pyarrow


def _table(pa, columns: dict, order) -> object:
    arrays = {}
    for name in order:
        values = columns[name]
        if name in _INTEGER_COLUMNS:
            arrays[name] = pa.array(np.asarray(values, dtype=np.int64))
        elif name in _BOOL_COLUMNS:
            arrays[name] = pa.array(np.asarray(values, dtype=bool))
        elif name in ("rule", "zone"):
            arrays[name] = pa.array([str(v) for v in values], type=pa.string())
        else:
            arrays[name] = pa.array(np.asarray(values, dtype=np.float64))
    return pa.table(arrays)


def write_tables(decoded: DecodedSession, out_dir: str | Path, fmt: str = "parquet") -> list[Path]:
    """Write ``steps`` and ``events`` tables of ``decoded`` into ``out_dir``.

    Parameters
    ----------
    decoded : DecodedSession
    out_dir : path
        Created if missing; existing tables in it are not overwritten.
    fmt : {"parquet", "csv"}

    Returns
    -------
    list of Path
        The two files written.
    """
    if fmt not in TABLE_FORMATS:
        raise ValueError(f"table format must be one of {TABLE_FORMATS}, got {fmt!r}")
    pa = require_pyarrow()
    out_dir = Path(out_dir)
    targets = [out_dir / f"steps.{fmt}", out_dir / f"events.{fmt}"]
    for path in targets:
        if path.exists():
            raise FileExistsError(f"{path} exists already; choose a new directory")
    out_dir.mkdir(parents=True, exist_ok=True)
    tables = [_table(pa, decoded.steps, list(decoded.steps)), _table(pa, decoded.events, EVENT_COLUMNS)]
    for table, path in zip(tables, targets):
        partial = path.with_name(f".{path.name}.partial")
        if fmt == "parquet":
            pa.parquet.write_table(table, partial)
        else:
            pa.csv.write_csv(table, partial)
        partial.rename(path)
    return targets
