"""What placeloop takes from an NWB file besides sorted units: waveform marks and an LFP.

:func:`read_marks` gathers the file's marked spikes for clusterless
decoding: every ``FeatureExtraction`` (the ecephys container of per-spike
waveform features: ``times`` (n_events,), ``features`` (n_events,
n_channels, n_features), one ``description`` per feature) is one electrode
group, its mark the features of its channels, channel after channel; a file
without one may instead hold per-spike amplitudes in a ragged column of its
Units table (indexed like ``spike_times``), each unit's electrode group then
the group of its spikes and the amplitude a mark of width 1.

:func:`read_lfp` reads one ``ElectricalSeries`` (acquisition, or an
``LFP``/``FilteredEphys`` container in a processing module) as µV: NWB
stores ``data * conversion (* channel_conversion) + offset`` in volts.

Both raise :class:`NwbImportError` with a sentence naming the file, the
series and what to do.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from decoder.messages import MAX_MARK_CHANNELS, MAX_MARK_UV
from rig_adapters.exchange.nwb_errors import NwbImportError

__all__ = ["NwbMarks", "NwbLfp", "read_marks", "read_lfp", "AMPLITUDE_COLUMNS"]

#: Ragged Units columns read as per-spike amplitudes (lower case), when the file has no FeatureExtraction.
AMPLITUDE_COLUMNS = ("spike_amplitudes", "spike_amplitude", "amplitudes", "amplitude")

#: A volt in µV: an ElectricalSeries' data * conversion is in volts (the NWB schema fixes its unit).
UV_PER_VOLT = 1e6

#: Timestamps of an ElectricalSeries count as one regular rate when every step is within this fraction of the median.
_REGULAR_TOLERANCE = 0.01


@dataclass
class NwbMarks:
    """Marked spikes of every electrode group, merged in time order.

    Attributes
    ----------
    t_s : ndarray of float64, shape (n_spikes,)
    group_id : ndarray of int64, shape (n_spikes,)
    marks_uv : ndarray of float32, shape (n_spikes, max_width)
        Each spike's mark in its first ``group_channels[group]`` columns, the rest 0.
    group_ids, group_channels : ndarray of int64, shape (n_groups,)
        The groups and each one's mark width.
    group_names : list of str
        Where each group's marks came from (container or electrode group name).
    source : str
        ``"FeatureExtraction"`` or the Units column read.
    """

    t_s: np.ndarray
    group_id: np.ndarray
    marks_uv: np.ndarray
    group_ids: np.ndarray
    group_channels: np.ndarray
    group_names: list
    source: str


@dataclass
class NwbLfp:
    """One ElectricalSeries in µV, cut into runs of regular samples.

    Attributes
    ----------
    name : str
    rate_hz : float
    runs : list of (t0_s, ndarray of float32 with shape (n_samples, n_channels))
        Consecutive samples starting at ``t0_s``; a break in the file's
        timestamps starts a new run (a gap the ripple detector restarts after).
    """

    name: str
    rate_hz: float
    runs: list


def _electrical_series(nwb):
    """Every ElectricalSeries of the file by a readable name: acquisition first, then processing containers."""
    found = {}
    for name, obj in nwb.acquisition.items():
        if type(obj).__name__ == "ElectricalSeries":
            found[name] = obj
        elif hasattr(obj, "electrical_series"):
            found.update({f"{name}/{k}": v for k, v in obj.electrical_series.items()})
    for module in nwb.processing.values():
        for name, obj in module.data_interfaces.items():
            if type(obj).__name__ == "ElectricalSeries":
                found[f"{module.name}/{name}"] = obj
            elif hasattr(obj, "electrical_series"):
                found.update({f"{module.name}/{name}/{k}": v for k, v in obj.electrical_series.items()})
    return found


def read_lfp(nwb, wanted: str, path: Path, start_s: float, stop_s: float) -> NwbLfp:
    """The ElectricalSeries named ``wanted`` (its name or its listed path), within ``[start_s, stop_s)``.

    Raises
    ------
    NwbImportError
        No such series or several, an irregular rate, a NaN or infinite sample, or nothing in the range.
    """
    found = _electrical_series(nwb)
    matches = [k for k in found if k == wanted or k.rsplit("/", 1)[-1] == wanted]
    if len(matches) != 1:
        what = "several ElectricalSeries are" if matches else "no ElectricalSeries is"
        raise NwbImportError(f"{path}: {what} named {wanted!r}; the file has {sorted(found) or 'none'} "
                             "(give --lfp one of them by its full name)")
    name, series = matches[0], found[matches[0]]
    n = series.data.shape[0]
    if series.timestamps is None:
        rate = float(series.rate)
        t = float(series.starting_time or 0.0) + np.arange(n) / rate
    else:
        t = np.asarray(series.timestamps[:], dtype=np.float64)
        step = np.diff(t)
        if t.size < 2 or not (np.isfinite(t).all() and (step > 0).all()):
            raise NwbImportError(f"{path}: the LFP series {name!r} needs increasing finite timestamps")
        rate = 1.0 / float(np.median(step))
    lo, hi = np.searchsorted(t, [start_s, stop_s], side="left")
    if hi <= lo:
        raise NwbImportError(f"{path}: the LFP series {name!r} ({t[0]:g}-{t[-1]:g} s) has no sample in the imported "
                             f"range {start_s:g}-{stop_s:g} s")
    data = np.asarray(series.data[lo:hi], dtype=np.float64)
    data = data[:, None] if data.ndim == 1 else data.reshape(data.shape[0], -1)
    gain = float(series.conversion) * UV_PER_VOLT
    channel_conversion = getattr(series, "channel_conversion", None)
    if channel_conversion is not None:
        data = data * np.asarray(channel_conversion[:], dtype=np.float64)[None, :]
    offset = float(getattr(series, "offset", 0.0) or 0.0)
    uv = data * gain + offset * UV_PER_VOLT
    bad = ~np.isfinite(uv).all(axis=1)
    if bad.any():
        first = float(t[lo + int(np.argmax(bad))])
        raise NwbImportError(f"{path}: the LFP series {name!r} holds NaN or infinite samples ({int(bad.sum())} "
                             f"samples, the first at {first:.4f} s); an LFP is sent sample by sample, so cut the "
                             "import before them with --stop-s/--start-s, or fill them in the file")
    t = t[lo:hi]
    # A step more than 1% off the median starts a new run: the protocol's chunks must join within half a sample.
    breaks = np.flatnonzero(np.abs(np.diff(t) * rate - 1.0) > _REGULAR_TOLERANCE) + 1
    runs = [(float(t[a]), uv[a:b].astype(np.float32)) for a, b in zip(np.r_[0, breaks], np.r_[breaks, t.size])]
    return NwbLfp(name=name, rate_hz=rate, runs=runs)


def _feature_extractions(nwb):
    for holder in [m.data_interfaces for m in nwb.processing.values()] + [nwb.acquisition]:
        for obj in holder.values():
            if type(obj).__name__ == "FeatureExtraction":
                yield obj


def read_marks(nwb, units, path: Path) -> NwbMarks:
    """The file's marked spikes: FeatureExtraction containers, else per-spike amplitudes of the Units table.

    Raises
    ------
    NwbImportError
        None found; feature counts that differ between groups or from their
        descriptions; a mark wider than the wire carries; NaN features.
    """
    extractions = sorted(_feature_extractions(nwb), key=lambda fe: fe.name)
    if extractions:
        return _from_feature_extractions(extractions, path)
    if units is not None:
        column = next((c for c in units.colnames if c.lower() in AMPLITUDE_COLUMNS), None)
        if column is not None:
            return _from_unit_amplitudes(units, column, path)
    raise NwbImportError(f"{path} holds no FeatureExtraction and no per-spike amplitude column in its Units table "
                         f"({', '.join(AMPLITUDE_COLUMNS)}); import without --marks to decode from the sorted units")


def _from_feature_extractions(extractions, path: Path) -> NwbMarks:
    counts = {}
    parts = []
    for fe in extractions:
        features = np.asarray(fe.features[:], dtype=np.float64)
        times = np.asarray(fe.times[:], dtype=np.float64).ravel()
        n_described = len(fe.description)
        if features.ndim != 3 or features.shape[0] != times.size or features.shape[2] != n_described:
            raise NwbImportError(f"{path}: the FeatureExtraction {fe.name!r} has features of shape {features.shape} "
                                 f"for {times.size} events and {n_described} described features; expected "
                                 "(events, channels, features) with one description per feature")
        counts[fe.name] = n_described
        parts.append((fe.name, times, features.reshape(times.size, -1)))
    if len(set(counts.values())) > 1:
        raise NwbImportError(f"{path}: the FeatureExtraction containers hold different numbers of features per "
                             f"channel ({', '.join(f'{k}: {v}' for k, v in counts.items())}); placeloop's marks of "
                             "every group are the same features, so drop or recompute the odd ones")
    return _merged(parts, path, "FeatureExtraction")


def _from_unit_amplitudes(units, column: str, path: Path) -> NwbMarks:
    if "electrode_group" in units.colnames:
        owner = [units["electrode_group"][i].name for i in range(len(units))]
    else:
        owner = ["all units"] * len(units)
    by_group: dict[str, list] = {}
    for row in range(len(units)):
        t = np.asarray(units["spike_times"][row], dtype=np.float64).ravel()
        a = np.asarray(units[column][row], dtype=np.float64).ravel()
        if a.size != t.size:
            raise NwbImportError(f"{path}: the Units column {column!r} holds {a.size} amplitudes for unit row {row}'s "
                                 f"{t.size} spike times; per-spike amplitudes need one value per spike")
        by_group.setdefault(owner[row], []).append((t, a))
    parts = [(name, np.concatenate([t for t, _ in rows]), np.concatenate([a for _, a in rows])[:, None])
             for name, rows in sorted(by_group.items())]
    return _merged(parts, path, f"Units column {column!r}")


def _merged(parts, path: Path, source: str) -> NwbMarks:
    widths = [m.shape[1] for _, _, m in parts]
    for (name, _, _), width in zip(parts, widths):
        if width > MAX_MARK_CHANNELS:
            raise NwbImportError(f"{path}: the marks of {name!r} hold {width} values per spike, more than the "
                                 f"{MAX_MARK_CHANNELS} a mark may have; keep fewer features or channels")
    t = np.concatenate([p[1] for p in parts])
    if t.size == 0:
        raise NwbImportError(f"{path}: the marks ({source}) hold no spike")
    marks = np.zeros((t.size, max(widths)), np.float64)
    group = np.concatenate([np.full(p[1].size, g, np.int64) for g, p in enumerate(parts)])
    row = 0
    for _, times, m in parts:
        marks[row: row + times.size, : m.shape[1]] = m
        row += times.size
    if not (np.isfinite(t).all() and np.isfinite(marks).all()):
        raise NwbImportError(f"{path}: the marks ({source}) hold NaN or infinite times or features")
    if np.abs(marks).max() > MAX_MARK_UV:
        raise NwbImportError(f"{path}: the marks ({source}) reach {np.abs(marks).max():g}, beyond the "
                             f"{MAX_MARK_UV:g} µV a mark may have; are they in volts or counts? placeloop reads µV")
    order = np.argsort(t, kind="stable")
    return NwbMarks(t_s=t[order], group_id=group[order], marks_uv=marks[order].astype(np.float32),
                    group_ids=np.arange(len(parts), dtype=np.int64), group_channels=np.asarray(widths, np.int64),
                    group_names=[p[0] for p in parts], source=source)
