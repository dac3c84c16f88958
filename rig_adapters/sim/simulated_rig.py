"""The simulated rig as a process: a :class:`~rig_adapters.sim.simulation.SimulatedSession` on ZeroMQ.

::

    python -m rig_adapters.sim.simulated_rig --config configs/round_arena_goal.toml \\
        --pub tcp://127.0.0.1:5770 --speed 1 --duration-s 600 --seed 1

It binds an XPUB socket, waits for the first subscriber (so that nothing is
lost while the subscriber's connection is still being made), then publishes
every message of the session encoded by ``rig_adapters.wire.protocol``, each chunk
once the wall clock, scaled by ``--speed``, reaches the chunk's end in data
time (``--speed 0`` sends as fast as the subscriber takes them). It stops at
the end of ``--duration-s`` seconds of data, or on SIGTERM or SIGINT, and
prints a one-line summary to stderr. With ``--curve-key`` and ``--server-key``
it is a CurveZMQ client of the decoder (whose ``[endpoints] curve_sockets``
lists ``rig``): its subscriber is admitted only if it holds the decoder's key
and lists this rig's public key.

The config file needs an ``[environment]`` table (read by
``decoder.config``) and may have a ``[simulation]`` table
(:class:`~rig_adapters.sim.settings.SimulationSettings`).
"""

from __future__ import annotations

import argparse
import logging
import math
import signal
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import zmq

from decoder.config import is_loopback_endpoint, load_config
from decoder.messages import MarkedSpikes, SpikeBatch, TrackerFrames
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import TRACKER_SOURCE, SimulatedSession
from rig_adapters.wire import protocol
from rig_adapters.wire.curve_keys import client_of

log = logging.getLogger(__name__)

#: Outgoing queue of the XPUB socket, in messages. At 1x the simulated rig
#: sends about 300 messages a second, so this holds minutes of traffic: a
#: subscriber that stalls for a moment (a garbage collection, a disk flush)
#: catches up without losing anything. With XPUB_NODROP the rig waits
#: rather than drops when even this fills up.
SEND_HWM = 100_000

#: How long a normal end waits for queued messages to leave the socket (ms).
END_LINGER_MS = 2000

#: Wall-clock slice in which blocking waits check for a stop request (s).
_POLL_S = 0.1

CAUTION = (
    "The simulated rig reads no hardware and acts on no animal. Software is no hardware interlock: "
    "before a live animal, dry-run the whole chain with this simulator and the reward or stimulation "
    "device disconnected or on a test load, and stay inside the approved animal-use protocol and "
    "local rules."
)


class NoSubscriberError(RuntimeError):
    """Nobody subscribed to the rig within the waiting time."""


@dataclass(frozen=True)
class RigSummary:
    """What one run of the rig sent.

    ``stopped`` is ``"end"`` (the duration was reached) or ``"signal"`` (a
    stop request); ``data_s`` is the data time covered, ``wall_s`` the wall
    time from the first subscriber to the end.
    """

    stopped: str
    messages: int
    spikes: int
    frames: int
    data_s: float
    wall_s: float

    def line(self) -> str:
        how = "reached the end of its duration" if self.stopped == "end" else "stopped on request"
        return (
            f"simulated_rig: {how}; sent {self.messages} messages "
            f"({self.spikes} spikes, {self.frames} tracker frames) covering {self.data_s:.2f} s of data "
            f"in {self.wall_s:.2f} s of wall time"
        )


def _check_run_args(endpoint: str, speed: float, duration_s: float, seed: int, allow_remote: bool) -> None:
    if not isinstance(endpoint, str) or "://" not in endpoint:
        raise ValueError(f"endpoint must be a ZeroMQ address like tcp://127.0.0.1:5770, got {endpoint!r}")
    if not allow_remote and not is_loopback_endpoint(endpoint):
        raise ValueError(
            f"endpoint {endpoint!r} is not on loopback; pass allow_remote (--allow-remote) to bind another "
            "interface, which exposes the stream to that network"
        )
    if not (math.isfinite(speed) and speed >= 0):
        raise ValueError(f"speed must be >= 0 (0 = as fast as possible), got {speed!r}")
    if not (math.isfinite(duration_s) and duration_s > 0):
        raise ValueError(f"duration_s must be a positive number of seconds, got {duration_s!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ValueError(f"seed must be a whole number >= 0, got {seed!r}")


def _wait_for_subscriber(sock: zmq.Socket, wait_s: float, stop: threading.Event) -> bool:
    """Block until the first subscription arrives; False if asked to stop first."""
    deadline = time.monotonic() + wait_s
    while not stop.is_set():
        left = deadline - time.monotonic()
        if left <= 0:
            raise NoSubscriberError(
                f"nobody subscribed within {wait_s:g} s; start the subscriber (placeloop) first or raise --wait-s"
            )
        if sock.poll(int(1000 * min(left, _POLL_S)), zmq.POLLIN):
            sock.recv()
            return True
    return False


def _send(sock: zmq.Socket, frame: bytes, stop: threading.Event) -> bool:
    """Send one frame, waiting while the queue is full; False if asked to stop first."""
    while not stop.is_set():
        try:
            sock.send(frame, zmq.NOBLOCK)
            return True
        except zmq.Again:
            sock.poll(int(1000 * _POLL_S), zmq.POLLOUT)
    return False


def run_rig(
    config_path: str | Path,
    endpoint: str,
    speed: float,
    duration_s: float,
    seed: int,
    *,
    wait_s: float = 10.0,
    allow_remote: bool = False,
    stop: threading.Event | None = None,
    curve_key: str | Path | None = None,
    server_key: str | Path | None = None,
) -> RigSummary:
    """Publish a simulated session on ``endpoint`` until ``duration_s`` of data or ``stop``.

    Parameters
    ----------
    config_path : str or Path
        TOML file with ``[environment]`` and optionally ``[simulation]``.
    endpoint : str
        ZeroMQ address to bind the XPUB socket to, loopback unless ``allow_remote``.
    speed : float
        Data seconds per wall second; 0 sends as fast as the subscriber takes them.
    duration_s : float
        Seconds of data to send.
    seed : int
        Seed of the simulation.
    wait_s : float
        How long to wait for the first subscriber (wall seconds).
    allow_remote : bool
        Allow binding an interface other than loopback.
    stop : threading.Event, optional
        Set it (from a signal handler or another thread) to stop early.
    curve_key, server_key : str or Path, optional
        Both or neither: this rig's ``.key`` and the decoder's ``.pub``
        (``placeloop keys``), for a CurveZMQ link.

    Raises
    ------
    ValueError
        A bad argument, config or key file, with what to fix.
    NoSubscriberError
        Nobody subscribed within ``wait_s``.
    """
    _check_run_args(endpoint, speed, duration_s, seed, allow_remote)
    if bool(curve_key) != bool(server_key):
        raise ValueError("a CurveZMQ link needs both curve_key (this rig's .key) and server_key (the decoder's .pub)")
    config = load_config(config_path)
    settings = SimulationSettings.from_dict(config.simulation)
    session = SimulatedSession(config.environment, settings, seed)
    stop = stop if stop is not None else threading.Event()
    ctx = zmq.Context()
    sock = ctx.socket(zmq.XPUB)
    messages = spikes = frames = 0
    data_s = 0.0
    wall_s = 0.0
    try:
        sock.setsockopt(zmq.SNDHWM, SEND_HWM)
        # Wait (back-pressure) instead of silently dropping when the queue is full.
        sock.setsockopt(zmq.XPUB_NODROP, 1)
        if curve_key:
            client_of(sock, curve_key, server_key)
        sock.bind(endpoint)
        bound = sock.getsockopt_string(zmq.LAST_ENDPOINT)
        log.info("publishing on %s; waiting up to %g s for a subscriber", bound, wait_s)
        stopped = "signal"
        if _wait_for_subscriber(sock, wait_s, stop):
            wall0 = time.monotonic()
            for chunk in session.chunks(until_s=duration_s):
                if speed > 0:
                    delay = wall0 + chunk.t_end_s / speed - time.monotonic()
                    if delay > 0 and stop.wait(delay):
                        break
                sent_all = True
                for msg in chunk.messages:
                    if not _send(sock, protocol.encode(msg), stop):
                        sent_all = False
                        break
                    messages += 1
                    if isinstance(msg, (SpikeBatch, MarkedSpikes)):
                        spikes += msg.t_s.size
                    elif isinstance(msg, TrackerFrames) and msg.source == TRACKER_SOURCE:
                        frames += msg.t_s.size
                if not sent_all or stop.is_set():
                    break
                data_s = chunk.t_end_s
            else:
                stopped = "end"
                sock.close(linger=END_LINGER_MS)
            wall_s = time.monotonic() - wall0
    finally:
        sock.close(linger=0)
        ctx.term()
    return RigSummary(stopped, messages, spikes, frames, data_s, wall_s)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m rig_adapters.sim.simulated_rig",
        description="Publish a simulated recording (spikes, tracker frames, sync pulses) over ZeroMQ.",
        epilog=CAUTION,
    )
    p.add_argument("--config", required=True, help="experiment TOML with [environment] and [simulation]")
    p.add_argument("--pub", default=None,
                   help="ZeroMQ address to bind (default: the first [endpoints] rig address, loopback)")
    p.add_argument("--speed", type=float, default=1.0, help="data seconds per wall second; 0 = as fast as possible")
    p.add_argument("--duration-s", type=float, default=600.0, help="seconds of data to send (default 600)")
    p.add_argument("--seed", type=int, default=1, help="seed of the simulation (default 1)")
    p.add_argument("--wait-s", type=float, default=10.0, help="how long to wait for a subscriber (default 10)")
    p.add_argument("--allow-remote", action="store_true", help="allow binding an interface other than loopback")
    p.add_argument("--curve-key", default=None,
                   help="this rig's .key (placeloop keys) for a CurveZMQ link to the decoder (default: plain)")
    p.add_argument("--server-key", default=None, help="the decoder's .pub, with --curve-key (default: none)")
    return p


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit status."""
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="simulated_rig: %(message)s", stream=sys.stderr)
    stop = threading.Event()

    def request_stop(signum: int, frame: object) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, request_stop)
    signal.signal(signal.SIGINT, request_stop)
    try:
        endpoint = args.pub if args.pub is not None else load_config(args.config).endpoints.rig[0]
        summary = run_rig(args.config, endpoint, args.speed, args.duration_s, args.seed,
                          wait_s=args.wait_s, allow_remote=args.allow_remote, stop=stop,
                          curve_key=args.curve_key, server_key=args.server_key)
    except (ValueError, NoSubscriberError, zmq.ZMQError) as exc:
        print(f"simulated_rig: error: {exc}", file=sys.stderr)
        return 2
    print(summary.line(), file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
