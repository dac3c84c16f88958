"""``placeloop export --format nwb``: a recorded session as an NWB file.

What goes in, all times in seconds of the session's data time (the
acquisition clock; for an imported session, the source file's own seconds
from its ``session_start_time``):

* processing module ``placeloop_decoding``: the decoded position (the point
  estimate chosen at fit, the MAP and the posterior mean) and the tracked (and, on a simulated rig, true) position
  at every decoded step as ``SpatialSeries`` in ``Position`` containers,
  the posterior's summaries (peak probability, 95% HPD size, mass in each
  zone, spikes in the window) and the decoding error as ``TimeSeries``;
  the model's rate maps and figures per unit and its spatial bins
  (centre, occupancy) as tables;
* ``intervals/trigger_events``: one row per event with its zone, rule,
  zone mass, positions and the live run's wall-clock latency stamps;
* the file's metadata: the session's config (TOML) in ``notes``, the
  model's readiness figures and the replay's summary as JSON in
  ``data_collection``.

Positions are stored in cm with ``conversion = 0.01`` and ``unit =
"meters"``, as NWB asks (``data * conversion`` is in ``unit``).
"""

from __future__ import annotations

import datetime
import json
import logging
import uuid
from pathlib import Path

import numpy as np

from rig_adapters.exchange.decoded import DecodedSession
from rig_adapters.exchange.nwb_reading import require_pynwb
from rig_adapters.sessions.summary import jsonable

log = logging.getLogger(__name__)

__all__ = ["write_nwb", "MODULE_NAME", "EVENTS_NAME"]

MODULE_NAME = "placeloop_decoding"
EVENTS_NAME = "trigger_events"
_CM = 0.01  # conversion factor: cm of the data to the metres NWB names


def _session_start(decoded: DecodedSession) -> datetime.datetime:
    """The imported file's session start when there is one, else when the log was created."""
    meta = decoded.header.get("metadata", {})
    wall_s = meta.get("session_start_wall_s", decoded.header.get("created_wall_s", 0.0))
    return datetime.datetime.fromtimestamp(float(wall_s), tz=datetime.timezone.utc)


def _timing(t_s: np.ndarray, step_s: float) -> dict:
    """``starting_time`` and ``rate`` for evenly spaced steps (what NWB prefers), else the timestamps."""
    if t_s.size > 2 and np.allclose(np.diff(t_s), step_s, rtol=0, atol=1e-9):
        return {"starting_time": float(t_s[0]), "rate": 1.0 / step_s}
    return {"timestamps": t_s}


def _subject(pynwb, decoded: DecodedSession, given: dict):
    """The subject: fields given on the command line over those an import carried in the log's metadata."""
    import dateutil.parser

    fields = {**decoded.header.get("metadata", {}).get("subject", {}), **{k: v for k, v in given.items() if v}}
    if not fields:
        log.warning("the export names no subject; NWB validators call a missing subject critical: give --subject-id, "
                    "--species, --sex and --age")
        return None
    missing = [k for k in ("sex", "age") if k not in fields and not (k == "age" and "date_of_birth" in fields)]
    if missing:
        log.warning("the subject has no %s; nwbinspector calls that critical: give %s", " or ".join(missing),
                    " and ".join(f"--{k}" for k in missing))
    if "date_of_birth" in fields:
        fields["date_of_birth"] = dateutil.parser.isoparse(fields["date_of_birth"])
    if "weight" in fields:
        fields["weight"] = str(fields["weight"])
    return pynwb.file.Subject(subject_id=fields.pop("subject_id", "unknown"), **fields)


def write_nwb(decoded: DecodedSession, out: str | Path, description: str = "", subject: dict | None = None) -> Path:
    """Write ``decoded`` as an NWB file at ``out``.

    Parameters
    ----------
    decoded : DecodedSession
    out : path
        The new file; it must not exist.
    description : str
        The file's ``session_description``; a sentence naming the session by default.
    subject : dict, optional
        ``subject_id``, ``species``, ``sex``, ``age`` (ISO 8601 duration, e.g. ``P90D``), over those an
        import carried from its source file.

    Returns
    -------
    Path
    """
    pynwb = require_pynwb()
    from hdmf.common import DynamicTable, VectorData
    from pynwb import TimeSeries
    from pynwb.behavior import Position, SpatialSeries
    from pynwb.epoch import TimeIntervals

    out = Path(out)
    if out.exists():
        raise FileExistsError(f"{out} exists already; choose a new file name")
    steps = decoded.steps
    t = steps["t_s"]
    if t.size == 0:
        raise ValueError("the session decoded no step (no model was fitted or loaded); there is nothing to "
                             "export. Check its learning part, or replay it with --model")
    meta = decoded.header.get("metadata", {})
    readiness = decoded.summary.get("session", {}).get("readiness")
    nwb = pynwb.NWBFile(
        session_description=description or f"placeloop decoding of session {meta.get('nwb_identifier', '')}".strip(),
        identifier=str(uuid.uuid4()),
        session_start_time=_session_start(decoded),
        notes="placeloop config (TOML) the session was replayed with:\n" + decoded.config.source_text,
        data_collection=json.dumps(jsonable({"readiness": readiness, "decode": decoded.summary.get("decode"),
                                             "triggers": decoded.summary.get("triggers"),
                                             "log_header": decoded.header}), allow_nan=False),
        experiment_description="Position decoded from place-cell spikes in closed loop, step by step, by placeloop",
        keywords=["place cells", "position decoding", "closed loop", "hippocampus"],
        source_script="placeloop export",
        source_script_file_name="rig_adapters/exchange/nwb_export.py",
    )
    subject_table = _subject(pynwb, decoded, subject or {})
    if subject_table is not None:
        nwb.subject = subject_table
    module = nwb.create_processing_module(MODULE_NAME, "Closed-loop Bayesian position decoding by placeloop: "
                                                        "decoded and tracked positions per step, posterior "
                                                        "summaries, rate maps")
    timing = _timing(t, decoded.step_s)
    frame = "the experiment config's [environment] frame, as tracked (cm in the data, metres after conversion)"

    def spatial(name: str, xcol: str, ycol: str, what: str) -> SpatialSeries:
        xy = np.column_stack([steps[xcol], steps[ycol]])
        return SpatialSeries(name=name, data=xy, reference_frame=frame, unit="meters", conversion=_CM,
                             description=what, **timing)

    decoded_pos = Position(name="decoded_position", spatial_series=[
        spatial("decoded", "decoded_x_cm", "decoded_y_cm", "the decoded position: the point estimate chosen at fit "
                "time (the MAP or the posterior mean), the one the session is scored on"),
        spatial("map", "map_x_cm", "map_y_cm", "maximum a posteriori position (centre of the most probable bin)"),
        spatial("posterior_mean", "mean_x_cm", "mean_y_cm", "posterior mean of the bin centres"),
    ])
    module.add(decoded_pos)
    tracked = [spatial("tracked", "tracked_x_cm", "tracked_y_cm", "tracked position at each step's end, NaN where "
                                                                   "the tracker had lost the animal")]
    if np.isfinite(steps["true_x_cm"]).any():
        tracked.append(spatial("true", "true_x_cm", "true_y_cm", "true position (simulated rig only)"))
    module.add(Position(name="tracked_position_at_steps", spatial_series=tracked))
    env_unit = "cm^2" if decoded.config.environment.grid_shape is not None else "cm"
    module.add(TimeSeries(name="peak_probability", data=steps["peak_prob"], unit="probability",
                          description="posterior probability of the MAP bin", **timing))
    module.add(TimeSeries(name="hpd95_size", data=steps["hpd95_size"], unit=env_unit,
                          description="size of the 95% highest-posterior-density region (area in an arena, "
                                      "length on a track or graph)", **timing))
    module.add(TimeSeries(name="spikes_in_window", data=steps["n_spikes"].astype(np.int64), unit="spikes",
                          description="spikes counted in the step's decoding window", **timing))
    module.add(TimeSeries(name="decoding_error", data=steps["error_cm"], unit="meters", conversion=_CM,
                          description="distance from the decoded position to the true (else tracked) position; NaN when "
                                      "neither is known", **timing))
    if decoded.zone_names:
        mass = np.column_stack([steps[f"zone_mass_{z}"] for z in decoded.zone_names])
        module.add(TimeSeries(name="zone_mass", data=mass, unit="probability",
                              description="posterior mass inside each zone; columns in this order: "
                                          + ", ".join(decoded.zone_names), **timing))
    if decoded.model is not None:
        _add_model(module, decoded, DynamicTable, VectorData)
    if decoded.events["event_id"]:
        _add_events(nwb, decoded, TimeIntervals)
    out.parent.mkdir(parents=True, exist_ok=True)
    partial = out.with_name(f".{out.stem}.partial{out.suffix}")
    partial.unlink(missing_ok=True)
    try:
        with pynwb.NWBHDF5IO(str(partial), "w") as io:
            io.write(nwb)
        partial.rename(out)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    return out


def _add_model(module, decoded: DecodedSession, DynamicTable, VectorData) -> None:
    model = decoded.model
    env = decoded.config.environment
    centres = np.asarray(env.bin_centers_cm, dtype=np.float64)
    occupancy = np.asarray(getattr(model, "occupancy_s_", np.full(env.n_bins, np.nan)), dtype=np.float64)
    visited = np.asarray(getattr(model, "visited_mask_", np.ones(env.n_bins, bool)), dtype=bool)
    module.add(DynamicTable(name="spatial_bins", description="the environment's bins in the rate maps' order "
                                                             "(row-major on a grid): centre, occupancy while "
                                                             "learning, whether the model has a map there",
                            columns=[VectorData(name="x_cm", data=centres[:, 0], description="bin centre x (cm)"),
                                     VectorData(name="y_cm", data=centres[:, 1], description="bin centre y (cm)"),
                                     VectorData(name="occupancy_s", data=occupancy,
                                                description="running time spent in the bin while learning (s)"),
                                     VectorData(name="visited", data=visited,
                                                description="the learned map covers the bin")]))
    per_unit = {
        "unit_id": ("unit id as on the wire (the NWB Units table's id for an imported session)", model.unit_ids_),
        "rate_map_hz": ("smoothed firing rate in each spatial bin (Hz), bins as in spatial_bins", model.rate_maps_hz_),
        "peak_rate_hz": ("largest rate of the map (Hz)", model.peak_rate_hz_),
        "mean_rate_hz": ("occupancy-weighted mean rate (Hz)", model.mean_rate_hz_),
        "information_bits_per_spike": ("Skaggs spatial information (bits/spike)", model.info_bits_per_spike_),
        "sparsity": ("Skaggs sparsity, 0-1", model.sparsity_),
    }
    columns = [VectorData(name=name, data=np.asarray(values), description=what)
               for name, (what, values) in per_unit.items()]
    module.add(DynamicTable(name="rate_maps", description="the place model decoding at the end of the session, "
                                                          "one row per unit", columns=columns))


def _add_events(nwb, decoded: DecodedSession, TimeIntervals) -> None:
    ev = decoded.events
    table = TimeIntervals(name=EVENTS_NAME, description="trigger events placeloop fired (or, in a dry run, "
                                                         "withheld); each spans the decoding window of the step "
                                                         "that fired, ending at that step")
    descriptions = {
        "event_id": "event id, unique in the session", "rule": "name of the rule that fired",
        "zone": "name of the zone entered", "zone_mass": "posterior mass in the zone at the step",
        "map_x_cm": "MAP x (cm)", "map_y_cm": "MAP y (cm)", "mean_x_cm": "posterior mean x (cm)",
        "mean_y_cm": "posterior mean y (cm)", "tracked_x_cm": "tracked x (cm), NaN when lost",
        "tracked_y_cm": "tracked y (cm), NaN when lost",
        "far_from_zone": "the animal was known to be farther than the false margin from the zone",
        "wall_received_s": "live run: wall clock at receipt of the message that closed the step (s since the "
                           "Unix epoch), NaN if the live run sent no such event",
        "wall_decoded_s": "live run: wall clock at the end of decoding, NaN as above",
        "wall_sent_s": "live run: wall clock at sending, NaN as above",
    }
    # A replay with other settings has events the live run never sent: no stamps to keep.
    for name in ("wall_received_s", "wall_decoded_s", "wall_sent_s"):
        if not np.isfinite(np.asarray(ev[name], dtype=np.float64)).any():
            del descriptions[name]
    for name, what in descriptions.items():
        table.add_column(name=name, description=what)
    window_s = decoded.config.decoder.window_s
    for i, t in enumerate(ev["t_s"]):
        table.add_row(start_time=float(t) - window_s, stop_time=float(t), **{
            name: (str(ev[name][i]) if name in ("rule", "zone") else bool(ev[name][i]) if name == "far_from_zone"
                   else int(ev[name][i]) if name == "event_id" else float(ev[name][i]))
            for name in descriptions})
    nwb.add_time_intervals(table)
