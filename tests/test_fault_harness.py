"""The fault probe's consumers join the loop's sockets before the probe goes on (bench/fault_loop.py).

Real ZeroMQ sockets on 127.0.0.1, no loop process: the bench's SUB socket
connects before its publisher binds, as it does with ``placeloop run``, and
ZeroMQ retries the connect every reconnect interval. A PUB socket sends
nothing to a subscriber that has not joined (the ZeroMQ guide's "slow
joiner"); the probe once counted an event the loop had published in that
interval as missed. ``wait_joined`` must hold the bench back until the
handshake is done, and say so when nothing is bound.
"""

import threading
import time

import pytest
import zmq

from bench.fault_loop import joining_monitor, wait_joined
from rig_adapters.sim.demo import free_loopback_port


def _consumer(ctx: zmq.Context, endpoint: str) -> tuple[zmq.Socket, zmq.Socket]:
    sock = ctx.socket(zmq.SUB)
    sock.setsockopt(zmq.SUBSCRIBE, b"")
    sock.setsockopt(zmq.LINGER, 0)
    monitor = joining_monitor(sock)
    sock.connect(endpoint)
    return sock, monitor


def test_a_consumer_that_connected_before_the_bind_has_joined_when_wait_joined_returns():
    ctx = zmq.Context()
    endpoint = f"tcp://127.0.0.1:{free_loopback_port()}"
    # XPUB in the loop's place: it shows when the subscription has arrived, which a PUB would not.
    publisher = ctx.socket(zmq.XPUB)
    publisher.setsockopt(zmq.LINGER, 0)
    bound = threading.Event()
    sub, monitor = _consumer(ctx, endpoint)

    def bind_late():
        time.sleep(0.3)   # the loop binds after its warm-up: the consumer is retrying by then
        publisher.bind(endpoint)
        bound.set()

    binder = threading.Thread(target=bind_late)
    binder.start()
    try:
        wait_joined(sub, monitor, timeout_s=30.0)
        assert bound.is_set()
        # The subscription follows the handshake at once (common practice; the bench relies on it).
        assert publisher.poll(10_000), "no subscription reached the publisher after the handshake"
        assert publisher.recv() == b"\x01"
        publisher.send(b"event")
        assert sub.poll(10_000) and sub.recv() == b"event"
    finally:
        binder.join()
        sub.close(linger=0)
        publisher.close(linger=0)
        ctx.term()


def test_wait_joined_says_when_nothing_is_bound():
    ctx = zmq.Context()
    sub, monitor = _consumer(ctx, f"tcp://127.0.0.1:{free_loopback_port()}")
    try:
        with pytest.raises(RuntimeError, match="did not join .* is the loop bound there"):
            wait_joined(sub, monitor, timeout_s=0.3)
    finally:
        sub.close(linger=0)
        ctx.term()
