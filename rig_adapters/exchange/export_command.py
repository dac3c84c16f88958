"""``placeloop export``: its options and what it prints."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from decoder.config import ConfigError, load_config, parse_settings, with_overrides
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.console import CAUTION, HelpFormat, setup_logging
from rig_adapters.sessions.recorder import LogFormatError

__all__ = ["main", "build_parser"]


EXPORT_DESCRIPTION = """\
Export a recorded session (live, replayed or imported) as NWB, or its decoded
steps and events as Parquet or CSV tables. The session is replayed through
the same pipeline with its recorded config (or --config / --set), which
reproduces a live run's decoded steps and events exactly; event latency
stamps come from the live run's own records.

Examples:
  placeloop export sessions/w3d2 --out w3d2_decoded.nwb --sex F --age P84D --species "Mus musculus"
  placeloop export sessions/w3d2 --format parquet --out w3d2_tables/"""


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="placeloop export", description=EXPORT_DESCRIPTION, epilog=CAUTION,
                                formatter_class=HelpFormat)
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


def main(argv: list[str] | None = None) -> int:
    """``placeloop export LOGDIR --out FILE.nwb | --format parquet|csv --out DIR``."""
    args = build_parser().parse_args(argv)
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
