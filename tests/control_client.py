"""The tests' one control client: a request to a running loop over a real REQ socket on loopback."""

from __future__ import annotations

import zmq

from rig_adapters.wire import protocol


def control_request(endpoint: str, command: str, args: dict | None = None, timeout_ms: int = 20_000) -> dict:
    """Send ``command`` (with ``args``) to the loop's control socket at ``endpoint``; its decoded reply.

    A loop that does not answer within ``timeout_ms`` raises ``zmq.Again``.
    """
    req = zmq.Context.instance().socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.setsockopt(zmq.RCVTIMEO, timeout_ms)
    try:
        req.connect(endpoint)
        req.send(protocol.encode_control_request(command, args or {}))
        return protocol.decode_control_reply(req.recv())
    finally:
        req.close()
