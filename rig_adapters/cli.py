"""The ``placeloop`` command.

Every subcommand follows one convention (``tests/test_cli_convention.py``
holds each to it, the delegated ones included): a summary, a description and
examples in its ``--help``; every option with help and its default shown
(:class:`rig_adapters.console.HelpFormat`); durations named by their clock
(``--data-s``, ``--wall-s``); the caution in the help of every command that
can drive hardware; and an exit status from ``rig_adapters.console.EXIT_CODES``
for each failure. ``monitor``, ``sweep`` and ``report`` parse their own
options (their ``main(argv)`` imported, not looked up by name).
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

from decoder.config import ConfigError, EndpointSettings, load_config
from rig_adapters.console import (
    CAUTION,
    EXIT_FAILED,
    EXIT_FILE,
    EXIT_NO_REPLY,
    EXIT_OK,
    EXIT_OPEN,
    EXIT_USAGE,
    HelpFormat,
    config_path,
    exit_codes_text,
    scenarios,
    setup_logging,
)

log = logging.getLogger("placeloop")

#: Subcommands handed whole to a module's own ``main(argv)``, with their one-line summaries.
DELEGATED = {
    "monitor": "a live web page of the decoding, served on loopback",
    "sweep": "replay sessions over a grid of settings; the trade-off front",
    "report": "one self-contained HTML report of a session",
    "import": "an NWB recording as a session log",
    "export": "a session as NWB, or its decoded steps and events as Parquet or CSV tables",
    "bridge": "LSL streams republished on the wire protocol (placeloop bridge lsl)",
}


def _delegated_main(name: str):
    """The ``main(argv)`` of a subcommand that parses its own options.

    Imported on demand: ``placeloop run`` must not pay for matplotlib, dask
    and aiohttp in its memory and start-up time.
    """
    if name == "monitor":
        from rig_adapters.monitor.server import main
    elif name == "sweep":
        from rig_adapters.offline.sweep import main
    elif name == "import":
        from rig_adapters.exchange.import_command import main
    elif name == "export":
        from rig_adapters.exchange.export_command import main
    elif name == "bridge":
        from rig_adapters.lsl.command import main
    else:
        from rig_adapters.offline.report import main
    return main


DEFAULT_SCENARIO = "round_arena_goal"
DEFAULT_CONTROL = EndpointSettings().control
CONTROL_COMMANDS = ("start-learning", "stop-learning", "fit", "load-model", "arm", "disarm", "status")

DEMO_DESCRIPTION = """\
The whole closed loop on the simulated rig: three processes over loopback ZeroMQ, as on a rig.
The simulated rig publishes spikes, tracker frames and sync pulses at --speed times real time;
the decoder (placeloop run) learns, fits, arms the triggers and decodes every step; a
stimulator stand-in subscribes to the events. Nothing outside this machine is driven: the
config's [ttl] table is dropped. A summary is printed at the end."""

RUN_DESCRIPTION = """\
The decoder's live loop: rig in, decoding, trigger events out (and TTL pulses, per [ttl]).

--dry-run is safe by construction: the events socket is not bound at all, so
nothing a stimulator bridge connects to exists, and no TTL line is driven.
Every event that would have fired is written to the session log (channel
events_dry_run), counted in the summary (triggers.withheld) and shown
to monitors on the state stream (stats.dry_run, stats.events_withheld).
With [endpoints] curve_sockets, those sockets are CurveZMQ links that admit only the peers whose
keys are listed (placeloop keys; rig_adapters/wire/PROTOCOL.md); refusals are counted.
Stop it with Ctrl-C or SIGTERM: the triggers stop with it and the log is completed."""

REPLAY_DESCRIPTION = """\
Feed a recorded session's bytes, in their recorded order, through the same pipeline as live.
With the recorded config and no --set it reproduces the live run (the same digest); with --set
or another config it shows what those settings would have done. Drives nothing."""

CONTROL_DESCRIPTION = """\
Send one command to a running `placeloop run` and print its reply (JSON). The command goes to
the control endpoint of the loop's config (--config), or to --endpoint.
  start-learning, stop-learning   learn the place model from the incoming data, or stop
  fit                             fit the model now; prints the readiness report
  load-model MODEL                decode with a model file saved earlier
  arm, disarm                     trigger arming: let the rules fire, or stop them
  status                          the session's state and counters
`arm` lets the rules drive reward and stimulation hardware."""

KEYS_DESCRIPTION = """\
Make a CurveZMQ key pair for an authenticated link: NAME.key (the secret half, mode 0600; it
stays on the machine that uses it) and NAME.pub (the public half, to give to the other side).
Make one pair for the decoder (its .key in [endpoints] curve_secret_key, its .pub to every peer)
and one per peer (rig publisher, stimulator, control client; each .pub into the directory
[endpoints] curve_clients). Existing files are never overwritten. The file format is in
rig_adapters/wire/PROTOCOL.md (authenticated links)."""

CONFIG_DESCRIPTION = """\
The configuration: the reference of every table and key (generated from the config's own
definitions; docs/CONFIG.md is its output), the example scenarios installed with placeloop
(configs/ in the source), and a check of a config file."""


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


def _error(message: str, status: int) -> int:
    print(f"error: {message}", file=sys.stderr)
    return status


def _write_summary(path: str, summary: dict) -> int:
    """Write the JSON summary; the exit status (EXIT_FILE, said why, if it cannot be written)."""
    try:
        Path(path).write_text(json.dumps(summary, indent=2))
    except OSError as exc:
        return _error(f"the summary could not be written to {path}: {exc}", EXIT_FILE)
    return EXIT_OK


def cmd_run(args: argparse.Namespace) -> int:
    from decoder.session.pipeline import Pipeline
    from decoder.session.steps import model_problem
    from decoder.encoding.place_model import ModelFileError, PlaceModel
    from rig_adapters.live.loop import LiveLoop
    from rig_adapters.sessions.summary import jsonable
    from rig_adapters.sessions.recorder import CONFIG_SIDECAR, INITIAL_MODEL_SIDECAR, SessionRecorder
    from rig_adapters.live.warm_up import warm_up
    from rig_adapters.wire.curve_keys import KeyFileError

    print(CAUTION, file=sys.stderr)
    if args.cpu:
        # A core of its own keeps the loop's latency free of a browser, a monitor or a disk.
        os.sched_setaffinity(0, set(args.cpu))
    config = _with_endpoints(load_config(config_path(args.config)), args.rig, args.events, args.state, args.control)
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
            return _error(str(exc), EXIT_FILE)
        # The check a load_model request gets: a model that cannot decode this session never starts it.
        why = model_problem(model, config.environment, config.marks.enabled)
        if why is not None:
            return _error(f"--model {args.model}: {why}", EXIT_FILE)
    pipeline = Pipeline(config, model=model)
    recorder = None
    if args.log:
        from rig_adapters.wire import protocol

        try:
            recorder = SessionRecorder(args.log, metadata={"config": str(args.config),
                                                           "protocol": protocol.PROTOCOL_VERSION})
            recorder.write_sidecar(CONFIG_SIDECAR, config.source_text.encode())
            if args.model:
                recorder.write_sidecar(INITIAL_MODEL_SIDECAR, Path(args.model).read_bytes())
        except OSError as exc:
            return _error(f"the session log cannot be started in {args.log}: {exc}", EXIT_FILE)
    ttl = None
    if config.ttl.device:
        from rig_adapters.live.ttl import TtlDevice

        try:
            ttl = TtlDevice.from_settings(config.ttl, [rule.name for rule in config.rules])
        except OSError as exc:
            return _error(str(exc), EXIT_OPEN)
        print(f"TTL on {config.ttl.device}: " + ("; ".join(ttl.describe()) or "no rule drives it"), file=sys.stderr)
    loop = LiveLoop(config, pipeline, recorder=recorder, ttl=ttl, dry_run=args.dry_run)

    def _stop(signum, frame):
        loop.stop_requested = True

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    status = EXIT_OK
    try:
        loop.run(duration_s=args.wall_s, idle_exit_s=args.idle_wall_s)
    except OSError as exc:
        return _error(str(exc), EXIT_OPEN)
    except KeyFileError as exc:
        return _error(f"[endpoints] CurveZMQ keys: {exc}", EXIT_FILE)
    finally:
        if ttl is not None:
            ttl.close()
        if recorder is not None:
            try:
                recorder.close()
            except OSError as exc:
                status = _error(f"the session log could not be completed: {exc}", EXIT_FILE)
    summary = loop.summary()
    if args.summary:
        status = _write_summary(args.summary, jsonable(summary)) or status
    print(json.dumps({"decode": summary["decode"], "triggers": {"count": summary["triggers"]["count"]},
                      **({"ttl": summary["ttl"]} if "ttl" in summary else {})}), file=sys.stderr)
    return status


def cmd_demo(args: argparse.Namespace) -> int:
    from rig_adapters.sim.demo import run_demo

    print(CAUTION, file=sys.stderr)
    return run_demo(
        config_path=str(config_path(args.config)),
        speed=args.speed,
        log_dir=args.log,
        summary_path=args.summary,
        learn_s=args.learn_data_s,
        decode_s=args.decode_data_s,
        seed=args.seed,
    )


def cmd_sim(args: argparse.Namespace) -> int:
    from rig_adapters.sim import simulated_rig

    argv = ["--config", str(config_path(args.config)), "--speed", str(args.speed), "--duration-s", str(args.data_s),
            "--seed", str(args.seed)]
    if args.pub:
        argv += ["--pub", args.pub]
    if args.curve_key or args.server_key:
        argv += ["--curve-key", args.curve_key or "", "--server-key", args.server_key or ""]
    return simulated_rig.main(argv)


def cmd_control(args: argparse.Namespace) -> int:
    import zmq

    from rig_adapters.wire import protocol

    command = args.command.replace("-", "_")
    cmd_args = {}
    if command == "load_model":
        if not args.path:
            return _error("load-model needs the model file's path: placeloop control load-model MODEL", EXIT_USAGE)
        cmd_args["path"] = str(Path(args.path).resolve())
    if command == "arm":
        print(CAUTION, file=sys.stderr)
    endpoint = args.endpoint or (load_config(config_path(args.config)).endpoints.control if args.config
                                 else DEFAULT_CONTROL)
    if bool(args.curve_key) != bool(args.server_key):
        return _error("an authenticated link needs both --curve-key (this side's .key) and --server-key "
                      "(the decoder's .pub)", EXIT_USAGE)
    ctx = zmq.Context.instance()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVTIMEO, int(args.timeout_wall_s * 1000))
    try:
        if args.curve_key:
            from rig_adapters.wire.curve_keys import KeyFileError, client_of

            try:
                client_of(sock, args.curve_key, args.server_key)
            except KeyFileError as exc:
                return _error(str(exc), EXIT_FILE)
        sock.connect(endpoint)
        sock.send(protocol.encode_control_request(command, cmd_args))
        try:
            reply = protocol.decode_control_reply(sock.recv())
        except zmq.Again:
            return _error(f"no reply from {endpoint} within {args.timeout_wall_s} s; is `placeloop run` up, is "
                          "this its config's [endpoints] control, and, if that socket is in curve_sockets, are "
                          "--curve-key and --server-key the right keys?", EXIT_NO_REPLY)
    finally:
        sock.close()
    print(json.dumps(reply, indent=2))
    return EXIT_OK if reply.get("ok") else EXIT_FAILED


def cmd_keys(args: argparse.Namespace) -> int:
    from rig_adapters.wire.curve_keys import KeyFileError, write_key_pair

    try:
        secret_path, public_path = write_key_pair(args.dir, args.name)
    except KeyFileError as exc:
        return _error(str(exc), EXIT_USAGE)
    except OSError as exc:
        return _error(f"the key pair could not be written in {args.dir}: {exc}", EXIT_FILE)
    print(f"secret key {secret_path} (mode 0600: keep it on this machine)")
    print(f"public key {public_path} (give it to the other side)")
    return EXIT_OK


def cmd_replay(args: argparse.Namespace) -> int:
    from decoder.config import parse_settings, with_overrides
    from decoder.encoding.place_model import ModelFileError, PlaceModel
    from rig_adapters.sessions.summary import jsonable
    from rig_adapters.sessions.recorder import LogFormatError
    from rig_adapters.sessions.replay import replay_session, session_config

    try:
        config = load_config(config_path(args.config)) if args.config else session_config(args.log)
        overrides = parse_settings(args.set)
        if overrides:
            config = with_overrides(config, overrides)
        model = PlaceModel.load(args.model) if args.model else None
        result = replay_session(args.log, config=config, model=model, realtime=args.realtime)
    except (LogFormatError, ModelFileError, OSError) as exc:
        return _error(str(exc), EXIT_FILE)
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
    return _write_summary(args.summary, jsonable(s)) if args.summary else EXIT_OK


def cmd_config(args: argparse.Namespace) -> int:
    if args.reference:
        from rig_adapters.offline.config_reference import reference

        sys.stdout.write(reference())
    elif args.scenarios:
        for name, path in scenarios().items():
            print(f"{name:28s} {path}")
    elif args.show:
        sys.stdout.write(config_path(args.show).read_text(encoding="utf-8"))
    else:
        config = load_config(config_path(args.check))
        print(f"{args.check}: valid; {type(config.environment).__name__} of {config.environment.n_bins} bins, "
              f"{len(config.zones)} zone(s), {len(config.rules)} rule(s), "
              f"TTL {'on ' + config.ttl.device if config.ttl.device else 'off'}")
    return EXIT_OK


class _Renamed(argparse.Action):
    """An old spelling of an option: still accepted, with a warning that names the new one."""

    def __init__(self, option_strings, dest, new: str, **kwargs) -> None:
        super().__init__(option_strings, dest, help=argparse.SUPPRESS, default=argparse.SUPPRESS, **kwargs)
        self.new = new

    def __call__(self, parser, namespace, values, option_string=None) -> None:
        print(f"warning: {option_string} is deprecated and will go; use {self.new}", file=sys.stderr)
        setattr(namespace, self.dest, values)


def _command(sub, name: str, summary: str, description: str, examples: str, caution: bool = False):
    """A subcommand in the one convention: a summary, a description, examples, the caution where it drives hardware."""
    epilog = "examples:\n" + examples.rstrip() + ("\n\n" + CAUTION if caution else "")
    return sub.add_parser(name, help=summary, description=description, epilog=epilog, formatter_class=HelpFormat)


def _config_option(p, default: str | None = None, what: str = "experiment config") -> None:
    p.add_argument("--config", default=default, required=default is None, metavar="FILE|SCENARIO",
                   help=f"{what}: a TOML file, or the name of a scenario installed with placeloop "
                        "(placeloop config --scenarios)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop",
        description="Closed-loop Bayesian position decoding from place-cell spikes, over ZeroMQ.\n\n"
                    "Every command answers --help with a description, examples and each option's default.",
        epilog=exit_codes_text() + "\n\n" + CAUTION,
        formatter_class=HelpFormat,
    )
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    sub = parser.add_subparsers(dest="cmd", required=True, metavar="COMMAND")

    p = _command(sub, "demo", "the whole closed loop on the simulated rig, over loopback",
                 DEMO_DESCRIPTION, "  placeloop demo --summary demo.json\n"
                 "  placeloop demo --config linear_track_2m --speed 8 --log sessions/demo-track", caution=True)
    _config_option(p, DEFAULT_SCENARIO)
    p.add_argument("--speed", type=float, metavar="X", default=4.0,
                   help="simulated (data) seconds per wall-clock second")
    p.add_argument("--learn-data-s", type=float, metavar="S", default=None,
                   help="data seconds of learning before the fit (default: the config's [session] learn_s, "
                        "else 180)")
    p.add_argument("--learn-s", dest="learn_data_s", type=float, action=_Renamed, new="--learn-data-s")
    p.add_argument("--decode-data-s", type=float, metavar="S", default=120.0,
                   help="data seconds of closed loop after the fit")
    p.add_argument("--decode-s", dest="decode_data_s", type=float, action=_Renamed, new="--decode-data-s")
    p.add_argument("--log", default=None, metavar="DIR", help="keep the session log in this new directory")
    p.add_argument("--summary", default=None, metavar="FILE", help="write the JSON summary here")
    p.add_argument("--seed", type=int, default=7, help="seed of the simulated animal and cells")
    p.set_defaults(func=cmd_demo)

    p = _command(sub, "run", "the decoder's live loop: rig in, decoding, trigger events out", RUN_DESCRIPTION,
                 "  placeloop run --config my_rig.toml --dry-run --log sessions/dry-1\n"
                 "  placeloop run --config my_rig.toml --rig tcp://10.0.0.5:5770 --log sessions/m17", caution=True)
    _config_option(p)
    p.add_argument("--model", default=None, metavar="FILE", help="a model file saved earlier; decode with it from "
                                                                 "the start")
    p.add_argument("--rig", action="append", default=None, metavar="ENDPOINT",
                   help="rig endpoint to connect to, repeatable (default: [endpoints] rig)")
    p.add_argument("--events", default=None, metavar="ENDPOINT",
                   help="bind the events PUB socket here (default: [endpoints] events)")
    p.add_argument("--state", default=None, metavar="ENDPOINT",
                   help="bind the state PUB socket here (default: [endpoints] state)")
    p.add_argument("--control", default=None, metavar="ENDPOINT",
                   help="bind the control REP socket here (default: [endpoints] control)")
    p.add_argument("--log", default=None, metavar="DIR", help="record the session log in this new directory")
    p.add_argument("--summary", default=None, metavar="FILE", help="write the JSON summary here at the end")
    p.add_argument("--wall-s", type=float, metavar="S", default=None,
                   help="stop after this many wall-clock seconds (default: run until stopped)")
    p.add_argument("--duration-s", dest="wall_s", type=float, action=_Renamed, new="--wall-s")
    p.add_argument("--idle-wall-s", type=float, metavar="S", default=None,
                   help="stop after this many wall-clock seconds without rig input (default: never)")
    p.add_argument("--idle-exit-s", dest="idle_wall_s", type=float, action=_Renamed, new="--idle-wall-s")
    p.add_argument("--dry-run", action="store_true",
                   help="publish no event and drive no TTL line, whatever the config says; events are logged only")
    p.add_argument("--cpu", type=int, action="append", default=None,
                   help="run the loop on this CPU core only, repeatable; Linux (default: any core)")
    p.set_defaults(func=cmd_run)

    p = _command(sub, "replay", "feed a recorded session through the same pipeline", REPLAY_DESCRIPTION,
                 "  placeloop replay sessions/m17 --summary m17.json\n"
                 "  placeloop replay sessions/m17 --set decoder.step_s=0.01 --set rules.min_mass=0.7")
    p.add_argument("log", metavar="LOG", help="session directory (or its session.plog)")
    p.add_argument("--config", default=None, metavar="FILE|SCENARIO",
                   help="replay with this config (default: the one recorded with the session)")
    p.add_argument("--model", default=None, metavar="FILE",
                   help="decode with this model file from the start (default: learn as recorded)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="override one setting, e.g. decoder.step_s=0.01 or rules.min_mass=0.7, repeatable")
    p.add_argument("--realtime", action="store_true", help="pace by the recorded receive times")
    p.add_argument("--summary", default=None, metavar="FILE", help="write the JSON summary here (same keys as live)")
    p.set_defaults(func=cmd_replay)

    p = _command(sub, "sim", "the simulated rig alone, publishing on its rig endpoint",
                 "Publish a simulated recording (spikes, tracker frames, sync pulses, true positions) from the "
                 "config's\n[environment] and [simulation], for a `placeloop run` started separately.",
                 "  placeloop sim --config linear_track_2m --speed 1 --data-s 900")
    _config_option(p, DEFAULT_SCENARIO)
    p.add_argument("--pub", default=None, metavar="ENDPOINT",
                   help="bind the rig's PUB socket here (default: the config's first [endpoints] rig)")
    p.add_argument("--speed", type=float, metavar="X", default=1.0,
                   help="data seconds per wall-clock second; 0 sends as fast as possible")
    p.add_argument("--data-s", type=float, metavar="S", default=600.0, help="data seconds to send")
    p.add_argument("--duration-s", dest="data_s", type=float, action=_Renamed, new="--data-s")
    p.add_argument("--seed", type=int, default=7, help="seed of the simulated animal and cells")
    p.add_argument("--curve-key", default=None, metavar="FILE",
                   help="the rig's .key (placeloop keys), for a decoder with rig in [endpoints] curve_sockets "
                        "(default: a plain link)")
    p.add_argument("--server-key", default=None, metavar="FILE",
                   help="the decoder's .pub, with --curve-key (default: none)")
    p.set_defaults(func=cmd_sim)

    p = _command(sub, "control", "send one command to a running loop", CONTROL_DESCRIPTION,
                 "  placeloop control status --config my_rig.toml\n"
                 "  placeloop control load-model model.npz --config my_rig.toml\n"
                 "  placeloop control disarm --endpoint tcp://127.0.0.1:5773\n"
                 "  placeloop control status --config my_rig.toml --curve-key keys/script.key "
                 "--server-key keys/decoder.pub", caution=True)
    p.add_argument("command", choices=CONTROL_COMMANDS, metavar="COMMAND",
                   help=f"one of: {', '.join(CONTROL_COMMANDS)}")
    p.add_argument("path", nargs="?", default=None, metavar="MODEL", help="model file, for load-model only")
    p.add_argument("--config", default=None, metavar="FILE|SCENARIO",
                   help="the loop's config; its [endpoints] control is where the command goes")
    p.add_argument("--endpoint", default=None, metavar="ENDPOINT",
                   help=f"send here instead (default: the config's [endpoints] control, else {DEFAULT_CONTROL})")
    p.add_argument("--timeout-wall-s", type=float, metavar="S", default=10.0,
                   help="wall-clock seconds to wait for the reply")
    p.add_argument("--timeout-s", dest="timeout_wall_s", type=float, action=_Renamed, new="--timeout-wall-s")
    p.add_argument("--curve-key", default=None, metavar="FILE",
                   help="this side's .key (placeloop keys), for a control socket in [endpoints] curve_sockets "
                        "(default: a plain link)")
    p.add_argument("--server-key", default=None, metavar="FILE",
                   help="the decoder's .pub, with --curve-key (default: none)")
    p.set_defaults(func=cmd_control)

    p = _command(sub, "keys", "make a CurveZMQ key pair for an authenticated link", KEYS_DESCRIPTION,
                 "  placeloop keys decoder --dir keys\n"
                 "  placeloop keys stimulator --dir keys && cp keys/stimulator.pub keys/clients/")
    p.add_argument("name", metavar="NAME", help="the key pair's name: NAME.key and NAME.pub")
    p.add_argument("--dir", default=".", metavar="DIR", help="write the two files into this directory")
    p.set_defaults(func=cmd_keys)

    p = _command(sub, "config", "the configuration reference, the installed scenarios, a config check",
                 CONFIG_DESCRIPTION, "  placeloop config --reference > CONFIG.md\n"
                 "  placeloop config --show linear_track_2m > my_rig.toml\n  placeloop config --check my_rig.toml")
    what = p.add_mutually_exclusive_group(required=True)
    what.add_argument("--reference", action="store_true", help="print every table and key (docs/CONFIG.md)")
    what.add_argument("--scenarios", action="store_true", help="list the scenarios installed with placeloop")
    what.add_argument("--show", metavar="SCENARIO", default=None, help="print a scenario's TOML, to copy from")
    what.add_argument("--check", metavar="FILE|SCENARIO", default=None,
                      help="read and validate a config; say what it sets up")
    p.set_defaults(func=cmd_config)

    for name, summary in DELEGATED.items():
        sub.add_parser(name, help=f"{summary} (placeloop {name} --help for its options)", add_help=False)
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
        return _error(str(exc), EXIT_USAGE)
    except KeyboardInterrupt:
        return 128 + signal.SIGINT


if __name__ == "__main__":
    sys.exit(main())
