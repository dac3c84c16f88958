"""Who listens on the loop's events socket, read from the socket's own subscription messages.

A ZeroMQ publisher drops, silently, every message that no subscriber's
prefix matches, and one sent before a subscriber has joined. The events
socket is therefore an XPUB (the same wire as a PUB for subscribers) with
``XPUB_VERBOSER`` set, so that every subscription and every unsubscription
reaches the loop as a message: a subscriber's own, and the one libzmq
(4.3.5, checked in tests/test_event_listeners.py) makes for each of a
peer's prefixes when the peer's connection closes (its socket closed, its
process ended or killed). ZMTP heartbeats on the socket close a connection
whose peer has vanished without closing it (a pulled cable, a powered-off
bridge), so that one ends its subscriptions too.

A listener is one subscription: a bridge that subscribes once (to ``b""``,
everything) counts once. Without peer identities on an XPUB, a peer that
subscribes twice to the same prefix counts twice and, since libzmq ends a
closed peer's prefix once, stays counted once after it has gone; the
protocol asks a bridge to subscribe once.
"""

from __future__ import annotations

import logging

import zmq

log = logging.getLogger(__name__)

#: The first byte of a subscription message on an XPUB (ZeroMQ RFC 29, PUB-SUB): 1 subscribe, 0 unsubscribe.
_SUBSCRIBE, _UNSUBSCRIBE = 1, 0


class EventListeners:
    """The events socket's subscriptions, counted per prefix.

    Parameters
    ----------
    sock : zmq.Socket
        The events XPUB socket, with ``XPUB_VERBOSER`` set.

    Attributes
    ----------
    by_prefix : dict of bytes to int
        Subscriptions held now, per prefix (only prefixes with at least one).
    joined, left : int
        Subscriptions and unsubscriptions seen since the socket opened.
    most : int
        The largest number of subscriptions held at once.
    """

    def __init__(self, sock: zmq.Socket) -> None:
        self.sock = sock
        self.by_prefix: dict[bytes, int] = {}
        self.joined = 0
        self.left = 0
        self.most = 0

    @property
    def count(self) -> int:
        """Subscriptions held now: the number of event listeners."""
        return sum(self.by_prefix.values())

    def read(self) -> list[tuple[str, int]]:
        """Take every subscription message waiting on the socket.

        Returns
        -------
        list of (str, int)
            One ``("joined" | "left", listeners after it)`` per change, in order.
        """
        changes = []
        while True:
            try:
                frame = self.sock.recv(zmq.NOBLOCK)
            except zmq.Again:
                return changes
            if not frame or frame[0] not in (_SUBSCRIBE, _UNSUBSCRIBE):
                continue
            prefix = frame[1:]
            if frame[0] == _SUBSCRIBE:
                self.by_prefix[prefix] = self.by_prefix.get(prefix, 0) + 1
                self.joined += 1
                self.most = max(self.most, self.count)
                changes.append(("joined", self.count))
            elif prefix in self.by_prefix:
                self.left += 1
                self.by_prefix[prefix] -= 1
                if not self.by_prefix[prefix]:
                    del self.by_prefix[prefix]
                changes.append(("left", self.count))

    def hears(self, payload: bytes) -> bool:
        """Whether some subscription's prefix matches ``payload``, so ZeroMQ delivers it to someone."""
        return any(payload.startswith(prefix) for prefix in self.by_prefix)

    def summary(self) -> dict:
        """Listeners now, the most at once, subscriptions joined and left."""
        return {"listeners": self.count, "most": self.most, "joined": self.joined, "left": self.left}
