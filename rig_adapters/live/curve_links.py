"""The loop's authenticated links: CURVE server sockets, the ZAP check, refusals counted.

With ``[endpoints] curve_sockets`` set, each socket named there is made the
CURVE server of its links (:func:`rig_adapters.wire.curve_keys.as_server`)
before it binds or connects, whichever way round the connection goes: the
rig's publisher, the stimulator, a monitor and a control client are all
CURVE clients and must hold the loop's public key. ZeroMQ then asks a ZAP
handler about every client key; pyzmq's ``ThreadAuthenticator`` answers on a
thread of its own, so a handshake is never held up by a model fit in the
loop, and its only question, "is this key in the authorised set?", reads a
set that is fixed before the thread starts.

Refusals are counted from each socket's monitor (ZeroMQ's handshake
events), read in the loop's own poller, so nothing is shared across threads:

- ``unlisted_key``: a CURVE client whose key is not authorised (the ZAP
  handler said no);
- ``wrong_server_key``: a client that does not hold the loop's public key
  (the handshake cannot be decrypted);
- ``not_curve``: a plain ZeroMQ peer, without CURVE at all;
- ``handshake``: any other failed handshake, and one libzmq reports with
  no detail (a plain peer that hangs up before the mismatch is reported).

A peer that keeps reconnecting is refused, and counted, once per try.
"""

from __future__ import annotations

import logging

import zmq
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import recv_monitor_message

from decoder.config.shell import CURVE_SOCKET_NAMES, EndpointSettings, is_loopback_endpoint
from rig_adapters.wire.curve_keys import as_server, read_authorised, read_key

log = logging.getLogger(__name__)

#: Handshake events each CURVE socket reports to its monitor.
_MONITOR_EVENTS = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_AUTH
                   | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL)

#: Refusal reasons, in the order the summary lists them.
REFUSAL_REASONS = ("unlisted_key", "wrong_server_key", "not_curve", "handshake")


def plain_network_links(settings: EndpointSettings, dry_run: bool = False) -> list[tuple[str, str]]:
    """The (socket, endpoint) pairs that would cross a network as plain ZeroMQ: not loopback, not CURVE.

    Anyone on that network can read such a link and, unless a firewall
    stops them, connect to it; the loop warns of each at start.
    """
    sockets = {"rig": settings.rig, "events": () if dry_run else (settings.events,),
               "state": (settings.state,), "control": (settings.control,)}
    return [(name, endpoint) for name, endpoints in sockets.items() for endpoint in endpoints
            if name not in settings.curve_sockets and not is_loopback_endpoint(endpoint)]


class _AuthorisedKeys:
    """The ZAP question, answered on the authenticator's thread from a set fixed before it starts."""

    def __init__(self, keys: frozenset[bytes]) -> None:
        self.keys = keys

    def callback(self, domain: str, client_key: bytes) -> bool:
        return client_key in self.keys


class CurveLinks:
    """The CURVE server role of the loop's sockets, and the count of who was let in or refused.

    Parameters
    ----------
    ctx : zmq.Context
        The loop's context; the ZAP handler must live in the same one.
    settings : EndpointSettings
        ``curve_sockets``, ``curve_secret_key`` and ``curve_clients``.

    Raises
    ------
    rig_adapters.wire.curve_keys.KeyFileError
        The secret key or the authorised keys cannot be read; said how to fix.
    """

    def __init__(self, ctx: zmq.Context, settings: EndpointSettings) -> None:
        self.ctx = ctx
        self.socket_names = tuple(settings.curve_sockets)
        self.own = read_key(settings.curve_secret_key, need_secret=True)
        self.clients = read_authorised(settings.curve_clients)
        self.accepted = {name: 0 for name in self.socket_names}
        self.refused = {name: dict.fromkeys(REFUSAL_REASONS, 0) for name in self.socket_names}
        self.monitors: dict[zmq.Socket, str] = {}
        self._served: list[zmq.Socket] = []
        self._auth: ThreadAuthenticator | None = None

    def start(self) -> None:
        """Start the ZAP handler; before any CURVE socket binds or connects."""
        self._auth = ThreadAuthenticator(self.ctx)
        self._auth.start()
        keys = _AuthorisedKeys(frozenset(self.clients))
        for name in self.socket_names:
            self._auth.configure_curve_callback(domain=name, credentials_provider=keys)
        log.info("CurveZMQ on %s; %d authorised peer(s): %s", ", ".join(self.socket_names), len(self.clients),
                 ", ".join(sorted(self.clients.values())))

    def serve(self, sock: zmq.Socket, name: str) -> None:
        """Make ``sock`` (named in ``curve_sockets``) a CURVE server with a handshake monitor."""
        assert name in CURVE_SOCKET_NAMES and self._auth is not None
        as_server(sock, self.own, name)
        self.monitors[sock.get_monitor_socket(_MONITOR_EVENTS)] = name
        self._served.append(sock)

    def read_monitor(self, monitor: zmq.Socket) -> None:
        """Count the handshake events waiting on one monitor socket."""
        name = self.monitors[monitor]
        while monitor.poll(0):
            event = recv_monitor_message(monitor)
            kind = event["event"]
            if kind == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self.accepted[name] += 1
                continue
            if kind == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                reason = "unlisted_key"
            elif event["value"] == zmq.PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC:
                reason = "wrong_server_key"
            elif event["value"] == zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH:
                reason = "not_curve"
            else:
                reason = "handshake"
            self.refused[name][reason] += 1
            count = self.refused[name][reason]
            # ZeroMQ retries about ten times a second: the 1st, 10th, 100th ... refusal is logged, not each.
            if count == 10 ** (len(str(count)) - 1):
                log.warning("%s socket: a peer's handshake was refused (%s) on %s; %d so far", name, reason,
                            event["endpoint"].decode(errors="replace"), count)

    @property
    def refused_total(self) -> int:
        return sum(sum(by_reason.values()) for by_reason in self.refused.values())

    def stop(self) -> None:
        """Close the monitors and stop the ZAP handler; before the sockets themselves close."""
        for sock in self._served:
            if not sock.closed:
                sock.disable_monitor()
        for monitor in self.monitors:
            monitor.close(linger=0)
        self._served.clear()
        if self._auth is not None:
            self._auth.stop()
            self._auth = None

    def summary(self) -> dict:
        """``curve_sockets``, the authorised peers' names, handshakes accepted and refused (by reason) per socket."""
        return {
            "curve_sockets": list(self.socket_names),
            "authorised": sorted(self.clients.values()),
            "accepted": dict(self.accepted),
            "refused": {name: dict(by_reason) for name, by_reason in self.refused.items()},
            "refused_total": self.refused_total,
        }
