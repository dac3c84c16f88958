"""What the loop tests share: a small arena session's config, loopback endpoints, a subscriber and a control client."""

from __future__ import annotations

import time

import zmq

from rig_adapters.wire import protocol

#: A small invented arena session with one goal zone and one rule, as a TOML document's tables; the
#: tests extend copies of it (``{**BASE, ...}``) and never change it in place.
BASE = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "decoder": {"window_s": 0.25, "step_s": 0.025, "prior": "state_space", "random_walk_sd_cm": 4.0},
    "sources": {"truth": "truth"},
    "safety": {"refractory_s": 2.0, "max_per_minute": 20, "max_per_session": 100, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 12.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 50, "n_grid_cells": 5, "n_nonspatial_cells": 5},
}


def loopback_endpoints() -> dict:
    """The ``[endpoints]`` table of a loop on free 127.0.0.1 ports (rig, events, state, control)."""
    from rig_adapters.sim.demo import free_loopback_port

    ports = {k: free_loopback_port() for k in ("rig", "events", "state", "control")}
    return {"rig": [f"tcp://127.0.0.1:{ports['rig']}"],
            **{k: f"tcp://127.0.0.1:{ports[k]}" for k in ("events", "state", "control")}}


def open_with_subscriber(loop, endpoint: str) -> zmq.Socket:
    """Open ``loop``'s sockets and a SUB socket on ``endpoint`` taking every message, once subscribed.

    The caller closes both (``loop._close_sockets()``, ``close()``: LINGER 0).
    """
    sock = zmq.Context.instance().socket(zmq.SUB)
    sock.setsockopt(zmq.SUBSCRIBE, b"")
    sock.setsockopt(zmq.LINGER, 0)
    try:
        loop._open_sockets()
        sock.connect(endpoint)
    except Exception:
        sock.close()
        raise
    time.sleep(0.3)  # the subscription reaches the publisher before the first message
    return sock


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
