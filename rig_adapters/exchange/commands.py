"""``placeloop import`` and ``placeloop export``: their options and what they print."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from decoder.config import ConfigError, load_config, parse_settings, with_overrides
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.console import CAUTION, setup_logging
from rig_adapters.sessions.recorder import LogFormatError

__all__ = ["import_main", "export_main", "build_import_parser", "build_export_parser"]


class _Formatter(argparse.ArgumentDefaultsHelpFormatter, argparse.RawDescriptionHelpFormatter):
    """Defaults shown beside every option; descriptions kept as written."""


IMPORT_DESCRIPTION = """\
Write a placeloop session log from an NWB recording: sorted units' spike
times, the tracked position (units and conversion honoured) and head
direction, as a live rig would have sent them, with a config skeleton beside
the log (environment guessed from the positions, marked GUESSED). `placeloop
replay`, `sweep` and `report` then take the log unchanged.

The part to learn from: --learn-s, --learn-epoch or --learn-trials; by default
the file's first epoch when it has two or more, else the first half.

Example:
  placeloop import week3_day2.nwb --out sessions/w3d2 --learn-epoch maze_run_1
  placeloop replay sessions/w3d2"""

EXPORT_DESCRIPTION = """\
Export a recorded session (live, replayed or imported) as NWB, or its decoded
steps and events as Parquet or CSV tables. The session is replayed through
the same pipeline with its recorded config (or --config / --set), which
reproduces a live run's decoded steps and events exactly; event latency
stamps come from the live run's own records.

Examples:
  placeloop export sessions/w3d2 --out w3d2_decoded.nwb --sex F --age P84D --species "Mus musculus"
  placeloop export sessions/w3d2 --format parquet --out w3d2_tables/"""


def _interval(text: str) -> tuple[float, float]:
    try:
        a, b = (float(v) for v in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected START:STOP in seconds, e.g. 0:600, got {text!r}") from None
    if not b > a:
        raise argparse.ArgumentTypeError(f"STOP must be after START, got {text!r}")
    return a, b


def _rows(text: str) -> tuple[int, int]:
    try:
        a, b = (int(v) for v in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected FIRST:END trial rows, e.g. 0:20, got {text!r}") from None
    return a, b


def build_import_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="placeloop import", description=IMPORT_DESCRIPTION, epilog=CAUTION,
                                formatter_class=_Formatter)
    p.add_argument("recording", help="the NWB file")
    p.add_argument("--out", required=True, help="the new session directory to write")
    p.add_argument("--position", default=None,
                   help="name of the position SpatialSeries (or Container/series); needed when the file has several")
    p.add_argument("--head-direction", default=None,
                   help="name of the CompassDirection series; the file's only one if not given")
    p.add_argument("--cm-per-unit", type=float, default=None,
                   help="scale of the position data in cm per unit, for a series in pixels or with no unit")
    p.add_argument("--start-s", type=float, default=None, help="import from this time of the file (s)")
    p.add_argument("--stop-s", type=float, default=None, help="import up to this time of the file (s)")
    p.add_argument("--learn-s", type=_interval, default=None, metavar="START:STOP",
                   help="learn from this interval of the file (s)")
    p.add_argument("--learn-epoch", default=None, metavar="TAG",
                   help="learn from the epochs tagged TAG (or the epoch of row number TAG)")
    p.add_argument("--learn-trials", type=_rows, default=None, metavar="FIRST:END",
                   help="learn from trial rows FIRST to END-1")
    p.add_argument("--batch-s", type=float, default=0.02, help="data time per spike batch and heartbeat (s)")
    p.add_argument("--no-arm", action="store_true",
                   help="leave the triggers disarmed after the fit (by default the log arms them, so that a "
                        "replay shows the events the rules would fire; a replay never drives hardware)")
    p.add_argument("--marks", action="store_true", help="import waveform features as marks (not available yet)")
    p.add_argument("--lfp", default=None, metavar="SERIES",
                   help="import this ElectricalSeries as LFP (not available yet)")
    p.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return p


def import_main(argv: list[str] | None = None) -> int:
    """``placeloop import RECORDING.nwb --out LOGDIR [options]``."""
    args = build_import_parser().parse_args(argv)
    setup_logging(args.verbose)
    if args.marks or args.lfp:
        what = "waveform marks" if args.marks else "LFP"
        print(f"error: importing {what} is not available yet: the wire protocol carries no {what} message in this "
              "version; import without --marks/--lfp to get the sorted units and position", file=sys.stderr)
        return 2
    from rig_adapters.exchange.nwb_import import import_nwb
    from rig_adapters.exchange.nwb_reading import NwbImportError

    try:
        result = import_nwb(args.recording, args.out, position=args.position, head_direction=args.head_direction,
                            cm_per_unit=args.cm_per_unit, start_s=args.start_s, stop_s=args.stop_s,
                            learn_s=args.learn_s, learn_epoch=args.learn_epoch, learn_trials=args.learn_trials,
                            batch_s=args.batch_s, arm=not args.no_arm)
    except (NwbImportError, FileExistsError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    learn = ", ".join(f"{a:g}-{b:g} s" for a, b in result.learn_intervals_s)
    print(f"wrote {result.log_dir}: {result.n_units} units, {result.n_spikes} spikes, {result.n_frames} frames, "
          f"{result.start_s:g}-{result.stop_s:g} s; learning from {result.learn_source} ({learn})")
    print(f"environment GUESSED from the positions: {json.dumps(result.environment)}; check it in "
          f"{result.log_dir / 'config.toml'} and add zones and rules")
    for note in result.notes:
        print(f"note: {note}")
    return 0


def build_export_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="placeloop export", description=EXPORT_DESCRIPTION, epilog=CAUTION,
                                formatter_class=_Formatter)
    p.add_argument("log", help="session directory (or its session.plog)")
    p.add_argument("--out", required=True, help="the NWB file to write, or the directory for the tables")
    p.add_argument("--format", choices=("nwb", "parquet", "csv"), default="nwb", help="what to write")
    p.add_argument("--config", default=None, help="replay with this config instead of the recorded one")
    p.add_argument("--set", action="append", metavar="NAME=VALUE", default=None,
                   help="override one setting, e.g. rules.min_mass=0.7 (repeatable)")
    p.add_argument("--model", default=None, help="decode with this model file from the start")
    p.add_argument("--description", default="", help="the NWB file's session_description")
    p.add_argument("--subject-id", default=None, help="NWB subject id (an imported session keeps its file's)")
    p.add_argument("--species", default=None, help="NWB subject species, e.g. 'Rattus norvegicus'")
    p.add_argument("--sex", default=None, choices=("F", "M", "U", "O"), help="NWB subject sex")
    p.add_argument("--age", default=None, help="NWB subject age as an ISO 8601 duration, e.g. P90D")
    p.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return p


def export_main(argv: list[str] | None = None) -> int:
    """``placeloop export LOGDIR --out FILE.nwb | --format parquet|csv --out DIR``."""
    args = build_export_parser().parse_args(argv)
    setup_logging(args.verbose)
    from rig_adapters.exchange.decoded import decoded_session
    from rig_adapters.exchange.nwb_export import write_nwb
    from rig_adapters.exchange.nwb_reading import require_pynwb
    from rig_adapters.exchange.tables import require_pyarrow, write_tables
    from rig_adapters.sessions.replay import session_config

    log_path = Path(args.log)
    out = Path(args.out)
    taken = [out] if args.format == "nwb" else [out / f"steps.{args.format}", out / f"events.{args.format}"]
    for path in taken:
        if path.exists():
            # Said before the replay, which takes a while; the writers refuse too.
            print(f"error: {path} exists already; choose a new name", file=sys.stderr)
            return 2
    try:
        # A missing extra is said before the replay, which takes a while.
        if args.format == "nwb":
            require_pynwb()
        else:
            require_pyarrow()
        config = load_config(args.config) if args.config else session_config(
            log_path if log_path.is_dir() else log_path.parent)
        overrides = parse_settings(args.set)
        if overrides:
            config = with_overrides(config, overrides)
        model = PlaceModel.load(args.model) if args.model else None
        decoded = decoded_session(log_path, config=config, model=model)
        if args.format == "nwb":
            subject = {"subject_id": args.subject_id, "species": args.species, "sex": args.sex, "age": args.age}
            written = [write_nwb(decoded, args.out, description=args.description, subject=subject)]
        else:
            written = write_tables(decoded, args.out, args.format)
    except (LogFormatError, ConfigError, ModelFileError, ValueError, ImportError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    d = decoded.summary["decode"]
    print(f"exported {d['steps']} steps and {len(decoded.events['event_id'])} events (median error "
          f"{d['median_error_cm']} cm) to {', '.join(map(str, written))}")
    return 0
