"""``placeloop import``: its options and what it prints."""

from __future__ import annotations

import argparse
import json
import sys

from rig_adapters.console import CAUTION, HelpFormat, setup_logging

__all__ = ["main", "build_parser"]


IMPORT_DESCRIPTION = """\
Write a placeloop session log from an NWB recording: sorted units' spike
times, the tracked position (units and conversion honoured) and head
direction, marked spikes (--marks) and an LFP (--lfp), as a live rig would
have sent them, with a config skeleton beside
the log (environment guessed from the positions, marked GUESSED). `placeloop
replay`, `sweep` and `report` then take the log unchanged.

The part to learn from: --learn-s, --learn-epoch or --learn-trials; by default
the file's first epoch when it has two or more, else the first half.

Example:
  placeloop import week3_day2.nwb --out sessions/w3d2 --learn-epoch maze_run_1
  placeloop replay sessions/w3d2"""

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


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="placeloop import", description=IMPORT_DESCRIPTION, epilog=CAUTION,
                                formatter_class=HelpFormat)
    p.add_argument("recording", help="the NWB file")
    p.add_argument("--out", required=True, help="the new session directory to write")
    p.add_argument("--position", default=None,
                   help="name of the position SpatialSeries (or Container/series); needed when the file has several")
    p.add_argument("--head-direction", default=None,
                   help="name of the CompassDirection series; the file's only one if not given")
    p.add_argument("--cm-per-unit", type=float, default=None,
                   help="scale of the position data in cm per unit, for a series in pixels or with no unit")
    p.add_argument("--start-s", type=float, default=None, help="import from this data time of the file (s)")
    p.add_argument("--stop-s", type=float, default=None, help="import up to this data time of the file (s)")
    p.add_argument("--learn-s", type=_interval, default=None, metavar="START:STOP",
                   help="learn from this interval of the file's data time (s)")
    p.add_argument("--learn-epoch", default=None, metavar="TAG",
                   help="learn from the epochs tagged TAG (or the epoch of row number TAG)")
    p.add_argument("--learn-trials", type=_rows, default=None, metavar="FIRST:END",
                   help="learn from trial rows FIRST to END-1")
    p.add_argument("--batch-s", type=float, default=0.02, help="data time per spike batch and heartbeat (s)")
    p.add_argument("--no-arm", action="store_true",
                   help="leave the triggers disarmed after the fit (by default the log arms them, so that a "
                        "replay shows the events the rules would fire; a replay never drives hardware)")
    p.add_argument("--marks", action="store_true",
                   help="import marked spikes for clusterless decoding: every FeatureExtraction an electrode group "
                        "(its channels' features), else a per-spike amplitude column of the Units table")
    p.add_argument("--lfp", default=None, metavar="SERIES",
                   help="import this ElectricalSeries (by name) as the LFP of source 'lfp', for ripple detection")
    p.add_argument("--lfp-chunk-s", type=float, default=0.004,
                   help="data time per LFP chunk (s), a few ms as an acquisition system sends")
    p.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return p


def main(argv: list[str] | None = None) -> int:
    """``placeloop import RECORDING.nwb --out LOGDIR [options]``."""
    args = build_parser().parse_args(argv)
    setup_logging(args.verbose)
    from rig_adapters.exchange.nwb_import import import_nwb
    from rig_adapters.exchange.nwb_reading import NwbImportError

    try:
        result = import_nwb(args.recording, args.out, position=args.position, head_direction=args.head_direction,
                            cm_per_unit=args.cm_per_unit, start_s=args.start_s, stop_s=args.stop_s,
                            learn_s=args.learn_s, learn_epoch=args.learn_epoch, learn_trials=args.learn_trials,
                            batch_s=args.batch_s, arm=not args.no_arm, marks=args.marks, lfp=args.lfp,
                            lfp_chunk_s=args.lfp_chunk_s)
    except (NwbImportError, FileExistsError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    learn = ", ".join(f"{a:g}-{b:g} s" for a, b in result.learn_intervals_s)
    print(f"wrote {result.log_dir}: {result.n_units} units, {result.n_spikes} spikes, {result.n_frames} frames, "
          f"{result.start_s:g}-{result.stop_s:g} s; learning from {result.learn_source} ({learn})")
    print(f"environment GUESSED from the positions: {json.dumps(result.environment)}; check it in "
          f"{result.log_dir / 'config.toml'} and add zones and rules")
    if result.n_groups:
        print(f"marks: {result.n_marked_spikes} marked spikes of {result.n_groups} electrode groups")
    if result.n_lfp_chunks:
        print(f"LFP: {result.n_lfp_chunks} chunks from source 'lfp'")
    for note in result.notes:
        print(f"note: {note}")
    return 0


