"""What placeloop takes from an NWB file: sorted units, position, head direction, epochs and trials.

:func:`read_recording` opens a file with pynwb and returns a
:class:`NwbRecording` of plain arrays in placeloop's units (seconds, cm,
radians), every time in seconds from the file's ``session_start_time``
(the file's own time base, which becomes the imported session's data time).
Whatever is missing or cannot be read is an :class:`NwbImportError` whose
sentence names the file, the part and what to do.

NWB (Neurodata Without Borders) is the open data standard of the field; a
``SpatialSeries`` stores ``data * conversion + offset`` in its ``unit``.

References
----------
Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders
ecosystem for neurophysiological data science. eLife 11:e78362.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from rig_adapters.exchange.nwb_errors import NwbImportError
from rig_adapters.exchange.nwb_signals import read_lfp, read_marks

log = logging.getLogger(__name__)

__all__ = ["NwbImportError", "NwbRecording", "read_recording", "require_pynwb", "LENGTH_UNITS_CM", "SUBJECT_FIELDS"]

#: Length units a SpatialSeries may name, as centimetres per unit (lower case, after the conversion factor).
LENGTH_UNITS_CM = {
    "m": 100.0, "meter": 100.0, "meters": 100.0, "metre": 100.0, "metres": 100.0,
    "cm": 1.0, "centimeter": 1.0, "centimeters": 1.0, "centimetre": 1.0, "centimetres": 1.0,
    "mm": 0.1, "millimeter": 0.1, "millimeters": 0.1, "millimetre": 0.1, "millimetres": 0.1,
}

#: Angle units a CompassDirection may name, as radians per unit.
ANGLE_UNITS_RAD = {"radian": 1.0, "radians": 1.0, "rad": 1.0, "degree": math.pi / 180, "degrees": math.pi / 180,
                   "deg": math.pi / 180}


def require_pynwb():
    """The pynwb module, or an NwbImportError saying what to install."""
    try:
        import pynwb
    except ImportError:
        raise NwbImportError("NWB import and export need pynwb: pip install 'placeloop[nwb]'") from None
    return pynwb


@dataclass
class NwbRecording:
    """One NWB file's content for placeloop, in seconds, cm and radians.

    Attributes
    ----------
    path : Path
    identifier, session_description : str
    session_start_wall_s : float
        ``session_start_time`` as seconds since the Unix epoch.
    unit_ids : ndarray of int64, shape (n_units,)
    spike_t_s : ndarray of float64, shape (n_spikes,)
        Every unit's spikes merged in time order.
    spike_unit : ndarray of int64, shape (n_spikes,)
    frame_t_s : ndarray of float64, shape (n_frames,)
        Position times, strictly increasing (unsorted or repeated times of
        the file sorted and thinned, and counted in ``notes``).
    frame_xy_cm : ndarray of float64, shape (n_frames, 2)
        NaN where the file has no position; ``y`` is 0 for a 1-D series.
    frame_head_rad : ndarray of float64, shape (n_frames,) or None
        Head direction at the frame times (nearest sample within one frame), NaN where unknown.
    position_name, head_direction_name : str
        Which series were read.
    position_dims : int
        1 for a linear series, 2 for a planar one.
    epochs, trials : list of (start_s, stop_s, tags)
    subject : dict
        The file's subject fields that are set (``subject_id``, ``species``, ``sex``, ``age``, ...), as text.
    has_waveforms : bool
        The Units table holds mean waveforms (per unit, not per spike: not marks).
    marks : NwbMarks or None
        The marked spikes, when asked for (``rig_adapters.exchange.nwb_signals``).
    lfp : NwbLfp or None
        The LFP series asked for, within the range asked for.
    notes : list of str
        What the import had to decide or repair, for the user.
    """

    path: Path
    identifier: str
    session_description: str
    session_start_wall_s: float
    unit_ids: np.ndarray
    spike_t_s: np.ndarray
    spike_unit: np.ndarray
    frame_t_s: np.ndarray
    frame_xy_cm: np.ndarray
    frame_head_rad: np.ndarray | None
    position_name: str
    head_direction_name: str
    position_dims: int
    epochs: list = field(default_factory=list)
    trials: list = field(default_factory=list)
    subject: dict = field(default_factory=dict)
    has_waveforms: bool = False
    notes: list = field(default_factory=list)
    marks: object = None
    lfp: object = None


def read_recording(path: str | Path, position: str | None = None, head_direction: str | None = None,
                   cm_per_unit: float | None = None, marks: bool = False, lfp: str | None = None,
                   start_s: float | None = None, stop_s: float | None = None) -> NwbRecording:
    """Read an NWB file's sorted units, position, head direction, epochs and trials.

    Parameters
    ----------
    path : path
    position : str, optional
        Name of the position ``SpatialSeries`` (or ``Container/series``);
        needed only when the file holds more than one.
    head_direction : str, optional
        Name of the head-direction series; the file's only
        ``CompassDirection`` series by default, none if it has none.
    cm_per_unit : float, optional
        Centimetres per unit of the position series, for a file whose unit
        is missing or not a length (pixels); overrides the file's unit.
    marks : bool, default False
        Read the marked spikes too (:func:`~rig_adapters.exchange.nwb_signals.read_marks`);
        the Units table may then be missing.
    lfp : str, optional
        Read this ElectricalSeries as LFP (:func:`~rig_adapters.exchange.nwb_signals.read_lfp`).
    start_s, stop_s : float, optional
        The LFP is read within this range only (s).

    Returns
    -------
    NwbRecording

    Raises
    ------
    NwbImportError
        With a sentence naming what is missing or unreadable.
    """
    pynwb = require_pynwb()
    path = Path(path)
    if not path.is_file():
        raise NwbImportError(f"{path} does not exist or is not a file")
    try:
        io = pynwb.NWBHDF5IO(str(path), "r")
    except Exception as exc:  # noqa: BLE001 - h5py and hdmf raise many kinds for a file that is not NWB
        raise NwbImportError(f"{path} is not a readable NWB file (truncated, or another format?): "
                             f"{type(exc).__name__}: {exc}") from None
    try:
        try:
            nwb = io.read()
        except Exception as exc:  # noqa: BLE001 - as above: the boundary with a foreign file
            raise NwbImportError(f"{path} is not a readable NWB file (truncated, or another format?): "
                                 f"{type(exc).__name__}: {exc}") from None
        notes: list[str] = []
        if marks and (nwb.units is None or len(nwb.units) == 0 or "spike_times" not in nwb.units.colnames):
            # Clusterless data need no sorting: the marks carry the spikes.
            unit_ids, spike_t, spike_unit, has_waveforms = (np.zeros(0, np.int64), np.zeros(0),
                                                            np.zeros(0, np.int64), False)
        else:
            unit_ids, spike_t, spike_unit, has_waveforms = _units(nwb, path)
        marked = read_marks(nwb, nwb.units, path) if marks else None
        lfp_read = None
        if lfp is not None:
            lo = -math.inf if start_s is None else float(start_s)
            lfp_read = read_lfp(nwb, lfp, path, lo, math.inf if stop_s is None else float(stop_s))
        series, pos_name = _pick_series(nwb, "Position", position, path, required=True)
        frame_t, xy, dims = _position(series, pos_name, path, cm_per_unit, notes)
        head = None
        head_name = ""
        hd_series, hd_name = _pick_series(nwb, "CompassDirection", head_direction, path,
                                          required=head_direction is not None)
        if hd_series is not None:
            head = _head_direction(hd_series, hd_name, frame_t, path)
            head_name = hd_name
        start = nwb.session_start_time
        return NwbRecording(
            path=path, identifier=str(nwb.identifier), session_description=str(nwb.session_description),
            session_start_wall_s=start.timestamp(), unit_ids=unit_ids, spike_t_s=spike_t, spike_unit=spike_unit,
            frame_t_s=frame_t, frame_xy_cm=xy, frame_head_rad=head, position_name=pos_name,
            head_direction_name=head_name, position_dims=dims, epochs=_intervals(nwb.epochs),
            trials=_intervals(nwb.trials), subject=_subject(nwb.subject), has_waveforms=has_waveforms, notes=notes,
            marks=marked, lfp=lfp_read,
        )
    finally:
        io.close()


def _units(nwb, path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    units = nwb.units
    if units is None or len(units) == 0:
        raise NwbImportError(f"{path} has no Units table (or an empty one); placeloop imports sorted units' "
                             "spike times from it")
    if "spike_times" not in units.colnames:
        raise NwbImportError(f"{path}: the Units table has no spike_times column; without spike times there is "
                             "nothing to decode from")
    ids = np.asarray(units.id[:], dtype=np.int64)
    times, owners = [], []
    for row, unit_id in enumerate(ids):
        t = np.asarray(units["spike_times"][row], dtype=np.float64).ravel()
        times.append(t)
        owners.append(np.full(t.size, unit_id, np.int64))
    spike_t = np.concatenate(times) if times else np.zeros(0)
    spike_unit = np.concatenate(owners) if owners else np.zeros(0, np.int64)
    if spike_t.size == 0:
        raise NwbImportError(f"{path}: the Units table's spike_times are all empty; there is nothing to decode from")
    if not np.isfinite(spike_t).all():
        raise NwbImportError(f"{path}: the Units table holds NaN or infinite spike times")
    order = np.argsort(spike_t, kind="stable")
    has_waveforms = any(c in units.colnames for c in ("waveforms", "waveform_mean"))
    return ids, spike_t[order], spike_unit[order], has_waveforms


def _containers(nwb, kind: str):
    """Every data interface of type ``kind`` (by its neurodata type), behaviour module first, then acquisition."""
    modules = sorted(nwb.processing.values(), key=lambda m: m.name != "behavior")
    for holder in [m.data_interfaces for m in modules] + [nwb.acquisition]:
        for obj in holder.values():
            if type(obj).__name__ == kind:
                yield obj


def _pick_series(nwb, kind: str, wanted: str | None, path: Path, required: bool):
    """The one spatial series of the ``kind`` containers, or the one named ``wanted`` (``series`` or ``box/series``)."""
    found = {}
    for container in _containers(nwb, kind):
        for name, series in container.spatial_series.items():
            found[f"{container.name}/{name}"] = series
    if wanted is not None:
        matches = [k for k in found if k == wanted or k.split("/", 1)[1] == wanted]
        if len(matches) == 1:
            return found[matches[0]], matches[0]
        what = "several series are" if matches else "no series is"
        raise NwbImportError(f"{path}: {what} named {wanted!r} in a {kind} container; the file has "
                             f"{sorted(found) or 'none'}")
    if not found:
        if required:
            raise NwbImportError(f"{path} holds no {kind} container with a SpatialSeries (looked in every processing "
                                 "module, 'behavior' first, and in acquisition); placeloop needs the animal's "
                                 "position to learn rate maps and score decoding")
        return None, ""
    if len(found) > 1:
        raise NwbImportError(f"{path} holds several {kind} series {sorted(found)}; choose one by name "
                             f"(--{'position' if kind == 'Position' else 'head-direction'} NAME)")
    name = next(iter(found))
    return found[name], name


def _timestamps(series) -> np.ndarray:
    return np.asarray(series.get_timestamps(), dtype=np.float64).ravel()


def _scaled(series) -> np.ndarray:
    data = np.asarray(series.data[:], dtype=np.float64)
    offset = getattr(series, "offset", 0.0) or 0.0
    return data * float(series.conversion) + float(offset)


def _position(series, name: str, path: Path, cm_per_unit: float | None, notes: list) -> tuple:
    unit = (series.unit or "").strip()
    if cm_per_unit is None:
        if not unit:
            raise NwbImportError(f"{path}: the position series {name!r} names no unit; give its scale with "
                                 "--cm-per-unit (e.g. 100 for metres)")
        if unit.lower() not in LENGTH_UNITS_CM:
            raise NwbImportError(f"{path}: the position series {name!r} is in {unit!r}, not a length placeloop "
                                 f"knows ({', '.join(sorted(set(LENGTH_UNITS_CM)))}); give its scale with "
                                 "--cm-per-unit (e.g. the camera's cm per pixel)")
        cm_per_unit = LENGTH_UNITS_CM[unit.lower()]
    else:
        notes.append(f"position scaled by --cm-per-unit {cm_per_unit} (the file's unit {unit!r} ignored)")
    data = _scaled(series) * cm_per_unit
    t = _timestamps(series)
    if data.ndim == 1:
        data = data[:, None]
    if data.ndim != 2 or data.shape[0] != t.size or data.shape[1] < 1:
        raise NwbImportError(f"{path}: the position series {name!r} has data of shape {data.shape} for {t.size} "
                             "timestamps; expected (n,), (n, 1), (n, 2) or (n, 3)")
    dims = min(data.shape[1], 2)
    if data.shape[1] > 2:
        notes.append(f"position {name!r} has {data.shape[1]} columns; x and y are the first two")
    xy = np.zeros((t.size, 2))
    xy[:, :dims] = data[:, :dims]
    keep = np.isfinite(t)
    if not keep.all():
        notes.append(f"{int((~keep).sum())} position samples with a NaN time left out")
        t, xy = t[keep], xy[keep]
    if t.size and np.any(np.diff(t) < 0):
        notes.append(f"position {name!r} has unsorted timestamps; sorted")
        order = np.argsort(t, kind="stable")
        t, xy = t[order], xy[order]
    repeated = np.concatenate([[False], np.diff(t) <= 0]) if t.size else np.zeros(0, bool)
    if repeated.any():
        notes.append(f"{int(repeated.sum())} position samples at a repeated time left out (the first kept)")
        t, xy = t[~repeated], xy[~repeated]
    xy[~np.isfinite(xy).all(axis=1)] = np.nan
    if not np.isfinite(xy).any():
        raise NwbImportError(f"{path}: the position series {name!r} holds no finite position")
    return t, xy, dims


def _head_direction(series, name: str, frame_t: np.ndarray, path: Path) -> np.ndarray:
    unit = (series.unit or "").strip().lower()
    if unit not in ANGLE_UNITS_RAD:
        raise NwbImportError(f"{path}: the head-direction series {name!r} is in {series.unit!r}; placeloop reads "
                             "radians or degrees")
    angle = _scaled(series)
    angle = angle[:, 0] if angle.ndim == 2 else angle.ravel()
    t = _timestamps(series)
    if angle.size != t.size:
        raise NwbImportError(f"{path}: the head-direction series {name!r} has {angle.size} values for "
                             f"{t.size} timestamps")
    order = np.argsort(t, kind="stable")
    t, angle = t[order], np.angle(np.exp(1j * angle[order] * ANGLE_UNITS_RAD[unit]))
    out = np.full(frame_t.size, np.nan)
    if t.size == 0 or frame_t.size == 0:
        return out
    # Nearest sample, kept only within one frame interval: heading is never interpolated across a gap.
    idx = np.clip(np.searchsorted(t, frame_t), 1, max(t.size - 1, 1))
    lo = idx - 1 if t.size > 1 else np.zeros_like(idx)
    hi = np.minimum(idx, t.size - 1)
    nearest = np.where(np.abs(t[hi] - frame_t) < np.abs(t[lo] - frame_t), hi, lo)
    frame_dt = float(np.median(np.diff(frame_t))) if frame_t.size > 1 else math.inf
    close = np.abs(t[nearest] - frame_t) <= frame_dt
    out[close] = angle[nearest[close]]
    return out


#: Subject fields carried from an imported file into the session log and on into an export.
SUBJECT_FIELDS = ("subject_id", "species", "sex", "age", "date_of_birth", "strain", "genotype", "description",
                  "weight")


def _subject(subject) -> dict:
    if subject is None:
        return {}
    out = {}
    for name in SUBJECT_FIELDS:
        value = getattr(subject, name, None)
        if value is not None:
            out[name] = value.isoformat() if hasattr(value, "isoformat") else str(value)
    return out


def _intervals(table) -> list[tuple[float, float, tuple[str, ...]]]:
    if table is None or len(table) == 0:
        return []
    start = np.asarray(table["start_time"][:], dtype=np.float64)
    stop = np.asarray(table["stop_time"][:], dtype=np.float64)
    tags = [tuple(table["tags"][i]) for i in range(len(table))] if "tags" in table.colnames else [()] * len(table)
    return [(float(a), float(b), tuple(map(str, tg))) for a, b, tg in zip(start, stop, tags)]
