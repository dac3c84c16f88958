"""The monitor draws a heading session as a ring (rig_adapters.monitor.server and its page, in headless chromium).

The state frames are invented (a head turning at a steady rate, a von Mises
posterior around it): they check the plumbing and the drawing, not science.
Everything binds to 127.0.0.1 only.
"""

from __future__ import annotations

import math
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import zmq

from decoder.config import load_config
from decoder.space.headings import heading_point
from rig_adapters.monitor.server import environment_payload
from rig_adapters.wire import protocol

REPO = Path(__file__).resolve().parent.parent
CONFIG = REPO / "configs" / "heading_goal_arc.toml"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def _free_port() -> int:
    import socket

    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _frame(config, seq: int, t_s: float, heading_deg: float) -> bytes:
    env = config.environment
    theta = np.radians(env.bin_centers_deg)
    p = np.exp(20.0 * (np.cos(theta - math.radians(heading_deg)) - 1.0))
    p /= p.sum()
    mean = p @ env.bin_centers_cm
    point = list(heading_point(math.radians(heading_deg)))
    return protocol.encode_state(
        source="placeloop", seq=seq, t_s=t_s, state="decoding", armed=True,
        map_xy_cm=list(env.bin_centers_cm[int(p.argmax())]), mean_xy_cm=list(mean), tracked_xy_cm=point,
        hpd95_size=30.0, peak_prob=float(p.max()),
        zone_masses={z.name: float(p[z.bin_mask(env)].sum()) for z in config.zones},
        n_spikes=10, posterior=p, stats={"error_cm": 3.0, "added_ms": 0.5},
    )


def test_environment_payload_of_a_heading_ring():
    payload = environment_payload(load_config(CONFIG))
    assert payload["kind"] == "ring" and payload["hpd_unit"] == "deg"
    assert len(payload["bin_edges_deg"]) == 61 and payload["bin_edges_deg"][-1] == pytest.approx(360.0)
    assert payload["ring_radius_cm"] == pytest.approx(180.0 / math.pi)
    assert payload["zones"][0]["kind"] == "arc"


@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium (.ci/run installs it)")
def test_page_draws_the_heading_ring_in_headless_chromium(tmp_path):
    from playwright.sync_api import sync_playwright

    config = load_config(CONFIG)
    state_port, http_port = _free_port(), _free_port()
    endpoint = f"tcp://127.0.0.1:{state_port}"
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.bind(endpoint)
    stop = threading.Event()

    def publish():
        seq = 0
        while not stop.is_set():
            t = 0.02 * seq
            pub.send(_frame(config, seq, t, (40.0 * t) % 360.0))
            seq += 1
            time.sleep(0.02)

    publisher = threading.Thread(target=publish, daemon=True)
    monitor = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(CONFIG), "--state", endpoint,
         "--http-port", str(http_port)], cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    errors: list[str] = []
    try:
        publisher.start()
        url = f"http://127.0.0.1:{http_port}/"
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1400, "height": 900})
            page.on("pageerror", lambda e: errors.append(str(e)))
            deadline = time.monotonic() + 30
            while True:
                try:
                    page.goto(url)
                    break
                except Exception:
                    assert time.monotonic() < deadline, "the monitor never served its page"
                    time.sleep(0.3)
            samples = []
            while time.monotonic() < deadline and len(samples) < 8:
                state = page.evaluate("window.__monitorState || {}")
                if state.get("state") == "decoding":
                    samples.append(state)
                time.sleep(0.25)
            page.screenshot(path=str(tmp_path / "ring.png"))
            browser.close()
    finally:
        stop.set()
        publisher.join(5)
        monitor.terminate()
        monitor.communicate(timeout=10)  # reads and closes its pipe
        pub.close()
        ctx.term()
    assert not errors, errors
    assert len(samples) >= 8 and all(s["envKind"] == "ring" for s in samples)
    # 60 bins of 6 degrees; the posterior's peak follows the turning head.
    assert samples[-1]["post_len"] == 60
    assert len({s["post_argmax"] for s in samples}) > 2
