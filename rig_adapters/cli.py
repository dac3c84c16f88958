"""The ``placeloop`` command.

Subcommands::

    placeloop demo      simulated rig + decoder + stimulator stand-in, over loopback
    placeloop run       the decoder's live loop for a real (or simulated) rig
    placeloop replay    feed a recorded session through the same pipeline
    placeloop sim       the simulated rig alone
    placeloop control   send a control command to a running loop
    placeloop monitor   a live web page of the decoding, served on loopback
    placeloop sweep     replay sessions over a grid of settings; the trade-off front
    placeloop report    a self-contained HTML report of a session
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import logging
import os
import signal
import sys
import time
from pathlib import Path

from decoder.config import ConfigError, load_config
from rig_adapters.console import CAUTION, setup_logging

log = logging.getLogger("placeloop")

#: Subcommands handed whole to a module's own ``main(argv)``.
DELEGATED = ("monitor", "sweep", "report")


def _delegated_main(name: str):
    """The ``main(argv)`` of a subcommand that parses its own options.

    Imported on demand: ``placeloop run`` must not pay for matplotlib, dask
    and aiohttp in its memory and start-up time.
    """
    if name == "monitor":
        from rig_adapters.monitor.server import main
    elif name == "sweep":
        from rig_adapters.offline.sweep import main
    else:
        from rig_adapters.offline.report import main
    return main


RUN_DESCRIPTION = """\
The decoder's live loop: rig in, decoding, trigger events out.

--dry-run is safe by construction: the events socket is not bound at all, so
nothing a stimulator bridge connects to exists, and no TTL line is driven.
Every event that would have fired is written to the session log (channel
events_dry_run), counted in the summary (triggers.withheld) and shown
to monitors on the state stream (stats.dry_run, stats.events_withheld)."""

DEFAULT_DEMO_CONFIG = Path(__file__).resolve().parent.parent / "configs" / "round_arena_goal.toml"


def _with_endpoints(config, rig=None, events=None, state=None, control=None):
    ep = config.endpoints
    new = dataclasses.replace(
        ep,
        rig=tuple(rig) if rig else ep.rig,
        events=events or ep.events,
        state=state or ep.state,
        control=control or ep.control,
    )
    return dataclasses.replace(config, endpoints=new)


def cmd_run(args: argparse.Namespace) -> int:
    from decoder.session.pipeline import Pipeline
    from decoder.encoding.place_model import ModelFileError, PlaceModel
    from rig_adapters.live.loop import LiveLoop
    from rig_adapters.sessions.summary import jsonable
    from rig_adapters.sessions.recorder import CONFIG_SIDECAR, INITIAL_MODEL_SIDECAR, SessionRecorder
    from rig_adapters.live.warm_up import warm_up

    print(CAUTION, file=sys.stderr)
    if args.cpu:
        # A core of its own keeps the loop's latency free of a browser, a monitor or a disk.
        os.sched_setaffinity(0, set(args.cpu))
    config = _with_endpoints(load_config(args.config), args.rig, args.events, args.state, args.control)
    if args.dry_run:
        config = dataclasses.replace(config, ttl=dataclasses.replace(config.ttl, device=""))
        print(f"dry run: no events socket at {config.endpoints.events} and no TTL output; events are only "
              "logged and shown to monitors", file=sys.stderr)
    # Before any socket opens: the first decoded step must not wait for numba to compile.
    started = time.perf_counter()
    try:
        warm_up()
    except Exception as exc:  # noqa: BLE001 - the loop still runs; its first steps then pay the compilation
        print(f"warning: the kernels could not be loaded ahead of time ({exc}); the first steps will be slow",
              file=sys.stderr)
    else:
        print(f"kernels ready in {time.perf_counter() - started:.1f} s", file=sys.stderr)
    model = None
    if args.model:
        try:
            model = PlaceModel.load(args.model)
        except ModelFileError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 2
    pipeline = Pipeline(config, model=model)
    recorder = None
    if args.log:
        from rig_adapters.wire import protocol

        recorder = SessionRecorder(args.log, metadata={"config": str(args.config), "protocol": protocol.PROTOCOL_VERSION})
        recorder.write_sidecar(CONFIG_SIDECAR, config.source_text.encode())
        if args.model:
            recorder.write_sidecar(INITIAL_MODEL_SIDECAR, Path(args.model).read_bytes())
    ttl = None
    if config.ttl.device:
        from rig_adapters.live.ttl import TtlDevice

        try:
            ttl = TtlDevice.from_settings(config.ttl, [rule.name for rule in config.rules])
        except OSError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 2
        print(f"TTL on {config.ttl.device}: " + ("; ".join(ttl.describe()) or "no rule drives it"), file=sys.stderr)
    loop = LiveLoop(config, pipeline, recorder=recorder, ttl=ttl, dry_run=args.dry_run)

    def _stop(signum, frame):
        loop.stop_requested = True

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    try:
        loop.run(duration_s=args.duration_s, idle_exit_s=args.idle_exit_s)
    except OSError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    finally:
        if ttl is not None:
            ttl.close()
        if recorder is not None:
            try:
                recorder.close()
            except OSError as exc:
                print(f"error: the session log could not be completed: {exc}", file=sys.stderr)
    summary = loop.summary()
    if args.summary:
        Path(args.summary).write_text(json.dumps(jsonable(summary), indent=2))
    print(json.dumps({"decode": summary["decode"], "triggers": {"count": summary["triggers"]["count"]}}),
          file=sys.stderr)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from rig_adapters.sim.demo import run_demo

    print(CAUTION, file=sys.stderr)
    return run_demo(
        config_path=args.config,
        speed=args.speed,
        log_dir=args.log,
        summary_path=args.summary,
        learn_s=args.learn_s,
        decode_s=args.decode_s,
        seed=args.seed,
    )


def cmd_sim(args: argparse.Namespace) -> int:
    from rig_adapters.sim import simulated_rig

    argv = ["--config", args.config, "--speed", str(args.speed), "--duration-s", str(args.duration_s),
            "--seed", str(args.seed)]
    if args.pub:
        argv += ["--pub", args.pub]
    return simulated_rig.main(argv)


def cmd_control(args: argparse.Namespace) -> int:
    import zmq

    from rig_adapters.wire import protocol

    command = args.command.replace("-", "_")
    cmd_args = {}
    if command == "load_model":
        if not args.path:
            print("error: load-model needs the model file's path", file=sys.stderr)
            return 2
        cmd_args["path"] = str(Path(args.path).resolve())
    if command == "arm":
        print(CAUTION, file=sys.stderr)
    ctx = zmq.Context.instance()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVTIMEO, int(args.timeout_s * 1000))
    try:
        sock.connect(args.endpoint)
        sock.send(protocol.encode_control_request(command, cmd_args))
        try:
            reply = protocol.decode_control_reply(sock.recv())
        except zmq.Again:
            print(f"error: no reply from {args.endpoint} within {args.timeout_s} s; is `placeloop run` up?",
                  file=sys.stderr)
            return 1
    finally:
        sock.close()
    print(json.dumps(reply, indent=2))
    return 0 if reply.get("ok") else 1


def cmd_replay(args: argparse.Namespace) -> int:
    from decoder.config import parse_settings, with_overrides
    from decoder.encoding.place_model import ModelFileError, PlaceModel
    from rig_adapters.sessions.summary import jsonable
    from rig_adapters.sessions.recorder import LogFormatError
    from rig_adapters.sessions.replay import replay_session, session_config

    try:
        config = load_config(args.config) if args.config else session_config(args.log)
        overrides = parse_settings(args.set)
        if overrides:
            config = with_overrides(config, overrides)
        model = PlaceModel.load(args.model) if args.model else None
        result = replay_session(args.log, config=config, model=model, realtime=args.realtime)
    except (LogFormatError, ModelFileError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    s = result.summary
    if result.damage:
        print(f"warning: the log is damaged; replayed up to it: {result.damage}", file=sys.stderr)
    b = s["behaviour"]
    print(f"replayed {s['decode']['steps']} steps from {result.records_read} records in {result.wall_s:.1f} s "
          f"({s['replay']['x_realtime'] or 0:.0f}x real time)")
    print(f"median error {s['decode']['median_error_cm']} cm; events {s['triggers']['count']} "
          f"({s['triggers']['false_count']} far from the zone); zone entries {b['entries']}: {b['hits']} hit, "
          f"{b['misses']} missed, {b['false_events']} false; behavioural latency p50 {b['latency_ms']['p50']} ms")
    print(f"digest {s['decode']['digest']}")
    if args.summary:
        Path(args.summary).write_text(json.dumps(jsonable(s), indent=2))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop",
        description="Closed-loop Bayesian position decoding from place-cell spikes.",
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    sub = parser.add_subparsers(dest="cmd", required=True)

    p = sub.add_parser("demo", help="simulated rig, decoder and stimulator stand-in over loopback ZeroMQ")
    p.add_argument("--config", default=str(DEFAULT_DEMO_CONFIG), help="experiment config (TOML)")
    p.add_argument("--speed", type=float, default=4.0, help="simulated seconds per wall-clock second")
    p.add_argument("--learn-s", type=float, default=None, help="simulated seconds of learning (default: config)")
    p.add_argument("--decode-s", type=float, default=120.0, help="simulated seconds of closed loop after fitting")
    p.add_argument("--log", default=None, help="keep the session log in this directory")
    p.add_argument("--summary", default=None, help="write the JSON summary here")
    p.add_argument("--seed", type=int, default=7)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("run", help="the decoder's live loop", description=RUN_DESCRIPTION, epilog=CAUTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--config", required=True, help="experiment config (TOML)")
    p.add_argument("--model", default=None, help="a model file saved earlier; decode with it from the start")
    p.add_argument("--rig", action="append", default=None, help="rig endpoint to connect to (repeatable)")
    p.add_argument("--events", default=None, help="bind the events PUB socket here")
    p.add_argument("--state", default=None, help="bind the state PUB socket here")
    p.add_argument("--control", default=None, help="bind the control REP socket here")
    p.add_argument("--log", default=None, help="record the session log in this (new) directory")
    p.add_argument("--summary", default=None, help="write the JSON summary here at the end")
    p.add_argument("--duration-s", type=float, default=None, help="stop after this many wall-clock seconds")
    p.add_argument("--idle-exit-s", type=float, default=None, help="stop after this long without rig input")
    p.add_argument("--dry-run", action="store_true",
                   help="publish no event and drive no TTL line, whatever the config says; events are logged only")
    p.add_argument("--cpu", type=int, action="append", default=None,
                   help="run the loop on this CPU core only (repeatable; Linux)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("replay", help="feed a recorded session through the same pipeline")
    p.add_argument("log", help="session directory (or its session.plog)")
    p.add_argument("--config", default=None, help="replay with this config instead of the recorded one")
    p.add_argument("--model", default=None, help="decode with this model file from the start")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="override one setting, e.g. decoder.step_s=0.01 or rules.min_mass=0.7 (repeatable)")
    p.add_argument("--realtime", action="store_true", help="pace by the recorded receive times")
    p.add_argument("--summary", default=None, help="write the JSON summary here (same keys as live)")
    p.set_defaults(func=cmd_replay)

    p = sub.add_parser("sim", help="the simulated rig alone")
    p.add_argument("--config", default=str(DEFAULT_DEMO_CONFIG))
    p.add_argument("--pub", default=None, help="bind the rig's PUB socket here (default: the config's rig endpoint)")
    p.add_argument("--speed", type=float, default=1.0, help="simulated seconds per second (0: as fast as possible)")
    p.add_argument("--duration-s", type=float, default=600.0, help="simulated seconds")
    p.add_argument("--seed", type=int, default=7)
    p.set_defaults(func=cmd_sim)

    sub.add_parser("monitor", help="live web page of the decoding (placeloop monitor --help for its options)")
    sub.add_parser("sweep", help="replay sessions over a grid of settings (placeloop sweep --help)")
    sub.add_parser("report", help="one self-contained HTML report of a session (placeloop report --help)")

    p = sub.add_parser("control", help="send a command to a running loop")
    p.add_argument("command", choices=["start-learning", "stop-learning", "fit", "load-model", "arm", "disarm",
                                       "status"])
    p.add_argument("path", nargs="?", default=None, help="model file, for load-model")
    p.add_argument("--endpoint", default="tcp://127.0.0.1:5773")
    p.add_argument("--timeout-s", type=float, default=10.0)
    p.set_defaults(func=cmd_control)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] and argv[0] in DELEGATED:
        # These subcommands parse their own options.
        return _delegated_main(argv[0])(argv[1:])
    parser = build_parser()
    args = parser.parse_args(argv)
    setup_logging(args.verbose)
    try:
        return args.func(args)
    except ConfigError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
