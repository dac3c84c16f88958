"""``placeloop monitor``: a live web page showing the decoder while a session runs.

The monitor is a separate process that only watches. It subscribes to the
loop's ``state`` stream and to its ``events`` stream (see ``PROTOCOL.md``
section 8) and serves, with aiohttp, a page that draws the posterior, the
positions, the zones, the events (each with the rule and zone that fired and
the zone mass that made it fire), the decoding error, the added latency, the
health of the inputs and a readiness verdict beside the trigger arming.
It can never slow the loop down: the loop's state PUB socket has a tiny
send queue and sends without blocking, so a slow or absent monitor loses
frames instead of holding the loop; this process, in turn, keeps only the
newest posterior and sends it to each page at :data:`SEND_INTERVAL_S`.

Routes::

    GET /                   the page (index.html)
    GET /static/<file>      monitor.js, monitor.css: everything the page loads
    GET /api/environment    geometry, bins and zones as JSON
    GET /ws                 WebSocket: one binary packet per page update

A packet is what :class:`rig_adapters.monitor.session_view.SessionView`
makes of the streams: a JSON header and the quantised posterior.

Every address this module binds is loopback unless the operator names
another interface with ``--host``, and then it warns. The process lowers its
own scheduling priority (:data:`MONITOR_NICENESS`) so that, on a machine
shared with the loop, the loop gets the CPU first.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import os
import sys
import time
from pathlib import Path

import zmq
import zmq.asyncio
from aiohttp import WSMsgType, web

from decoder.config import ConfigError, ExperimentConfig, is_loopback_host, load_config
from rig_adapters.console import EXIT_FILE, EXIT_USAGE, HelpFormat, setup_logging
from rig_adapters.monitor.marks import marks_payload
from rig_adapters.monitor.session_view import (
    SessionView,
    environment_payload,
    pack_packet,
)
from rig_adapters.wire.curve_keys import CurveKey, KeyFileError, as_client, read_key

log = logging.getLogger(__name__)

STATIC_DIR = Path(__file__).resolve().parent / "static"

#: Seconds between packets to one page: 20 updates per second.
SEND_INTERVAL_S = 0.05

#: Seconds between packets when no new state arrives, so the page can tell
#: a quiet loop from a dead monitor.
KEEPALIVE_S = 1.0

#: State frames queued in the SUB socket before ZeroMQ drops new ones. Small
#: on purpose: the page only ever shows the newest frame.
STATE_RCVHWM = 16

#: Niceness the monitor process adds to itself: on a machine shared with the
#: loop, the scheduler serves the loop first.
MONITOR_NICENESS = 10

CAUTION = (
    "The monitor only watches: it cannot arm, disarm or stop reward or stimulation, and no software is "
    "a hardware interlock. Keep the hardware limits and the physical cut-off within reach, stay inside "
    "your approved animal-use protocol and local rules, and dry-run every setup before a live animal."
)


# ------------------------------------------------------------------------------
# The server


# Typed keys of what the application holds.
ENVIRONMENT_KEY = web.AppKey("environment", dict)
ENDPOINT_KEY = web.AppKey("state_endpoint", str)
EVENTS_ENDPOINT_KEY = web.AppKey("events_endpoint", str)
VIEW_KEY = web.AppKey("view", SessionView)
WAITERS_KEY = web.AppKey("waiters", set)
ZMQ_CTX_KEY = web.AppKey("zmq_ctx", zmq.asyncio.Context)
SUBS_KEY = web.AppKey("subs", list)
READERS_KEY = web.AppKey("readers", list)
CURVE_KEY = web.AppKey("curve", object)


def _security_headers(response: web.StreamResponse) -> None:
    # The page loads nothing from anywhere but this server.
    response.headers["Content-Security-Policy"] = (
        "default-src 'self'; connect-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'"
    )
    response.headers["Cache-Control"] = "no-store"
    response.headers["X-Content-Type-Options"] = "nosniff"


async def _on_prepare(request: web.Request, response: web.StreamResponse) -> None:
    _security_headers(response)


async def _index(request: web.Request) -> web.FileResponse:
    return web.FileResponse(STATIC_DIR / "index.html")


async def _environment(request: web.Request) -> web.Response:
    app = request.app
    body = dict(app[ENVIRONMENT_KEY])
    body["state_endpoint"] = app[ENDPOINT_KEY]
    body["events_endpoint"] = app[EVENTS_ENDPOINT_KEY]
    body["caution"] = CAUTION
    body["marks"] = marks_payload(body["content_rules"])
    return web.json_response(body)


async def _socket(request: web.Request) -> web.WebSocketResponse:
    """One page: send it the newest packet at most every SEND_INTERVAL_S, drop the rest."""
    app = request.app
    ws = web.WebSocketResponse(heartbeat=10.0)
    await ws.prepare(request)
    view: SessionView = app[VIEW_KEY]
    changed: asyncio.Event = asyncio.Event()
    app[WAITERS_KEY].add(changed)

    async def send_loop() -> None:
        cursor: dict = {}
        sent_version = -1
        while not ws.closed:
            try:
                await asyncio.wait_for(changed.wait(), timeout=KEEPALIVE_S)
            except asyncio.TimeoutError:
                pass
            changed.clear()
            if view.version == sent_version and view.latest is not None:
                packet = pack_packet({"keepalive": True, "monitor": {
                    "frame_age_s": round(time.time() - view.last_frame_wall_s, 3),
                    "frames_received": view.frames_received, "version": view.version}})
            else:
                sent_version = view.version
                packet = view.packet(cursor, time.time())
            await ws.send_bytes(packet)
            await asyncio.sleep(SEND_INTERVAL_S)

    sender = asyncio.create_task(send_loop())
    try:
        async for msg in ws:
            if msg.type == WSMsgType.ERROR:
                break
    finally:
        app[WAITERS_KEY].discard(changed)
        sender.cancel()
        try:
            await sender
        except (asyncio.CancelledError, ConnectionResetError, RuntimeError):
            pass
    return ws


async def _read(app: web.Application, sock: zmq.asyncio.Socket, take) -> None:
    """Take every frame the SUB socket delivers; wake the pages after each burst."""
    while True:
        payload = await sock.recv()
        take(payload, time.time())
        while True:
            try:
                payload = sock.recv(zmq.NOBLOCK).result()
            except zmq.Again:
                break
            take(payload, time.time())
        for waiter in app[WAITERS_KEY]:
            waiter.set()


async def _start_reader(app: web.Application) -> None:
    ctx = zmq.asyncio.Context()
    view: SessionView = app[VIEW_KEY]
    app[ZMQ_CTX_KEY] = ctx
    app[SUBS_KEY] = []
    app[READERS_KEY] = []
    for endpoint, take in ((app[ENDPOINT_KEY], view.add_bytes), (app[EVENTS_ENDPOINT_KEY], view.add_event_bytes)):
        if not endpoint:
            continue
        sub = ctx.socket(zmq.SUB)
        # A short queue: frames the monitor cannot take in time are dropped by
        # ZeroMQ; the page only ever wants the newest state (events are few).
        sub.setsockopt(zmq.RCVHWM, STATE_RCVHWM)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        if app[CURVE_KEY] is not None:
            as_client(sub, *app[CURVE_KEY])
        sub.connect(endpoint)
        app[SUBS_KEY].append(sub)
        app[READERS_KEY].append(asyncio.create_task(_read(app, sub, take)))
        log.info("monitor subscribed to %s", endpoint)


async def _stop_reader(app: web.Application) -> None:
    for reader in app[READERS_KEY]:
        reader.cancel()
        try:
            await reader
        except asyncio.CancelledError:
            pass
    for sub in app[SUBS_KEY]:
        sub.close(linger=0)
    app[ZMQ_CTX_KEY].term()


def create_app(config: ExperimentConfig, state_endpoint: str, events_endpoint: str = "",
               curve: tuple[CurveKey, bytes] | None = None) -> web.Application:
    """The monitor's aiohttp application, not yet serving.

    Parameters
    ----------
    config : ExperimentConfig
        The experiment the loop runs (for the environment and the zones).
    state_endpoint : str
        The loop's state PUB endpoint to connect to, e.g. ``tcp://127.0.0.1:5772``.
    events_endpoint : str, default ""
        The loop's events PUB endpoint; empty for none (the page then lists no events).
    curve : (CurveKey, bytes), optional
        The monitor's own key pair and the loop's public key, for a loop whose
        state and events sockets are in ``[endpoints] curve_sockets``; the
        monitor's public key must be among the loop's ``curve_clients``.
    """
    app = web.Application()
    app[CURVE_KEY] = curve
    app[ENVIRONMENT_KEY] = environment_payload(config)
    app[ENDPOINT_KEY] = state_endpoint
    app[EVENTS_ENDPOINT_KEY] = events_endpoint
    app[VIEW_KEY] = SessionView(config)
    app[WAITERS_KEY] = set()
    app.router.add_get("/", _index)
    app.router.add_get("/api/environment", _environment)
    app.router.add_get("/ws", _socket)
    app.router.add_static("/static/", STATIC_DIR, show_index=False, follow_symlinks=False)
    app.on_response_prepare.append(_on_prepare)
    app.on_startup.append(_start_reader)
    app.on_cleanup.append(_stop_reader)
    return app


def run_monitor(config_path: str | Path, state_endpoint: str, host: str = "127.0.0.1", port: int = 8750,
                events_endpoint: str | None = None, curve: tuple[CurveKey, bytes] | None = None) -> None:
    """Serve the monitor page until interrupted.

    Parameters
    ----------
    config_path : str or Path
        The experiment config the loop runs.
    state_endpoint : str
        The loop's state PUB endpoint.
    host : str, default "127.0.0.1"
        Interface for the web server. Anything but loopback exposes the
        page to that network, and is warned about.
    port : int, default 8750
        TCP port for the web server.
    events_endpoint : str or None, default None
        The loop's events PUB endpoint; None for the config's ``[endpoints] events``.
    curve : (CurveKey, bytes), optional
        As for :func:`create_app`.
    """
    if not 0 < port < 65536:
        raise ValueError(f"port must be 1..65535, got {port}")
    config = load_config(config_path)
    if not is_loopback_host(host):
        message = (f"the monitor is served on {host}, not loopback: anyone on that network can watch the "
                   "session (it cannot control it)")
        log.warning(message)
        print(f"WARNING: {message}", file=sys.stderr)
    events = config.endpoints.events if events_endpoint is None else events_endpoint
    app = create_app(config, state_endpoint, events, curve)
    try:
        os.nice(MONITOR_NICENESS)
    except (AttributeError, OSError):
        log.info("could not lower the monitor's priority; it still never blocks the loop")
    print(f"placeloop monitor: http://{host}:{port}/ (state from {state_endpoint}, events from {events})\n{CAUTION}",
          file=sys.stderr)
    web.run_app(app, host=host, port=port, print=None, access_log=None)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop monitor",
        description="Serve a live web page of the decoder's state stream (watch only).",
        epilog="examples:\n"
               "  placeloop monitor --config my_rig.toml\n"
               "  placeloop monitor --config my_rig.toml --http-port 8751 --state tcp://127.0.0.1:5772\n"
               "  placeloop monitor --config my_rig.toml --curve-key keys/monitor.key --server-key keys/decoder.pub"
               "\n\n" + CAUTION,
        formatter_class=HelpFormat,
    )
    parser.add_argument("--config", required=True, help="experiment config (TOML) the loop runs")
    parser.add_argument("--state", default=None,
                        help="the loop's state endpoint (default: [endpoints] state of the config)")
    parser.add_argument("--events", default=None,
                        help="the loop's events endpoint (default: [endpoints] events of the config)")
    parser.add_argument("--http-port", type=int, default=8750, help="port of the web page")
    parser.add_argument("--host", default="127.0.0.1",
                        help="interface for the web page (default 127.0.0.1; another one warns)")
    parser.add_argument("--curve-key", default=None, metavar="FILE",
                        help="the monitor's .key (placeloop keys), for a loop with state and events in "
                             "[endpoints] curve_sockets; its .pub goes in the loop's curve_clients "
                             "(default: a plain link)")
    parser.add_argument("--server-key", default=None, metavar="FILE",
                        help="the decoder's .pub, with --curve-key (default: none)")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return parser


def main(argv: list[str] | None = None) -> int:
    """``placeloop monitor --config C [--state EP] [--events EP] [--http-port P] [--host H] [--curve-key K --server-key P]``."""
    args = build_parser().parse_args(argv)
    setup_logging(args.verbose)
    if bool(args.curve_key) != bool(args.server_key):
        print("error: an authenticated link needs both --curve-key (the monitor's .key) and --server-key "
              "(the decoder's .pub)", file=sys.stderr)
        return EXIT_USAGE
    try:
        curve = None
        if args.curve_key:
            curve = (read_key(args.curve_key, need_secret=True), read_key(args.server_key).public)
    except KeyFileError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_FILE
    try:
        state = args.state or load_config(args.config).endpoints.state
        run_monitor(args.config, state, host=args.host, port=args.http_port, events_endpoint=args.events,
                    curve=curve)
    except (ConfigError, ValueError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except OSError as exc:
        print(f"error: cannot serve on {args.host}:{args.http_port}: {exc.strerror or exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
