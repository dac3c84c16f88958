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
from rig_adapters.monitor.marks import COLOUR_MAP, MARKS, colour_map_hex, marks_payload
from rig_adapters.monitor.server import (
    SEND_INTERVAL_S,
    create_app,
    is_loopback_host,
    main,
)
from rig_adapters.monitor.session_view import (
    LATENCY_EDGES_MS,
    READY_MIN_COVERAGE,
    READY_MIN_TUNED_UNITS,
    ROLLING_ERROR_S,
    SessionView,
    environment_payload,
    pack_packet,
    quantise_posterior,
    readiness_verdict,
    unpack_packet,
)
from rig_adapters.wire import protocol

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


def event_frame(seq: int, t_s: float, rule="reward_goal", zone="goal", mass=0.93, xy=(70.0, 60.0)) -> bytes:
    """One invented event frame as the loop publishes it on the events stream (PROTOCOL.md section 8)."""
    nan2 = [math.nan, math.nan]
    return protocol.encode_event(
        source="placeloop", seq=seq, event_id=seq + 1, zone=zone, rule=rule, t_s=t_s,
        map_xy_cm=list(xy) if zone else nan2, mean_xy_cm=list(xy) if zone else nan2, zone_mass=mass,
        tracked_xy_cm=list(xy), wall_received_s=0.0, wall_decoded_s=0.0)


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
        if abs(t - 1.5) < 1e-9:
            view.add_event_bytes(event_frame(0, float(t)), 0.0)
        view.add_bytes(state_frame(config, seq, float(t), error_cm=2.0, events_total=int(t >= 1.5)), 0.0)
        seq += 1
    page_a, page_b = {}, {}
    first, _ = unpack_packet(view.packet(page_a, 0.0))
    assert [e["id"] for e in first["events"]] == [1]
    n_trace = len(first["trace"])
    assert n_trace == 2
    again, _ = unpack_packet(view.packet(page_a, 0.0))
    assert again["events"] == [] and again["trace"] == [] and again["trace_from"] == n_trace
    late, _ = unpack_packet(view.packet(page_b, 0.0))  # a page that joins late gets the whole history
    assert len(late["trace"]) == n_trace and [e["id"] for e in late["events"]] == [1]


def test_event_list_names_the_rule_zone_and_mass_that_fired_and_ripples_apart():
    # The event record on the events stream (PROTOCOL.md section 8) is what the list shows: the rule
    # and zone that fired and the mass that made it fire, not the zone with the highest mass now.
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    view.add_event_bytes(event_frame(0, 4.0, rule="reward_goal", zone="goal", mass=0.91), 0.0)
    view.add_event_bytes(event_frame(1, 5.0, rule="ripple_stim", zone="", mass=math.nan), 0.0)
    view.add_event_bytes(state_frame(config, 0, 5.0), 0.0)  # a state frame on the events stream: counted bad
    header, _ = unpack_packet(view.packet({}, 0.0))
    goal, ripple = header["events"]
    assert (goal["rule"], goal["zone"], goal["mass"], goal["ripple"]) == ("reward_goal", "goal", pytest.approx(0.91),
                                                                         False)
    # A ripple rule's event carries an empty zone and a NaN mass (PROTOCOL.md section 8).
    assert (ripple["rule"], ripple["zone"], ripple["mass"], ripple["ripple"]) == ("ripple_stim", None, None, True)
    assert view.bad_reasons == {"unknown_kind": 1}


def test_input_rates_are_per_second_of_data_time():
    # A 50 Hz camera replayed at 4x: the loop counts 200 frames per wall second; per second of data it
    # is 50 (definition of the replay speed: data seconds per wall second).
    config = parse_config(ARENA_TOML)
    view = SessionView(config)
    for i in range(81):
        wall = 0.05 * i
        # The loop refreshes its figures once a wall second; here the latency moves with each refresh.
        view.add_bytes(state_frame(config, i, 10.0 + 4.0 * wall, rate_tracker_hz=200.0, rate_spikes_hz=1200.0,
                                   latency_p50_ms=0.5 + i // 20), wall_s=wall)
    header, _ = unpack_packet(view.packet({}, wall_s=4.0))
    rates = header["frame"]["rates_per_data_s"]
    assert rates["data_speed"] == pytest.approx(4.0)
    assert rates["tracker"] == pytest.approx(50.0) and rates["spikes"] == pytest.approx(300.0)


def test_readiness_verdict_says_why_not():
    ready = readiness_verdict({"coverage": 0.9, "n_spatial_units": 30, "likelihood_temperature": 1.5}, "decoding")
    assert ready == {"ready": True, "reasons": [], "checked": ["coverage", "tuned units", "likelihood temperature"]}
    low = readiness_verdict({"coverage": 0.24, "n_spatial_units": 3}, "decoding")
    assert not low["ready"] and len(low["reasons"]) == 2
    assert "coverage 0.24" in low["reasons"][0] and "learn longer" in low["reasons"][0]
    assert f"fewer than {READY_MIN_TUNED_UNITS}" in low["reasons"][1]
    # The temperature search stops at MAX_TEMPERATURE (decoder/encoding/calibration.py): there the model is
    # still overconfident on held-out spikes.
    hot = readiness_verdict({"coverage": 1.0, "n_spatial_units": 40, "likelihood_temperature": 20.0}, "decoding")
    assert not hot["ready"] and "temperature at its limit" in hot["reasons"][0]
    assert "still learning" in readiness_verdict({}, "learning")["reasons"][0]
    assert READY_MIN_COVERAGE == 0.8


def test_monitor_and_report_share_one_colour_map_and_one_set_of_marks():
    from matplotlib import colormaps

    from rig_adapters.offline import report_figures

    # Reference: matplotlib's cividis table, sampled at 256 levels.
    ref = colormaps["cividis"].resampled(256)
    got = colour_map_hex()
    assert COLOUR_MAP == "cividis" and len(got) == 256
    for i in (0, 100, 255):
        assert got[i] == "".join(f"{round(255 * c):02x}" for c in ref(i)[:3])
    assert report_figures._colour_map_with_grey().name.startswith(COLOUR_MAP)
    assert report_figures.DECODED_COLOUR == MARKS["decoded"]["colour"]
    assert marks_payload()["marks"]["mean"]["shape"] == "cross"


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


def _legend_cross_is_a_cross(page) -> bool:
    """Whether the legend's "cross" has ink on both diagonals and none straight above the centre (a dash has
    ink only on its horizontal line, a plus straight above)."""
    return page.evaluate("""() => {
      const c = document.getElementById("key-mean");
      const d = c.getContext("2d").getImageData(0, 0, c.width, c.height);
      const r = c.width / 16;
      const inked = (x, y) => d.data[(Math.round(y * r) * c.width + Math.round(x * r)) * 4 + 3] > 100;
      return inked(5, 5) && inked(11, 11) && inked(11, 5) && inked(5, 11) && !inked(8, 2) && !inked(2, 8);
    }""")


BROWSER_NEEDED = pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed at "
                                    "/usr/bin/chromium (apt-get install chromium); the browser test needs it")


@pytest.mark.timeout(150)
@BROWSER_NEEDED
def test_page_in_headless_chromium_warns_and_says_what_to_do_next(tmp_path):
    """Invented state frames over a real PUB socket: a stalled input, armed triggers on a failing
    readiness verdict, then silence. The page must say so, and say what to do next."""
    from playwright.sync_api import sync_playwright

    config = parse_config(ARENA_TOML)
    state_port, events_port, http_port = free_port(), free_port(), free_port()
    ctx = zmq.Context()
    pub, events_pub = ctx.socket(zmq.PUB), ctx.socket(zmq.PUB)
    pub.bind(f"tcp://127.0.0.1:{state_port}")
    events_pub.bind(f"tcp://127.0.0.1:{events_port}")
    config_path = tmp_path / "arena.toml"
    stop = threading.Event()

    def publish():
        seq = 0
        while not stop.is_set():
            pub.send(state_frame(config, seq, 0.02 * seq, stalled=1, coverage=0.24, n_spatial_units=5.0,
                                 rate_spikes_hz=0.0, rate_tracker_hz=50.0))
            if seq % 25 == 5:
                events_pub.send(event_frame(seq, 0.02 * seq))
            seq += 1
            time.sleep(0.02)

    config_path.write_text(ARENA_TOML)
    monitor = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(config_path),
         "--state", f"tcp://127.0.0.1:{state_port}", "--events", f"tcp://127.0.0.1:{events_port}",
         "--http-port", str(http_port)], cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    publisher = threading.Thread(target=publish, daemon=True)
    try:
        _wait_http(f"http://127.0.0.1:{http_port}/api/environment", 60)
        publisher.start()
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            page = browser.new_page()
            page.goto(f"http://127.0.0.1:{http_port}/")
            deadline = time.monotonic() + 20
            while not (len(page.evaluate("window.__monitorState.events || []")) and page.is_visible("#stall-next")):
                assert time.monotonic() < deadline, "the page never showed the stall"
                time.sleep(0.2)
            stall_text = page.text_content("#stall-next")
            warning_text = page.text_content("#armed-warning") if page.is_visible("#armed-warning") else ""
            verdict_chip = page.text_content("#chip-verdict")
            armed_chip = page.text_content("#chip-armed")
            event_text = page.text_content("#events li")
            cross = _legend_cross_is_a_cross(page)
            stop.set()
            publisher.join(5)
            deadline = time.monotonic() + 10
            while not page.is_visible("#link-next"):
                assert time.monotonic() < deadline, "the page never noticed the loop had gone silent"
                time.sleep(0.2)
            silent_text = page.text_content("#link-next")
            browser.close()
    finally:
        stop.set()
        monitor.terminate()
        monitor.wait(10)
        pub.close(linger=0)
        events_pub.close(linger=0)
        ctx.term()
    assert stall_text.startswith("Next:") and "placeloop control arm" in stall_text
    assert verdict_chip == "not ready" and armed_chip == "triggers armed"
    assert "coverage 0.24 of bins" in warning_text and "placeloop control disarm" in warning_text
    assert "rule reward_goal · zone goal · mass 0.93" in event_text
    assert cross, "the legend's cross is not drawn as a cross"
    assert "Next:" in silent_text and "placeloop run" in silent_text


@pytest.mark.timeout(240)
@BROWSER_NEEDED
def test_page_in_headless_chromium_follows_a_demo_session(tmp_path, monkeypatch):
    from playwright.sync_api import sync_playwright

    from rig_adapters.sim import demo as demo_module
    from rig_adapters.sim.demo import run_demo

    # The demo picks its loopback ports itself; note them (they stay real ports) to find its events endpoint.
    picked: list[int] = []
    real_free_port = demo_module.free_loopback_port
    monkeypatch.setattr(demo_module, "free_loopback_port", lambda: picked.append(real_free_port()) or picked[-1])
    config_path = REPO / "configs" / "round_arena_goal.toml"
    endpoints: list[str] = []
    demo_rc: list[int] = []
    demo = threading.Thread(
        target=lambda: demo_rc.append(run_demo(
            config_path=str(config_path), speed=4.0, log_dir=None, summary_path=str(tmp_path / "summary.json"),
            learn_s=60.0, decode_s=60.0, seed=11, monitor_state_endpoint=endpoints)),
        daemon=True,
    )
    demo.start()
    deadline = time.monotonic() + 20
    while not endpoints:
        assert time.monotonic() < deadline, "the demo did not start"
        time.sleep(0.1)
    http_port = free_port()
    events_endpoint = f"tcp://127.0.0.1:{picked[1]}"  # the order of demo.run_demo's ports: rig, events, state, control
    assert endpoints[0] == f"tcp://127.0.0.1:{picked[2]}"
    monitor = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(config_path), "--state", endpoints[0],
         "--events", events_endpoint, "--http-port", str(http_port)],
        cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    url = f"http://127.0.0.1:{http_port}/"
    requested: list[str] = []
    blocked: list[str] = []
    samples: list[dict] = []
    try:
        _wait_http(url + "api/environment", 60)  # the monitor imports the core: slow on a loaded machine
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
                # Distinct steps: on a loaded machine the page may show the same step several times.
                if len({s["t_s"] for s in decoding}) >= 12 and decoding[-1]["trace_points"] >= 3 and (
                        decoding[-1]["events_seen"] > 0 or len(decoding) >= 60):
                    break
                time.sleep(0.25)
            roll_text = page.text_content("#fig-err-roll")
            p99_text = page.text_content("#fig-lat-p99")
            tracker_text = page.text_content("#h-rate-tracker")
            coverage_text = page.text_content("#fig-coverage")
            verdict_chip = page.text_content("#chip-verdict")
            verdict_why = page.text_content("#verdict-why")
            warning_shown = page.is_visible("#armed-warning")
            event_items = page.eval_on_selector_all("#events li", "els => els.map(e => e.textContent)")
            cross = _legend_cross_is_a_cross(page)
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
    # Input rates per second of data time: the simulated camera sends 50 frames per data second
    # (rig_adapters/sim/settings.py, tracker_rate_hz), whatever the speed (4x here).
    # The median over the samples: a sample taken as the loop catches up, or as the rig finishes, is off for
    # the one refresh interval it straddles.
    assert tracker_text.endswith(" per s of data")
    tracker_rates = [s["rates"]["tracker"] for s in decoding if s["rates"] and s["rates"]["tracker"] is not None]
    assert tracker_rates and 35.0 <= float(np.median(tracker_rates)) <= 65.0, tracker_rates
    # Coverage as a fraction of bins, as the report gives it (report.py: "coverage at fit (fraction of bins)").
    assert coverage_text.endswith(" of bins") and 0.0 <= float(coverage_text.split()[0]) <= 1.0
    final = decoding[-1]
    assert verdict_chip == ("ready" if final["verdict"]["ready"] else "not ready")
    assert verdict_why.startswith(verdict_chip)
    # The demo arms after its fit whatever the verdict: then the page warns.
    assert warning_shown == (final["armed"] and not final["verdict"]["ready"])
    assert cross, "the legend's cross is not drawn as a cross"
    rule = parse_config(config_path.read_text()).rules[0]
    for text in event_items:
        # Each event names its rule and zone, and the mass that fired it is at least the rule's min_mass.
        assert f"rule {rule.name} · zone {rule.zone} · mass " in text, text
        assert float(text.split("mass ")[1].split()[0]) >= rule.min_mass
    learning = [s for s in samples if s["state"] == "learning"]
    if learning:  # the page may join after learning on a slow machine
        assert all(s["post_kind"] == "occupancy" for s in learning)
        assert decoding[-1]["readiness"].get("n_spatial_units") is not None
