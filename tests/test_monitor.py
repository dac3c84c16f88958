"""The live monitor (rig_adapters.monitor.server): its figures, its server, and the page in a real browser.

References used below: numpy (``median``, ``histogram``) as the independent
reference for the rolling error, the error trace and the latency histogram;
PROTOCOL.md section 7 for counting frames lost from sequence numbers;
RFC 6455 (WebSocket) and the HTML/CSP specifications only through the real
aiohttp client and Debian's chromium. The state frames fed to the monitor
outside the browser test are invented (a scripted animal and a Gaussian
posterior); they check plumbing and arithmetic, not science.
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path
from urllib.parse import urlparse

import aiohttp
import numpy as np
import pytest
import zmq
import zmq.asyncio
from aiohttp import web

from decoder.config import parse_config
from rig_adapters.wire import protocol
from rig_adapters.monitor.server import (
    LATENCY_EDGES_MS,
    ROLLING_ERROR_S,
    SEND_INTERVAL_S,
    SessionView,
    create_app,
    environment_payload,
    is_loopback_host,
    main,
    pack_packet,
    quantise_posterior,
    unpack_packet,
)

REPO = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")

ARENA_TOML = """
[environment]
kind = "circle"
center_cm = [50.0, 50.0]
radius_cm = 45.0
bin_cm = 5.0

[[zones]]
kind = "circle"
name = "goal"
center_cm = [70.0, 60.0]
radius_cm = 10.0
"""

TRACK_TOML = """
[environment]
kind = "linear_track"
start_cm = [0.0, 0.0]
end_cm = [200.0, 0.0]
bin_cm = 4.0

[[zones]]
kind = "interval"
name = "far_end"
start_cm = 180.0
end_cm = 200.0
"""


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def state_frame(config, seq: int, t_s: float, xy=(50.0, 50.0), state="decoding", **stats) -> bytes:
    """One invented state frame: a Gaussian posterior 6 cm wide around ``xy``."""
    env = config.environment
    d2 = np.sum((env.bin_centers_cm - np.asarray(xy)) ** 2, axis=1)
    p = np.exp(-0.5 * d2 / 36.0) * env.valid_mask
    p /= p.sum()
    post = p.reshape(env.grid_shape) if env.grid_shape else p
    return protocol.encode_state(
        source="placeloop", seq=seq, t_s=t_s, state=state, armed=state == "decoding",
        map_xy_cm=list(xy), mean_xy_cm=list(xy), tracked_xy_cm=list(xy), hpd95_size=100.0,
        peak_prob=float(p.max()), zone_masses={z.name: float(p[z.bin_mask(env)].sum()) for z in config.zones},
        n_spikes=10, posterior=post, stats=stats,
    )


# --------------------------------------------------------------------------
# The pure parts


def test_environment_payload_describes_the_grid_and_zones():
    config = parse_config(ARENA_TOML)
    env = config.environment
    payload = json.loads(json.dumps(environment_payload(config)))
    ny, nx = env.grid_shape
    assert payload["kind"] == "arena" and payload["grid_shape"] == [ny, nx]
    assert len(payload["x_edges_cm"]) == nx + 1 and len(payload["y_edges_cm"]) == ny + 1
    assert len(payload["valid_mask"]) == env.n_bins
    # Row-major bins (DEVELOPERS.md): the page's bin of a point, found from the
    # edges with numpy.histogram2d, must be environment.bin_index of that point.
    xy = env.bin_centers_cm[env.valid_mask][::7]
    counts, _, _ = np.histogram2d(xy[:, 1], xy[:, 0], bins=[payload["y_edges_cm"], payload["x_edges_cm"]])
    expected = np.zeros(env.n_bins)
    np.add.at(expected, env.bin_index(xy), 1)
    np.testing.assert_array_equal(counts.ravel(), expected)  # reference: numpy.histogram2d
    assert payload["zones"] == [{"kind": "circle", "name": "goal", "center_cm": [70.0, 60.0], "radius_cm": 10.0}]
    assert payload["hpd_unit"] == "cm²"


def test_environment_payload_of_a_track_gives_linear_bins():
    config = parse_config(TRACK_TOML)
    payload = environment_payload(config)
    assert payload["kind"] == "track" and payload["hpd_unit"] == "cm"
    assert len(payload["linear_edges_cm"]) == config.environment.n_bins + 1
    assert payload["linear_edges_cm"][0] == 0.0 and payload["linear_edges_cm"][-1] == pytest.approx(200.0)
    assert payload["edge_starts_cm"] == [0.0]


def test_quantised_posterior_is_within_half_a_step_of_the_original():
    rng = np.random.default_rng(3)
    p = rng.random((12, 17)).astype(np.float32)
    p /= p.sum()
    data, peak = quantise_posterior(p)
    q = np.frombuffer(data, dtype=np.uint8).reshape(p.shape)
    assert peak == pytest.approx(float(p.max()))
    # Uniform quantisation to 255 steps of the peak errs by at most half a step (common practice).
    assert np.max(np.abs(q * (peak / 255.0) - p)) <= peak / 510.0 + 1e-9
    assert q.max() == 255
    zero, zero_peak = quantise_posterior(np.zeros(5))
    assert zero == bytes(5) and zero_peak == 0.0
    nan_data, _ = quantise_posterior(np.array([np.nan, 1.0]))
    assert list(nan_data) == [0, 255]


def test_packet_round_trip_and_truncated_packet():
    header = {"a": 1, "b": [1.5, None]}
    data = pack_packet(header, b"\x00\x7f\xff")
    assert unpack_packet(data) == (header, b"\x00\x7f\xff")
    with pytest.raises(ValueError, match="header has"):
        unpack_packet(data[:6])
    with pytest.raises(ValueError, match="at least 4 bytes"):
        unpack_packet(b"\x01")


def test_session_view_figures_match_numpy():
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    rng = np.random.default_rng(5)
    errors = rng.gamma(2.0, 3.0, size=1500)
    latencies = rng.lognormal(0.0, 1.5, size=1500)
    times = 10.0 + 0.02 * np.arange(1500)
    for i, (t, e, a) in enumerate(zip(times, errors, latencies)):
        view.add_bytes(state_frame(config, i, float(t), error_cm=float(e), added_ms=float(a)), wall_s=0.0)
    recent = errors[times >= times[-1] - ROLLING_ERROR_S]
    assert view.rolling_error_cm() == pytest.approx(np.median(recent))  # reference: numpy.median
    header, body = unpack_packet(view.packet({}, wall_s=1.0))
    assert header["session_error_cm"] == pytest.approx(np.median(errors))  # reference: numpy.median
    # One trace point per whole second of data time: the median of that second's errors.
    whole = np.floor(times)
    ref = [np.median(errors[whole == s]) for s in np.unique(whole)]
    got = [e for _, e in header["trace"]]
    assert len(got) == len(ref) - 1  # the newest second is still open
    np.testing.assert_allclose(got, ref[:-1])  # reference: numpy.median per second
    # The histogram puts values outside its range into the end bins.
    clipped = np.clip(latencies, LATENCY_EDGES_MS[0], LATENCY_EDGES_MS[-1] * 0.999)
    ref_counts, _ = np.histogram(clipped, bins=LATENCY_EDGES_MS)
    assert header["latency_counts"] == ref_counts.tolist()  # reference: numpy.histogram
    assert len(body) == config.environment.n_bins
    assert header["frame"]["post_shape"] == list(config.environment.grid_shape)


def test_session_view_counts_missed_and_bad_frames_and_keeps_going():
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    view.add_bytes(state_frame(config, 0, 1.0), 0.0)
    view.add_bytes(state_frame(config, 4, 1.1), 0.0)  # seq 1..3 lost: 3 missed (PROTOCOL.md section 7)
    view.add_bytes(b"\xc1 not msgpack", 0.0)
    view.add_bytes(protocol.encode_event(
        source="placeloop", seq=0, event_id=1, zone="goal", rule="r", t_s=1.0, map_xy_cm=[0, 0],
        mean_xy_cm=[0, 0], zone_mass=0.9, tracked_xy_cm=[0, 0], wall_received_s=0.0, wall_decoded_s=0.0), 0.0)
    view.add_bytes(state_frame(config, 5, 1.2, xy=(70.0, 60.0)), 0.0)
    assert view.frames_received == 3 and view.frames_missed == 3
    assert view.bad_frames == 2 and view.bad_reasons == {"not_msgpack": 1, "unknown_kind": 1}
    assert view.latest["t_s"] == 1.2


def test_session_view_sends_each_trace_point_and_event_once_per_page():
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    seq = 0
    for t in np.arange(0.0, 3.0, 0.02):
        fire = abs(t - 1.5) < 1e-9
        view.add_bytes(state_frame(config, seq, float(t), error_cm=2.0, event_id=1 if fire else 0,
                                   events_total=int(t >= 1.5)), 0.0)
        seq += 1
    page_a, page_b = {}, {}
    first, _ = unpack_packet(view.packet(page_a, 0.0))
    assert [e["id"] for e in first["events"]] == [1]
    assert first["events"][0]["top_zone"] == "goal"
    n_trace = len(first["trace"])
    assert n_trace == 2
    again, _ = unpack_packet(view.packet(page_a, 0.0))
    assert again["events"] == [] and again["trace"] == [] and again["trace_from"] == n_trace
    late, _ = unpack_packet(view.packet(page_b, 0.0))  # a page that joins late gets the whole history
    assert len(late["trace"]) == n_trace and [e["id"] for e in late["events"]] == [1]


def test_unknown_error_is_not_counted_as_an_error():
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    view.add_bytes(state_frame(config, 0, 1.0, error_cm=-1.0), 0.0)  # the loop's "no true position"
    header, _ = unpack_packet(view.packet({}, 0.0))
    assert header["rolling_error_cm"] is None and header["frame"]["stats"]["error_cm"] is None


def test_track_packets_carry_linear_positions():
    config = parse_config(TRACK_TOML)
    view = SessionView(config)
    view.add_bytes(state_frame(config, 0, 1.0, xy=(150.0, 2.0)), 0.0)
    header, body = unpack_packet(view.packet({}, 0.0))
    # Projection onto a straight track along x: linear position equals x (geometry).
    assert header["frame"]["linear"]["tracked"] == pytest.approx(150.0)
    assert len(body) == config.environment.n_bins


def test_loopback_hosts():
    # RFC 5735 / RFC 4291: 127.0.0.0/8 and ::1 are loopback.
    assert is_loopback_host("127.0.0.1") and is_loopback_host("127.3.2.1") and is_loopback_host("::1")
    assert is_loopback_host("localhost")
    assert not is_loopback_host("0.0.0.0") and not is_loopback_host("192.168.1.5") and not is_loopback_host("rig-pc")


def test_cli_reports_a_missing_config(tmp_path, capsys):
    assert main(["--config", str(tmp_path / "absent.toml"), "--state", "tcp://127.0.0.1:1"]) == 2
    assert "cannot read config" in capsys.readouterr().err


# --------------------------------------------------------------------------
# The server over real sockets


def test_server_pushes_newest_state_over_websocket(tmp_path):
    config = parse_config(ARENA_TOML)
    state_port, http_port = free_port(), free_port()
    endpoint = f"tcp://127.0.0.1:{state_port}"

    async def scenario():
        ctx = zmq.asyncio.Context()
        pub = ctx.socket(zmq.PUB)
        pub.setsockopt(zmq.LINGER, 0)
        pub.bind(endpoint)
        runner = web.AppRunner(create_app(config, endpoint))
        await runner.setup()
        await web.TCPSite(runner, "127.0.0.1", http_port).start()
        packets, sent_t = [], []
        stop = asyncio.Event()

        async def publish():
            seq = 0
            while not stop.is_set():
                t = 0.01 * seq
                x = 50.0 + 30.0 * math.cos(t)
                await pub.send(state_frame(config, seq, t, xy=(x, 50.0), error_cm=1.0, added_ms=0.5))
                if seq == 20:
                    await pub.send(b"garbage")
                sent_t.append(t)
                seq += 1
                await asyncio.sleep(0.002)

        try:
            async with aiohttp.ClientSession() as http:
                async with http.get(f"http://127.0.0.1:{http_port}/api/environment") as r:
                    env = await r.json()
                    csp = r.headers["Content-Security-Policy"]
                async with http.get(f"http://127.0.0.1:{http_port}/") as r:
                    page = await r.text()
                async with http.get(f"http://127.0.0.1:{http_port}/static/../monitor.py") as r:
                    escaped = r.status
                publisher = asyncio.create_task(publish())
                async with http.ws_connect(f"http://127.0.0.1:{http_port}/ws") as ws:
                    started = time.monotonic()
                    while time.monotonic() - started < 2.0:
                        msg = await ws.receive(timeout=2.0)
                        packets.append((time.monotonic(), msg.data))
                stop.set()
                await publisher
        finally:
            await runner.cleanup()
            pub.close(linger=0)
            ctx.term()
        return env, csp, page, escaped, packets, sent_t

    env, csp, page, escaped, packets, sent_t = asyncio.run(scenario())
    assert env["kind"] == "arena" and env["state_endpoint"] == endpoint
    assert "default-src 'self'" in csp
    assert '<script src="/static/monitor.js">' in page
    assert escaped in (403, 404)
    frames = [unpack_packet(data) for _, data in packets]
    full = [(h, body) for h, body in frames if h.get("frame")]
    # At least 10 updates per second reach the page (issue 5); pace is SEND_INTERVAL_S.
    span = packets[-1][0] - packets[0][0]
    assert len(full) / 2.0 >= 10 and len(packets) <= 2.0 / SEND_INTERVAL_S + 3
    assert span > 1.5
    # Coalescing: the page gets far fewer packets than frames sent, and always a recent one.
    assert len(full) < len(sent_t) / 2
    last, body = full[-1]
    assert last["frame"]["t_s"] >= sent_t[-1] - 0.5
    assert len(body) == config.environment.n_bins
    assert last["monitor"]["bad_frames"] == 1
    xs = {h["frame"]["tracked_xy_cm"][0] for h, _ in full}
    assert len(xs) > 5


# --------------------------------------------------------------------------
# The page in a real browser, on a real demo session


def _wait_http(url: str, timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            with urllib.request.urlopen(url, timeout=1.0) as r:
                if r.status == 200:
                    return
        except OSError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)


CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.mark.timeout(150)
@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed at /usr/bin/chromium "
                    "(apt-get install chromium); the browser test needs it")
def test_page_in_headless_chromium_follows_a_demo_session(tmp_path):
    from playwright.sync_api import sync_playwright

    from rig_adapters.sim.demo import run_demo

    config_path = REPO / "configs" / "round_arena_goal.toml"
    endpoints: list[str] = []
    demo_rc: list[int] = []
    demo = threading.Thread(
        target=lambda: demo_rc.append(run_demo(
            config_path=str(config_path), speed=8.0, log_dir=None, summary_path=str(tmp_path / "summary.json"),
            learn_s=60.0, decode_s=60.0, seed=11, monitor_state_endpoint=endpoints)),
        daemon=True,
    )
    demo.start()
    deadline = time.monotonic() + 20
    while not endpoints:
        assert time.monotonic() < deadline, "the demo did not start"
        time.sleep(0.1)
    http_port = free_port()
    monitor = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(config_path), "--state", endpoints[0],
         "--http-port", str(http_port)],
        cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    url = f"http://127.0.0.1:{http_port}/"
    requested: list[str] = []
    blocked: list[str] = []
    samples: list[dict] = []
    try:
        _wait_http(url + "api/environment", 20)
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            context = browser.new_context(viewport={"width": 1500, "height": 950})

            def guard(route):
                host = urlparse(route.request.url).hostname
                if route.request.url.startswith("data:") or host == "127.0.0.1":
                    route.continue_()
                else:
                    blocked.append(route.request.url)
                    route.abort()

            context.route("**/*", guard)
            page = context.new_page()
            page.on("request", lambda r: requested.append(r.url))
            page.on("websocket", lambda ws: requested.append(ws.url))
            errors: list[str] = []
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(url)
            # Polled with evaluate: the page's CSP forbids eval, which wait_for_function's string form needs.
            ready_by = time.monotonic() + 20
            while not page.evaluate("window.__monitorState.ready"):
                assert time.monotonic() < ready_by, "the page never drew a packet"
                time.sleep(0.1)
            deadline = time.monotonic() + 60
            while time.monotonic() < deadline and demo.is_alive():
                samples.append(page.evaluate("window.__monitorState"))
                decoding = [s for s in samples if s["state"] == "decoding" and s["rolling_error_cm"] is not None]
                # Enough to judge, and for the screenshot an event in the list when one comes soon.
                if len(decoding) >= 12 and decoding[-1]["trace_points"] >= 3 and (
                        decoding[-1]["events_seen"] > 0 or len(decoding) >= 60):
                    break
                time.sleep(0.25)
            roll_text = page.text_content("#fig-err-roll")
            p99_text = page.text_content("#fig-lat-p99")
            page.screenshot(path=str(tmp_path / "monitor.png"))
            browser.close()
    finally:
        monitor.terminate()
        monitor.wait(10)
        demo.join(60)
    if os.environ.get("PLACELOOP_UPDATE_DOCS"):
        # Refresh the README's screenshot only when asked, so test runs leave the tree clean.
        shutil.copyfile(tmp_path / "monitor.png", REPO / "docs" / "monitor.png")

    assert not errors, errors
    assert not blocked, f"the page tried to reach off loopback: {blocked}"
    assert requested and all(urlparse(u).hostname == "127.0.0.1" for u in requested if not u.startswith("data:"))
    decoding = [s for s in samples if s["state"] == "decoding"]
    assert len(decoding) >= 10, f"the page saw too few decoding steps: {[s['state'] for s in samples]}"
    # The posterior, the positions and the error figures change with the data.
    assert len({s["post_argmax"] for s in decoding}) > 2
    assert len({s["post_sum"] for s in decoding}) > 2
    assert len({tuple(s["tracked_xy_cm"] or ()) for s in decoding}) > 5
    assert len({tuple(s["map_xy_cm"] or ()) for s in decoding}) > 2
    assert len({s["error_cm"] for s in decoding}) > 2
    assert decoding[-1]["trace_points"] > decoding[0]["trace_points"]
    assert decoding[-1]["post_len"] == int(np.prod(parse_config(config_path.read_text()).environment.grid_shape))
    assert roll_text.endswith(" cm") and p99_text.endswith(" ms")
    learning = [s for s in samples if s["state"] == "learning"]
    if learning:  # the page may join after learning on a slow machine
        assert all(s["post_kind"] == "occupancy" for s in learning)
        assert decoding[-1]["readiness"].get("n_spatial_units") is not None
