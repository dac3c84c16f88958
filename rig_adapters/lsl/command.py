"""``placeloop bridge lsl``: its options, the caution, and the report it prints."""

from __future__ import annotations

import argparse
import json
import signal
import sys
from pathlib import Path

from decoder.config import is_loopback_endpoint
from rig_adapters.console import CAUTION, setup_logging

__all__ = ["main", "build_parser"]

DESCRIPTION = """\
Subscribe to Lab Streaming Layer streams and republish them on placeloop's
wire protocol, for `placeloop run --rig` to connect to.

  spikes    one integer channel, one sample per spike: the unit id, stamped with the spike's time
  marks     one stream per electrode group, one sample per spike: its mark in uV on each of the
            group's channels (the stream's channel count is the group's); groups 0, 1, ... in the
            order of the --marks options
  position  two or three float channels, x, y[, heading in rad], at the tracker's rate; cm unless
            the stream's channel metadata names another length (or --cm-per-unit)
  lfp       up to 512 channels in uV at a regular rate, republished as LFP chunks of source "lfp"
            (the config's [ripples] source); a gap in its stamps is counted as lost samples

Streams are chosen by NAME, name=NAME, type=TYPE or source_id=ID. Every LSL
timestamp is mapped onto this machine's LSL clock with LSL's own clock-offset
estimates; both sources announce that clock, so no sync pulses are needed.
Lost frames, late or reordered samples, silent streams and closed outlets are
counted and reported at the end (and in --report). LSL finds streams on the
network; set LSLAPICFG to a config with ResolveScope = machine to keep it to
this machine.

Example:
  placeloop bridge lsl --spikes type=spikes --position "name=overhead camera" --pub tcp://127.0.0.1:5770 &
  placeloop bridge lsl --marks name=tt1 --marks name=tt2 --position type=position --lfp type=lfp &
  placeloop run --config rig.toml --model session1.npz --rig tcp://127.0.0.1:5770 --dry-run"""


class _Formatter(argparse.ArgumentDefaultsHelpFormatter, argparse.RawDescriptionHelpFormatter):
    """Defaults shown beside every option; the description kept as written."""


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="placeloop bridge lsl", description=DESCRIPTION, epilog=CAUTION,
                                formatter_class=_Formatter)
    p.add_argument("--spikes", default=None,
                   help="the LSL spike stream (type=spikes when no --marks is given; none with --marks unless given)")
    p.add_argument("--position", default="type=position", help="the LSL position stream")
    p.add_argument("--lfp", default=None, help="an LSL LFP stream, republished from source 'lfp'")
    p.add_argument("--marks", action="append", default=[],
                   help="an LSL stream of one electrode group's spike marks; repeat for each group")
    p.add_argument("--pub", default="tcp://127.0.0.1:5770", help="bind the wire protocol's PUB socket here")
    p.add_argument("--allow-remote", action="store_true", help="allow --pub on an interface other than loopback")
    p.add_argument("--cm-per-unit", type=float, default=None,
                   help="position scale in cm per unit, over the stream's own unit metadata")
    p.add_argument("--holdback-s", type=float, default=0.02,
                   help="heartbeats run this far behind the clock, the time LSL takes to deliver a sample (s of data time)")
    p.add_argument("--heartbeat-s", type=float, default=0.01, help="heartbeat interval (s of data time)")
    p.add_argument("--resolve-timeout-s", type=float, default=10.0, help="how long to look for each stream (wall-clock s)")
    p.add_argument("--stall-s", type=float, default=2.0, help="report a stream silent this long (wall-clock s)")
    p.add_argument("--rejoin-s", type=float, default=5.0,
                   help="after a stream's outlet closed, look for it again this long before stopping (wall-clock s)")
    p.add_argument("--duration-s", type=float, default=None, help="stop after this many wall-clock seconds")
    p.add_argument("--report", default=None, help="write the JSON report here at the end")
    p.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return p


def main(argv: list[str] | None = None) -> int:
    """``placeloop bridge lsl [options]``."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv[:1] != ["lsl"]:
        print("error: placeloop bridge has one kind today: placeloop bridge lsl --help", file=sys.stderr)
        return 2
    args = build_parser().parse_args(argv[1:])
    setup_logging(args.verbose)
    print(CAUTION, file=sys.stderr)
    if not args.allow_remote and not is_loopback_endpoint(args.pub):
        print(f"error: --pub {args.pub} is not on loopback; pass --allow-remote to publish on another interface",
              file=sys.stderr)
        return 2
    import zmq

    from rig_adapters.lsl.bridge import BridgeError, LslBridge

    try:
        spikes = args.spikes if args.spikes is not None or args.marks else "type=spikes"
        bridge = LslBridge(spikes, args.position, args.pub, holdback_s=args.holdback_s,
                           heartbeat_s=args.heartbeat_s, resolve_timeout_s=args.resolve_timeout_s,
                           stall_s=args.stall_s, rejoin_s=args.rejoin_s, cm_per_unit=args.cm_per_unit,
                           marks=tuple(args.marks), lfp=args.lfp)

        def _stop(signum, frame):
            bridge.stop_requested = True

        signal.signal(signal.SIGTERM, _stop)
        signal.signal(signal.SIGINT, _stop)
        report = bridge.run(duration_s=args.duration_s)
    except (BridgeError, OSError, zmq.ZMQError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    text = json.dumps(report, indent=2)
    if args.report:
        Path(args.report).write_text(text)
    print(text)
    return 0
