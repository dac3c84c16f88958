"""The live closed loop: ZeroMQ in, the pipeline, ZeroMQ out, the recorder as a tap.

One process, one poller loop, read top to bottom in :meth:`LiveLoop.run`:

1. wait on the rig SUB socket, the control REP socket and the events XPUB
   socket (its subscription messages: who listens);
2. drain what arrived, stamping each message with its wall-clock receipt;
3. record the raw bytes (before anything can go wrong with them), decode
   them (bad input is counted and logged, never raised), and feed the
   pipeline;
4. publish each event on the events XPUB socket (and the TTL line) and the
   decoder's state on the state PUB socket, then record what went out;
5. watch the input streams on the wall clock and disarm when one stalls.

A dry run (``dry_run=True``) never binds the events socket and drives no
TTL line: a stimulator bridge has nothing to connect to, so nothing can act
on an event. Each event is recorded instead on the session log's
``events_dry_run`` channel and counted as withheld, and the state stream
says ``dry_run`` in its stats, so monitors and summaries show what would
have fired.

Sockets (all bound to loopback unless the config allows otherwise):

- rig SUB: connects to the rig's publishers; RCVHWM is large so that a
  burst (or a pause while fitting) queues instead of losing spikes;
- events XPUB: one message per trigger event (not opened in a dry run); the
  same wire as a PUB for subscribers, and the loop reads its subscription
  messages to count who listens (rig_adapters.live.event_listeners). An event
  published while nobody listens reaches no one: it is counted
  (``events_unheard``) and logged once per run of such events; an ``arm``
  without a listener is answered with a warning, or refused with
  ``[safety] arm_requires_listener``;
- state PUB: one message per decoding step for monitors; SNDHWM is tiny so
  a slow or absent monitor loses frames instead of holding memory or time;
- control REP: request/reply commands from an experiment-control script;
  every request gets one reply, a refusal saying why (rig_adapters.wire.ingest);
  with CurveZMQ links, a ``status`` reply carries the links' counts.

A socket that cannot be opened closes the ones opened before it, so a failed
start leaves every port free.

With ``[endpoints] curve_sockets`` the sockets named there are authenticated,
encrypted CurveZMQ links with the loop as CURVE server
(rig_adapters.live.curve_links); refused handshakes are counted per socket
and reason, in the state stream's stats (``links_refused``) and the summary
(``links``).
"""

from __future__ import annotations

import logging
import math
import tempfile
import time
from types import SimpleNamespace
from pathlib import Path

import numpy as np
import zmq

from decoder.config import ExperimentConfig
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.session.ripples import ContentOutput, RippleOutput
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import (
    CHANNEL_CONTROL,
    CHANNEL_CONTROL_REFUSED,
    CHANNEL_DRY_RUN_EVENTS,
    CHANNEL_EVENTS,
    CHANNEL_RIG,
    MAX_CONTROL_BYTES,
    Ingest,
)
from rig_adapters.sessions.recorder import FITTED_MODEL_SIDECAR, SessionRecorder
from rig_adapters.sessions.summary import LatencyLog, json_float, jsonable, session_summary
from rig_adapters.live.curve_links import CurveLinks, plain_network_links
from rig_adapters.live.event_listeners import EventListeners

log = logging.getLogger(__name__)

#: What an event frame says of the decoded position when no step decoded one (a ripple event).
_NO_STEP = SimpleNamespace(map_xy_cm=(math.nan, math.nan), mean_xy_cm=(math.nan, math.nan))

#: Input queued in the SUB socket before ZeroMQ drops: minutes of a 1000-unit
#: rig at 100 batches/s, enough to ride out a model fit.
RIG_RCVHWM = 1_000_000

#: A monitor that falls behind by more than this many state frames loses frames.
STATE_SNDHWM = 4

#: ZMTP heartbeats on the events socket (ms): a bridge that vanishes without closing its connection
#: (a pulled cable, a powered-off box) is dropped after the timeout, ending its subscriptions.
EVENTS_HEARTBEAT_IVL_MS = 1000
EVENTS_HEARTBEAT_TIMEOUT_MS = 3000

#: Messages handled per pass before the control socket and the watchdog get a turn.
DRAIN_LIMIT = 2000

#: Control requests over this size (bytes) make ZeroMQ drop the requester's
#: connection, unanswered: the loop never holds such a frame in memory.
#: Requests up to it are answered; over ingest.MAX_CONTROL_BYTES, refused.
CONTROL_MAXMSGSIZE = 1024 * 1024


class LiveLoop:
    """The decoder process's loop.

    Parameters
    ----------
    config : ExperimentConfig
    pipeline : Pipeline
    recorder : SessionRecorder or None
        Session log; every input and every event goes to it.
    ttl : rig_adapters.live.ttl.TtlDevice or None
        A serial device for TTL pulses; each event pulses its rule's output.
    publish_state : bool
        Send a state frame per step (for monitors).
    dry_run : bool
        Bind no events socket and drive no TTL line; events are recorded
        and counted as withheld (see the module's docstring).
    """

    def __init__(self, config: ExperimentConfig, pipeline: Pipeline, recorder: SessionRecorder | None = None,
                 ttl=None, publish_state: bool = True, dry_run: bool = False) -> None:
        if dry_run and ttl is not None:
            raise ValueError("a dry run drives no TTL line; pass ttl=None or drop dry_run")
        self.config = config
        self.pipeline = pipeline
        self.ingest = Ingest(pipeline)
        self.recorder = recorder
        self.ttl = ttl
        self.publish_state = publish_state
        self.latency = LatencyLog()
        self.dry_run = dry_run
        self.events_sent = 0
        self.events_withheld = 0
        self.events_unheard = 0
        self.listeners: EventListeners | None = None
        self._unheard_run = False
        self._sockets: list[zmq.Socket] = []
        self.links: CurveLinks | None = None
        self.stop_requested = False
        self.name = "placeloop"
        self._state_seq = 0
        self._stats_wall_s = 0.0
        self._stats: dict = {}
        self._last_counts: dict = {}
        self._ripple_view_wall_s = -math.inf
        self._ripple_view_key: tuple = ()
        self._ripple_view_cache: dict = {}
        self._ripple_view: dict | None = None
        shape = config.environment.grid_shape
        self._grid_shape = list(shape) if shape is not None else [config.environment.n_bins]
        self._last_rig_wall_s: float | None = None
        self._stall_raised = False
        self.ctx = zmq.Context.instance()

    # -- sockets -----------------------------------------------------------------

    def _open_sockets(self) -> None:
        ep = self.config.endpoints
        for name, endpoint in plain_network_links(ep, self.dry_run):
            log.warning("the %s socket's link %s crosses a network as plain ZeroMQ: anyone there can read it and "
                        "may connect to it; list %r in [endpoints] curve_sockets", name, endpoint, name)
        try:
            if ep.curve_sockets:
                # Keys are read and the ZAP handler started before any socket can take a peer.
                self.links = CurveLinks(self.ctx, ep)
                self.links.start()
            self.rig = self._socket(zmq.SUB, "rig", ep.rig, bind=False, options=(
                (zmq.RCVHWM, RIG_RCVHWM), (zmq.LINGER, 0), (zmq.SUBSCRIBE, b"")))
            self.events = None
            if not self.dry_run:
                # Events are rare and must reach the stimulator: a generous queue. VERBOSER passes
                # every subscription and unsubscription up, so the loop can count listeners.
                self.events = self._socket(zmq.XPUB, "events", [ep.events], options=(
                    (zmq.SNDHWM, 10_000), (zmq.LINGER, 500), (zmq.XPUB_VERBOSER, 1),
                    (zmq.HEARTBEAT_IVL, EVENTS_HEARTBEAT_IVL_MS),
                    (zmq.HEARTBEAT_TIMEOUT, EVENTS_HEARTBEAT_TIMEOUT_MS)))
                self.listeners = EventListeners(self.events)
            self.state_pub = self._socket(zmq.PUB, "state", [ep.state], options=(
                (zmq.SNDHWM, STATE_SNDHWM), (zmq.LINGER, 0)))
            self.control = self._socket(zmq.REP, "control", [ep.control], options=(
                (zmq.LINGER, 0), (zmq.MAXMSGSIZE, CONTROL_MAXMSGSIZE)))
        except BaseException:
            self._close_sockets()
            raise

    def _socket(self, kind: int, name: str, endpoints, options, bind: bool = True) -> zmq.Socket:
        """A configured socket bound (or connected) to ``endpoints``; kept for closing."""
        sock = self.ctx.socket(kind)
        self._sockets.append(sock)
        for option, value in options:
            sock.setsockopt(option, value)
        if self.links is not None and name in self.links.socket_names:
            self.links.serve(sock, name)
        for endpoint in endpoints:
            verb = "bind" if bind else "connect"
            try:
                getattr(sock, verb)(endpoint)
            except zmq.ZMQError as exc:
                raise OSError(f"cannot {verb} the {name} socket to {endpoint} ({exc}); is another placeloop "
                              f"running there, or the port taken? Choose free endpoints in [endpoints]") from None
        return sock

    def _close_sockets(self) -> None:
        if self.links is not None:
            self.links.stop()
        for sock in self._sockets:
            sock.close()
        self._sockets.clear()

    # -- the loop ------------------------------------------------------------------

    def run(self, duration_s: float | None = None, idle_exit_s: float | None = None) -> None:
        """Run until stopped, ``duration_s`` of wall time, or ``idle_exit_s`` without rig input."""
        self._open_sockets()
        poller = zmq.Poller()
        poller.register(self.rig, zmq.POLLIN)
        poller.register(self.control, zmq.POLLIN)
        if self.events is not None:
            poller.register(self.events, zmq.POLLIN)
        monitors = list(self.links.monitors) if self.links is not None else []
        for monitor in monitors:
            poller.register(monitor, zmq.POLLIN)
        started = time.monotonic()
        last_input = started
        try:
            while not self.stop_requested:
                ready = dict(poller.poll(timeout=self._poll_ms()))
                if self.rig in ready:
                    n = self._drain_rig()
                    if n:
                        last_input = time.monotonic()
                if self.events is not None and self.events in ready:
                    self._read_listeners()
                if self.control in ready:
                    self._serve_control()
                for monitor in monitors:
                    if monitor in ready:
                        self.links.read_monitor(monitor)
                now = time.monotonic()
                if self.ttl is not None:
                    self.ttl.service(now)
                self._watchdog(now)
                if self.recorder is not None:
                    self.recorder.maybe_flush(time.time())
                if duration_s is not None and now - started >= duration_s:
                    break
                if idle_exit_s is not None and now - last_input >= idle_exit_s:
                    log.info("no rig input for %.1f s; stopping", idle_exit_s)
                    break
        finally:
            self._close_sockets()
            if self.recorder is not None:
                self.recorder.flush()

    def _poll_ms(self) -> int:
        """How long a poll may wait (ms): 10, or less when a TTL line is due to go low sooner."""
        due = self.ttl.next_due_s() if self.ttl is not None else None
        if due is None:
            return 10
        return max(0, min(10, math.ceil((due - time.monotonic()) * 1e3)))

    def _drain_rig(self) -> int:
        n = 0
        while n < DRAIN_LIMIT:
            try:
                payload = self.rig.recv(zmq.NOBLOCK, copy=True)
            except zmq.Again:
                break
            recv_wall_s = time.time()
            n += 1
            self.handle_rig_bytes(payload, recv_wall_s)
            if self.ttl is not None:
                # A long drain must not hold a TTL line past its pulse length.
                self.ttl.service()
        return n

    def handle_rig_bytes(self, payload: bytes, recv_wall_s: float) -> None:
        """Record, decode and process one rig message."""
        if self.recorder is not None:
            self.recorder.record_input(payload, recv_wall_s, CHANNEL_RIG)
        self._last_rig_wall_s = time.monotonic()
        self._stall_raised = False
        t0 = time.perf_counter()
        outputs = self.ingest.rig_bytes(payload)
        if outputs:
            self._emit(outputs, recv_wall_s, time.time(), (time.perf_counter() - t0) * 1e3)

    def _emit(self, outputs: list, recv_wall_s: float, decoded_wall_s: float, work_ms: float) -> None:
        steps = [o for o in outputs if isinstance(o, StepOutput)]
        if steps:
            self.latency.decode_ms.append(work_ms / len(steps))
        for out in outputs:
            if isinstance(out, Notice):
                self._notice(out)
                continue
            if isinstance(out, LearningProgress):
                if self.publish_state:
                    self._send_learning(out)
                continue
            if isinstance(out, (RippleOutput, ContentOutput)):
                for event in out.events:
                    self._send_event(out, event, False, recv_wall_s, decoded_wall_s)
                continue
            for event, is_false in zip(out.events, out.false_events):
                self._send_event(out, event, is_false, recv_wall_s, decoded_wall_s)
            if self.publish_state:
                self._send_state(out)
        # The added latency: from the receipt of the message that closed the
        # step to the last byte of its output handed to ZeroMQ.
        if steps:
            self.latency.added_ms.append((time.time() - recv_wall_s) * 1e3)
        if self.publish_state:
            # After the latency is measured: the view is for a monitor, and rides on the next state frame.
            self._prepare_ripple_view()

    def _send_event(self, out: StepOutput | RippleOutput | ContentOutput, event, is_false: bool,
                    recv_wall_s: float, decoded_wall_s: float) -> None:
        # A ripple or replay-content event has no behavioural decoded position.
        decoded = out.step if isinstance(out, StepOutput) else _NO_STEP
        payload = protocol.encode_event(
            source=self.name,
            seq=self.events_sent,
            event_id=event.event_id,
            zone=event.zone,
            rule=event.rule,
            t_s=out.t_s,
            map_xy_cm=decoded.map_xy_cm,
            mean_xy_cm=decoded.mean_xy_cm,
            zone_mass=float(event.zone_mass),
            tracked_xy_cm=out.tracked_xy_cm,
            wall_received_s=recv_wall_s,
            wall_decoded_s=decoded_wall_s,
        )
        if self.dry_run:
            # No events socket exists: the event goes to the log, on its own channel.
            self.events_withheld += 1
            if self.recorder is not None:
                self.recorder.record_output(payload, time.time(), CHANNEL_DRY_RUN_EVENTS)
            log.info("dry run: event %d withheld (rule %r zone %r at t=%.3f s would have fired)%s",
                     event.event_id, event.rule, event.zone, out.t_s, " (animal far from the zone)" if is_false else "")
            return
        self._read_listeners()
        heard = self.listeners.hears(payload)
        self.events.send(payload)
        sent_wall_s = time.time()
        if not heard:
            self._count_unheard(event.event_id)
        self._unheard_run = not heard
        if self.ttl is not None:
            self.ttl.pulse(event.rule)
        self.events_sent += 1
        self.latency.event_ms.append((sent_wall_s - recv_wall_s) * 1e3)
        if self.recorder is not None:
            self.recorder.record_output(payload, sent_wall_s, CHANNEL_EVENTS)
        log.info("event %d: rule %r zone %r at t=%.3f s%s", event.event_id, event.rule, event.zone, out.t_s,
                 " (animal far from the zone)" if is_false else "")

    def _read_listeners(self) -> None:
        """Take the events socket's subscription messages; log and record each change of listeners."""
        for change, count in self.listeners.read():
            log.info("events socket: a subscription %s; %d event listener(s)", change, count)
            if self.recorder is not None:
                self.recorder.record_mark({"event_listeners": count, "change": change}, time.time())
            if change == "left" and count == 0 and self.pipeline.bank.armed:
                log.warning("the last events listener left while armed: events now reach no one until the "
                            "stimulator bridge reconnects to the events socket (%s)", self.config.endpoints.events)

    def _count_unheard(self, event_id: int) -> None:
        self.events_unheard += 1
        if not self._unheard_run:
            log.warning("event %d was published while no listener was connected, so nothing acted on it: the "
                        "stimulator bridge is not connected to the events socket (%s) or has not subscribed; "
                        "check that it runs, connects to that endpoint and (with CurveZMQ) holds an authorised "
                        "key. Unheard events are counted (events_unheard) and logged again only after one is "
                        "heard", event_id, self.config.endpoints.events)

    def _send_state(self, out: StepOutput) -> None:
        stats = self._monitor_stats()
        stats["error_cm"] = out.error_cm if math.isfinite(out.error_cm) else -1.0
        stats["true_x_cm"], stats["true_y_cm"] = (float(v) for v in out.true_xy_cm)
        stats["event_id"] = out.events[-1].event_id if out.events else 0
        fields = dict(
            source=self.name,
            seq=self._state_seq,
            t_s=out.t_s,
            state=self.pipeline.state,
            armed=bool(out.armed),
            map_xy_cm=out.step.map_xy_cm,
            mean_xy_cm=out.step.mean_xy_cm,
            tracked_xy_cm=out.tracked_xy_cm,
            hpd95_size=float(out.step.hpd95_size),
            peak_prob=float(out.step.peak_prob),
            zone_masses={name: float(m) for name, m in zip(self.pipeline.zone_names, out.step.zone_mass)},
            n_spikes=int(out.step.n_spikes),
            posterior=out.step.posterior,
            grid_shape=self._grid_shape,
            stats={k: v for k, v in stats.items() if isinstance(v, int) or math.isfinite(v)},
        )
        self._publish_state(fields)

    def _prepare_ripple_view(self) -> None:
        """Build the ripple view when one is due; the next state frame, learning or decoding, carries it."""
        ripples = self.pipeline.ripples
        if ripples.detector is None:
            return
        # A slow consumer needs the view a few times a second, and soon after an event begins or ends.
        events = ripples.events_
        key = (len(events), math.isnan(events[-1].offset_s)) if events else ()
        now = time.monotonic()
        since = now - self._ripple_view_wall_s
        if since >= protocol.RIPPLE_VIEW_PERIOD_S or (key != self._ripple_view_key
                                                      and since >= protocol.RIPPLE_VIEW_MIN_GAP_S):
            self._ripple_view = protocol.ripple_view(ripples.detector, events, cache=self._ripple_view_cache)
            self._ripple_view_wall_s = now
            self._ripple_view_key = key

    def _send_learning(self, progress: LearningProgress) -> None:
        tracked_xy, _ = self.pipeline.tracked.at(progress.t_s)
        occupancy = progress.occupancy_s
        total = occupancy.sum()
        stats = self._monitor_stats()
        stats.update(coverage=progress.coverage, learn_elapsed_s=progress.learn_elapsed_s)
        if progress.n_tuned_units is not None:
            stats["n_spatial_units"] = progress.n_tuned_units
        nan2 = [float("nan"), float("nan")]
        self._publish_state(dict(
            source=self.name,
            seq=self._state_seq,
            t_s=progress.t_s,
            state=self.pipeline.state,
            armed=False,
            map_xy_cm=nan2,
            mean_xy_cm=nan2,
            tracked_xy_cm=tracked_xy,
            hpd95_size=0.0,
            peak_prob=0.0,
            zone_masses={name: 0.0 for name in self.pipeline.zone_names},
            n_spikes=0,
            posterior=occupancy / total if total > 0 else occupancy,
            grid_shape=self._grid_shape,
            stats=stats,
        ))

    def _publish_state(self, fields: dict) -> None:
        if self._ripple_view is not None:
            fields["ripples"], self._ripple_view = self._ripple_view, None
        self._state_seq += 1
        try:
            self.state_pub.send(protocol.encode_state(**fields), zmq.NOBLOCK)
        except zmq.Again:
            pass

    def _monitor_stats(self) -> dict:
        """Counters and latency figures for monitors, refreshed once a second of wall time."""
        now = time.monotonic()
        if now - self._stats_wall_s >= 1.0:
            c = self.pipeline.counters
            recent = self.latency.added_ms.recent()
            counts = {name: h.messages for name, h in self.pipeline.health.sources.items()}
            elapsed = now - self._stats_wall_s if self._stats_wall_s > 0 else 1.0
            rates = {f"rate_{role}_hz": (counts.get(src, 0) - self._last_counts.get(src, 0)) / elapsed
                     for role, src in (("spikes", self.config.sources.spikes),
                                       ("tracker", self.config.sources.tracker))}
            self._last_counts = counts
            self._stats_wall_s = now
            self._stats = {
                "latency_p50_ms": float(np.percentile(recent, 50)) if recent.size else 0.0,
                "latency_p99_ms": float(np.percentile(recent, 99)) if recent.size else 0.0,
                "bad_messages": int(c["bad_messages"]),
                "gaps": int(self.pipeline.health.total_gaps),
                "stale_messages": int(c["stale_messages"]),
                "events_total": int(c["events"]),
                "stalled": int(self._stall_raised),
                "dry_run": int(self.dry_run),
                "events_withheld": self.events_withheld,
                "events_listeners": self.listeners.count if self.listeners is not None else 0,
                "events_unheard": self.events_unheard,
                "control_refused": sum(self.ingest.control_refused.values()),
                "links_refused": self.links.refused_total if self.links is not None else 0,
                **rates,
            }
        stats = dict(self._stats)
        readiness = self.pipeline.readiness
        if readiness:
            stats["coverage"] = float(readiness["coverage"])
            stats["n_spatial_units"] = int(readiness["n_tuned_units"])
            cv = readiness.get("median_cv_error_cm")
            if cv is not None and math.isfinite(cv):
                stats["cv_error_cm"] = float(cv)
            fitted = readiness.get("filter")
            if fitted:
                stats["likelihood_temperature"] = float(fitted["likelihood_temperature"])
        stats["added_ms"] = self.latency.added_ms.last or 0.0
        return stats

    def _notice(self, notice: Notice) -> None:
        log.info("session: %s at t=%s %s", notice.kind, notice.t_s, notice.detail or "")
        if self.recorder is not None:
            self.recorder.record_mark({"notice": notice.kind, "t_s": json_float(notice.t_s),
                                       "detail": jsonable(notice.detail)}, time.time())
            if notice.kind == "fitted" and self.pipeline.model is not None:
                self._store_model_sidecar()

    def _store_model_sidecar(self) -> None:
        with tempfile.TemporaryDirectory(prefix="placeloop-model-") as tmp:
            path = Path(tmp) / "model.npz"
            self.pipeline.model.save(path)
            self.recorder.write_sidecar(FITTED_MODEL_SIDECAR, path.read_bytes())

    # -- control --------------------------------------------------------------------

    def _serve_control(self) -> None:
        """Answer one request: exactly one reply, whatever the request holds."""
        try:
            parts = self.control.recv_multipart(zmq.NOBLOCK)
        except zmq.Again:
            return
        recv_wall_s = time.time()
        reply = None
        try:
            unheard_arm = len(parts) == 1 and self._is_unheard_arm(parts[0])
            if unheard_arm and self.config.safety.arm_requires_listener:
                # Refused before the pipeline sees it, so logged where a replay does not feed it.
                if self.recorder is not None:
                    self.recorder.record_input(parts[0], recv_wall_s, CHANNEL_CONTROL_REFUSED)
                _, reply = self.ingest.refuse(
                    "no_listener", f"not armed: no listener is connected to the events socket "
                                   f"({self.config.endpoints.events}) and [safety] arm_requires_listener is set; "
                                   f"start the stimulator bridge, connect it to that endpoint, then arm again")
            elif len(parts) == 1:
                if self.recorder is not None:
                    self.recorder.record_input(parts[0], recv_wall_s, CHANNEL_CONTROL)
                outputs, reply = self.ingest.control_bytes(parts[0])
                if reply and "status" in reply:
                    reply["status"]["events"] = self._events_status()
                    if self.links is not None:
                        reply["status"]["links"] = self.links.summary()
                if unheard_arm and reply and reply.get("ok"):
                    reply["warning"] = (f"armed with no listener on the events socket "
                                        f"({self.config.endpoints.events}): events reach no stimulator until its "
                                        f"bridge connects and subscribes (a rig driven only by TTL lines has none)")
                    log.warning("%s", reply["warning"])
                self._emit(outputs, recv_wall_s, time.time(), 0.0)
            else:
                # Kept in the log, on a channel a replay does not feed: it was never a request.
                if self.recorder is not None:
                    for part in parts:
                        self.recorder.record_input(part, recv_wall_s, CHANNEL_CONTROL_REFUSED)
                _, reply = self.ingest.refuse(
                    "multipart", f"the request has {len(parts)} parts; send one frame holding one control map")
        except Exception as exc:  # noqa: BLE001 - the control socket's edge: a request never ends the loop
            log.exception("a control request failed")
            _, reply = self.ingest.refuse("internal", f"the request failed inside placeloop ({type(exc).__name__}); "
                                                      "see the decoder's log")
        finally:
            self._reply(reply)

    def _is_unheard_arm(self, payload: bytes) -> bool:
        """Whether ``payload`` asks to arm while events go over ZeroMQ and nobody listens."""
        if self.events is None or len(payload) > MAX_CONTROL_BYTES:
            return False
        self._read_listeners()
        if self.listeners.count:
            return False
        try:
            return protocol.decode_control_request(payload).command == "arm"
        except Exception:  # noqa: BLE001 - not an arm; ingest refuses it with the reason
            return False

    def _event_counts(self) -> dict:
        """Whether this is a dry run, and the events published, withheld and unheard: status and summary alike."""
        return {"dry_run": self.dry_run, "published": self.events_sent, "withheld": self.events_withheld,
                "unheard": self.events_unheard}

    def _events_status(self) -> dict:
        """The events socket in a ``status`` reply: the event counts and the listeners now."""
        listeners = self.listeners.summary() if self.listeners is not None else {}
        return {**self._event_counts(), **listeners}

    def _reply(self, fields: dict | None) -> None:
        if fields is None:
            fields = {"ok": False, "error": "the request failed inside placeloop; see the decoder's log"}
        fields = dict(fields)
        ok = fields.pop("ok")
        try:
            payload = protocol.encode_control_reply(ok, **jsonable(fields))
        except Exception:  # noqa: BLE001 - the REP socket must answer, or it takes no more requests
            log.exception("a control reply could not be encoded")
            payload = protocol.encode_control_reply(False, error="the reply could not be encoded; see the "
                                                                  "decoder's log", reason="internal")
        try:
            # A REP reply goes to its requester's own pipe; if that peer has gone, ZeroMQ drops it.
            self.control.send(payload)
        except zmq.ZMQError as exc:
            log.warning("a control reply was not sent (%s); the requester has gone", exc)

    def _watchdog(self, now: float) -> None:
        """Disarm when the rig has been silent for the stall limit (wall clock)."""
        if self._last_rig_wall_s is None or self._stall_raised or not self.pipeline.bank.armed:
            return
        if now - self._last_rig_wall_s > self.config.safety.stall_limit_s:
            self._stall_raised = True
            log.error("rig silent for %.2f s: disarming", now - self._last_rig_wall_s)
            payload = Ingest.stall_request(self.config.sources.spikes)
            recv_wall_s = time.time()
            if self.recorder is not None:
                self.recorder.record_input(payload, recv_wall_s, CHANNEL_CONTROL)
            outputs, _ = self.ingest.control_bytes(payload)
            self._emit(outputs, recv_wall_s, time.time(), 0.0)

    # -- summary ----------------------------------------------------------------------

    def summary(self) -> dict:
        """The session summary (the JSON written by ``--summary``).

        Beyond the figures a replay shares, ``triggers`` says whether this
        was a dry run and how many events were published or withheld,
        ``input.control_refused`` counts refused control requests by reason
        (apart from ``input.bad_messages``, which is rig data only), and
        ``ttl``, with a TTL device, the pulses started and the writes failed;
        ``links``, with CurveZMQ sockets, the peers authorised and the
        handshakes accepted and refused per socket and reason;
        ``triggers.unheard`` counts events published while nobody listened,
        and ``event_listeners`` (not in a dry run) the events socket's
        listeners at the end, the most at once, subscriptions joined and left.
        """
        summary = session_summary(self.pipeline, self.latency)
        summary["triggers"].update(self._event_counts())
        if self.listeners is not None:
            summary["event_listeners"] = self.listeners.summary()
        summary["input"]["control_refused"] = dict(self.ingest.control_refused)
        if self.ttl is not None:
            summary["ttl"] = {"pulses": self.ttl.pulses, "failures": self.ttl.failures}
        if self.links is not None:
            summary["links"] = self.links.summary()
        return summary
