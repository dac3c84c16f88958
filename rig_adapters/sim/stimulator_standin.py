"""A stimulator stand-in: subscribes to placeloop's events and logs what a real bridge would do.

Run as a process by ``placeloop demo``; on SIGTERM it writes what it received
as JSON and exits. A real bridge would turn each event into a TTL pulse or a
pump command, behind its own hardware limits. With ``--curve-key`` and
``--server-key`` it is a CurveZMQ client of the decoder's events socket.
"""

from __future__ import annotations

import argparse
import json
import signal
import sys
import time

import zmq

from rig_adapters.wire import protocol
from rig_adapters.wire.curve_keys import KeyFileError, client_of


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--events", required=True, help="placeloop's events endpoint to connect to")
    parser.add_argument("--out", required=True, help="write the received events here (JSON) on exit")
    parser.add_argument("--curve-key", default=None,
                        help="this stand-in's .key (placeloop keys) for a CurveZMQ link (default: plain)")
    parser.add_argument("--server-key", default=None, help="the decoder's .pub, with --curve-key (default: none)")
    args = parser.parse_args(argv)
    if bool(args.curve_key) != bool(args.server_key):
        parser.error("a CurveZMQ link needs both --curve-key and --server-key")
    stop = False

    def _stop(signum, frame):
        nonlocal stop
        stop = True

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    received = []
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    try:
        if args.curve_key:
            try:
                client_of(sub, args.curve_key, args.server_key)
            except KeyFileError as exc:
                print(f"stand-in: {exc}", file=sys.stderr)
                return 2
        sub.connect(args.events)
        while not stop:
            if not sub.poll(50):
                continue
            payload = sub.recv()
            arrived = time.time()
            try:
                event = protocol.decode_output(payload)
            except protocol.ProtocolError as exc:
                print(f"stand-in: unreadable event ({exc.reason}): {exc.detail}", file=sys.stderr)
                continue
            event["arrived_wall_s"] = arrived
            received.append(event)
            print(f"stand-in: would pulse for event {event.get('event_id')} (rule {event.get('rule')!r}, "
                  f"zone {event.get('zone')!r})",
                  file=sys.stderr)
    finally:
        sub.close()
        with open(args.out, "w") as fh:
            json.dump(received, fh, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
