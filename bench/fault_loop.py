"""The loop under test for the fault probe (bench/faults.py): the process, the bench's sockets, the sessions.

``LoopUnderTest`` runs ``placeloop run`` as a process of its own with real
ZeroMQ sockets on 127.0.0.1; the bench plays the rig (an XPUB socket, so
that it knows when the loop has subscribed), the experiment script (REQ on
the control socket) and the consumers (SUB on the events and state sockets).
The sessions are simulated (invented data, for the probe only).

The consumers connect before the loop binds, so ZeroMQ retries their
connects every reconnect interval (100 ms, longer on a loaded machine);
a PUB socket drops what it sends before a subscriber has joined. So
:meth:`LoopUnderTest.wait_subscribed` also waits for the consumers' own
handshakes (:func:`wait_joined`): without that, an event the loop fired
within a reconnect interval of binding (the first events after an early
arm) was published to nobody and counted as missed, although the loop had
fired, published and recorded it.
"""

from __future__ import annotations

import dataclasses
import signal
import subprocess
import sys
import time
from pathlib import Path

import tomli_w
import zmq
from zmq.utils.monitor import recv_monitor_message

from decoder.config import parse_config
from decoder.messages import Heartbeat, SourceAnnounce, SpikeBatch, SyncPulse
from decoder.session.clock import fit_clock
from decoder.session.pipeline import Pipeline
from rig_adapters.sim.demo import free_loopback_port
from rig_adapters.sim.simulation import (
    SPIKE_SOURCE,
    SimulatedSession,
    SimulationSettings,
)
from rig_adapters.wire import protocol

ROOT = Path(__file__).resolve().parent.parent

#: The probe's experiment (invented): a square arena, one goal zone, 60 simulated cells.
BASE = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "decoder": {"window_s": 0.25, "step_s": 0.025, "prior": "state_space", "random_walk_sd_cm": 4.0},
    "sources": {"truth": "truth"},
    "safety": {"refractory_s": 1.0, "max_per_minute": 60, "max_per_session": 100_000, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 14.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 50, "n_grid_cells": 5, "n_nonspatial_cells": 5},
}
SESSION_SOURCES = {"ephys", "tracker", "truth", "control"}

#: How long the loop may take to subscribe: it loads (or, on an empty numba cache, compiles) its kernels first.
SUBSCRIBE_WAIT_S = 300.0

#: Frames the bench lets the loop fall behind by before it waits: far below its RCVHWM of 10**6.
MAX_BACKLOG = 20_000

#: How long a consumer may take to join a socket the loop has bound: several reconnect intervals.
JOIN_WAIT_S = 30.0


def fit_model(tmp: Path, seed: int, learn_s: float = 60.0) -> Path:
    """Learn ``learn_s`` simulated seconds in process and save the fitted model (as tests/test_dry_run.py does)."""
    learn = parse_config(tomli_w.dumps({**BASE, "session": {"learn_s": learn_s, "cross_validate": False}}))
    sim = SimulatedSession(learn.environment, SimulationSettings.from_dict(learn.simulation), seed=seed)
    pipeline = Pipeline(learn)
    for msg in sim.messages(until_s=learn_s + 30.0):
        pipeline.on_message(msg)
        if pipeline.state == "decoding":
            break
    path = tmp / "model.npz"
    pipeline.model.save(path)
    return path


def session_messages(seed: int, until_s: float) -> list:
    config = parse_config(tomli_w.dumps(BASE))
    sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    return list(sim.messages(until_s=until_s))


def joining_monitor(sock: zmq.Socket) -> zmq.Socket:
    """A monitor of ``sock``'s completed handshakes, for :func:`wait_joined`; call before ``sock.connect``."""
    return sock.get_monitor_socket(zmq.EVENT_HANDSHAKE_SUCCEEDED)


def wait_joined(sock: zmq.Socket, monitor: zmq.Socket, timeout_s: float = JOIN_WAIT_S) -> None:
    """Wait until ``sock`` has completed a ZMTP handshake with its peer, then stop monitoring it.

    A SUB socket sends its subscriptions as its first messages after the
    handshake, at once, so the loop's PUB socket has them long before the
    bench has sent a session's head and had its status requests answered
    (milliseconds at least); it delivers from then on.

    Raises
    ------
    RuntimeError
        If no handshake completed within ``timeout_s`` (nothing bound the
        endpoint, or the peer refused the link).
    """
    try:
        if not monitor.poll(int(timeout_s * 1000)):
            raise RuntimeError(f"the bench's consumer did not join {sock.getsockopt_string(zmq.LAST_ENDPOINT)} "
                               f"within {timeout_s:.0f} s; is the loop bound there?")
        recv_monitor_message(monitor)
    finally:
        sock.disable_monitor()
        monitor.close(linger=0)


def spike_time(msg) -> float | None:
    """The data time a spike-stream message carries (s), or None for other messages."""
    if msg.source != SPIKE_SOURCE:
        return None
    if isinstance(msg, SpikeBatch):
        return float(msg.t_s[-1]) if msg.t_s.size else None
    if isinstance(msg, Heartbeat):
        return float(msg.t_s)
    return None


class LoopUnderTest:
    """One ``placeloop run`` process and the bench's sockets around it (all on 127.0.0.1)."""

    def __init__(self, tmp: Path, name: str, model: Path, overrides: dict | None = None, dry_run: bool = False,
                 log: bool = True, idle_exit_s: float = 30.0) -> None:
        self.dir = tmp / name
        self.dir.mkdir()
        self.ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
        self.ep = {k: f"tcp://127.0.0.1:{p}" for k, p in self.ports.items()}
        doc = {**BASE, **(overrides or {}), "endpoints": {
            "rig": [self.ep["rig"]], "events": self.ep["events"], "state": self.ep["state"],
            "control": self.ep["control"]}}
        self.config_path = self.dir / "loop.toml"
        self.config_path.write_text(tomli_w.dumps(doc))
        self.config = parse_config(tomli_w.dumps(doc))
        self.log_dir = self.dir / "session" if log else None
        self.stderr_path = self.dir / "stderr.txt"
        cmd = [sys.executable, "-m", "rig_adapters.cli", "-v", "run", "--config", str(self.config_path),
               "--model", str(model), "--summary", str(self.dir / "summary.json"),
               "--idle-wall-s", str(idle_exit_s)]
        if self.log_dir is not None:
            cmd += ["--log", str(self.log_dir)]
        if dry_run:
            cmd.append("--dry-run")
        self.ctx = zmq.Context.instance()
        self._joining: list[tuple[zmq.Socket, zmq.Socket]] = []
        self.events_sub = self._sub(self.ep["events"], joins=not dry_run)  # a dry run binds no events socket
        self.state_sub = self._sub(self.ep["state"])
        self.rig = None
        self.bind_rig()
        with open(self.stderr_path, "w") as err:
            self.proc = subprocess.Popen(cmd, cwd=ROOT, stderr=err, stdout=subprocess.DEVNULL)
        self.req = None
        self.sent = 0

    def _sub(self, endpoint: str, joins: bool = True) -> zmq.Socket:
        """A consumer of ``endpoint``; with ``joins``, :meth:`wait_subscribed` waits for it to join."""
        sock = self.ctx.socket(zmq.SUB)
        sock.setsockopt(zmq.SUBSCRIBE, b"")
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.RCVHWM, 0)  # the bench keeps every event and state frame it is sent
        if joins:
            self._joining.append((sock, joining_monitor(sock)))
        sock.connect(endpoint)
        return sock

    def bind_rig(self) -> None:
        """(Re)open the rig's publisher (:meth:`wait_subscribed` waits for the loop)."""
        sock = self.ctx.socket(zmq.XPUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SNDHWM, 0)  # never drop on the bench's side: pacing bounds the queue
        deadline = time.monotonic() + 10.0
        while True:
            try:
                sock.bind(self.ep["rig"])
                break
            except zmq.ZMQError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.05)
        self.rig = sock

    def wait_subscribed(self, timeout_s: float = SUBSCRIBE_WAIT_S) -> None:
        """Wait until the loop has subscribed to the bench's rig and, the first time, the consumers have joined.

        The loop binds its events and state sockets right after it connects
        to the rig; the consumers' handshakes follow within a reconnect
        interval, and nothing the loop publishes before them reaches them.
        """
        deadline = time.monotonic() + timeout_s
        while not self.rig.poll(200):
            if self.proc.poll() is not None:
                raise RuntimeError(f"the loop exited before subscribing:\n{self.stderr()[-3000:]}")
            if time.monotonic() > deadline:
                raise RuntimeError("the loop never subscribed to the bench's rig")
        self.rig.recv()
        while self._joining:
            wait_joined(*self._joining.pop())

    def close_rig(self) -> None:
        self.rig.close(linger=0)
        self.rig = None

    def send(self, payload: bytes) -> None:
        self.rig.send(payload)
        self.sent += 1

    def _socket_for_requests(self) -> zmq.Socket:
        if self.req is None:
            self.req = self.ctx.socket(zmq.REQ)
            self.req.setsockopt(zmq.LINGER, 0)
            self.req.connect(self.ep["control"])
        return self.req

    def raw_request(self, *parts: bytes, timeout_s: float = 10.0) -> dict | None:
        """Send one request (one or more frames); the reply, or None if none came in time."""
        req = self._socket_for_requests()
        req.send_multipart(list(parts))
        if not req.poll(int(timeout_s * 1000)):
            # A REQ socket without its reply takes no further request: start a new one.
            req.close(linger=0)
            self.req = None
            return None
        return protocol.decode_control_reply(req.recv())

    def request(self, command: str, args: dict | None = None) -> dict | None:
        return self.raw_request(protocol.encode_control_request(command, args))

    def status(self) -> dict:
        reply = self.request("status")
        if reply is None or not reply["ok"]:
            raise RuntimeError(f"no status from the loop: {reply}\n{self.stderr()[-3000:]}")
        return reply["status"]

    @staticmethod
    def counted(status: dict) -> int:
        """Rig frames the loop has counted: accepted or stale for a source, or rejected (bad_messages)."""
        by_source = sum(h["messages"] + h["stale"] for name, h in status["sources"].items() if name != "control")
        return by_source + status["counters"]["bad_messages"]

    def wait_counted(self, n: int, timeout_s: float = 120.0) -> int:
        """Wait until the loop has counted ``n`` rig frames (or its count stops moving); the count."""
        deadline = time.monotonic() + timeout_s
        last, still_since = -1, time.monotonic()
        while True:
            counted = self.counted(self.status())
            if counted >= n:
                return counted
            if counted != last:
                last, still_since = counted, time.monotonic()
            elif time.monotonic() - still_since > 5.0 or time.monotonic() > deadline:
                return counted
            time.sleep(0.02)

    def drain(self, sock: zmq.Socket) -> list[dict]:
        out = []
        while sock.poll(0):
            out.append(protocol.decode_output(sock.recv()))
        return out

    def rss_kb(self) -> int:
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
        raise RuntimeError("no VmRSS line in /proc")

    def alive(self) -> bool:
        return self.proc.poll() is None

    def stderr(self) -> str:
        return self.stderr_path.read_text(errors="replace")

    def stop(self, timeout_s: float = 60.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for sock, monitor in self._joining:
            sock.disable_monitor()
            monitor.close(linger=0)
        self._joining.clear()
        for sock in (self.rig, self.req, self.events_sub, self.state_sub):
            if sock is not None:
                sock.close(linger=0)
        self.rig = self.req = None
        return self.proc.returncode


def paced_send(loop: LoopUnderTest, frames, chunk: int = 2000) -> None:
    """Send every frame, waiting whenever the loop falls :data:`MAX_BACKLOG` frames behind."""
    for i, payload in enumerate(frames):
        loop.send(payload)
        if i % chunk == chunk - 1:
            loop.wait_counted(loop.sent - MAX_BACKLOG)


def event_keys(events) -> list[tuple]:
    """Events by what a stimulator acts on: rule, zone and data time (to the microsecond)."""
    return [(e["rule"], e["zone"], round(float(e["t_s"]), 6)) for e in events]


class Loops:
    """Hands each part of the probe its loop: a fresh process per part, or (``shared``) one for all.

    Sharing saves the start of a process per part (about 6 s here) for ``--quick``.
    """

    def __init__(self, tmp: Path, model: Path, shared: bool, overrides: dict | None = None) -> None:
        self.tmp, self.model, self.shared, self.overrides = tmp, model, shared, overrides or {}
        self._loop: LoopUnderTest | None = None

    def new(self, name: str, **kwargs) -> LoopUnderTest:
        """A loop of its own, subscribed."""
        loop = LoopUnderTest(self.tmp, name, self.model, overrides=self.overrides, **kwargs)
        loop.wait_subscribed()
        return loop

    def get(self, name: str, **kwargs) -> LoopUnderTest:
        """The part's loop: the shared one (started at the first call), or a fresh one."""
        if self.shared and self._loop is not None:
            return self._loop
        loop = self.new("shared" if self.shared else name, **({"idle_exit_s": 600.0} if self.shared else kwargs))
        if self.shared:
            self._loop = loop
        return loop

    def take(self, name: str, **kwargs) -> LoopUnderTest:
        """A loop the part will end itself (a kill): the shared one, handed over, or a fresh one."""
        loop = self.get(name, **kwargs)
        if self.shared:
            self._loop = None
        return loop

    def done(self, loop: LoopUnderTest) -> bool:
        """The part is over: stop its loop (unless shared); whether the loop ran and stopped as it should."""
        if self.shared:
            return loop.alive()
        alive = loop.alive()
        return alive and loop.stop() in (0, -signal.SIGTERM)

    def close(self) -> bool:
        """Stop the shared loop, if any; whether it ran and stopped as it should."""
        if self._loop is None:
            return True
        alive = self._loop.alive()
        return alive and self._loop.stop() in (0, -signal.SIGTERM)


def send_real_time(loop: LoopUnderTest, messages, encoded, duration_s: float, watch=None,
                    start: int = 0) -> tuple[float, int]:
    """Send ``duration_s`` of the session from message ``start`` at real time, calling ``watch()`` while waiting.

    Returns the wall time (monotonic) it began and the index of the first message not sent.
    """
    started = time.monotonic()
    t0 = None
    for i in range(start, len(messages)):
        t = spike_time(messages[i])
        if t is not None:
            t0 = t if t0 is None else t0
            if t - t0 > duration_s:
                return started, i
            while (t - t0) - (time.monotonic() - started) > 0:
                if watch is not None:
                    watch()
                time.sleep(0.001)
        loop.send(encoded[i])
    return started, len(messages)


def tiled(messages: list, tiles: int):
    """The session repeated ``tiles`` times end to end: times, sync pulse ids and numbers carried on.

    The tracker's clock runs at its own rate (the simulated drift), so its
    times move on by the tile's length on that clock, from a fit of the
    tile's own sync pulses (decoder.session.clock.fit_clock).
    """
    length_s = max(spike_time(m) or 0.0 for m in messages)
    pulses = {}
    for m in messages:
        if isinstance(m, SyncPulse):
            pulses.setdefault(m.pulse_id, {})[m.source] = m.t_s
    pairs = [(p[SPIKE_SOURCE], p["tracker"]) for p in pulses.values() if len(p) == 2]
    fit = fit_clock([b for _, b in pairs], [a for a, _ in pairs])   # tracker = offset + slope * ephys
    tracker_length_s = fit.slope * length_s
    max_pulse = max(pulses)
    per_source: dict[str, int] = {}
    for m in messages:
        per_source[m.source] = per_source.get(m.source, 0) + 1
    body = [m for m in messages if not isinstance(m, SourceAnnounce)]
    yield from messages
    for k in range(1, tiles):
        for m in body:
            shift = tracker_length_s if m.source == "tracker" else length_s
            fields = {"seq": m.seq + k * (per_source[m.source] - 1), "t_s": m.t_s + k * shift}
            if isinstance(m, SyncPulse):
                fields["pulse_id"] = m.pulse_id + k * max_pulse
            yield dataclasses.replace(m, **fields)


