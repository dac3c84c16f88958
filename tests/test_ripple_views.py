"""The ripple envelope and each candidate event's decoded sequence: on the state stream, on the monitor's page, in the report.

The live part runs one short ripple session of configs/w_maze_ripples.toml
through the simulated rig and a real ``placeloop run`` (real processes, real
ZeroMQ sockets on 127.0.0.1), with the monitor and headless chromium watching
and the session recorded; the report is then written from that recording.
The simulated session is invented data: it checks the plumbing and the
drawing, not the science.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import tomli_w
import tomllib

from decoder.config import load_config
from decoder.session.ripples import ContentEvent
from decoder.signals.envelope_trace import EnvelopeTrace
from decoder.signals.ripple_detector import RippleDetector
from rig_adapters.monitor.session_view import SessionView
from rig_adapters.wire import protocol
from rig_adapters.wire.outputs import RIPPLE_ENVELOPE_MAX, RIPPLE_LOG_ODDS_MAX

REPO = Path(__file__).resolve().parent.parent
CONFIG = REPO / "configs" / "w_maze_ripples.toml"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]


# ---------------------------------------------------------------- the envelope trace


def test_envelope_trace_keeps_the_peak_of_each_step():
    rate_hz, step_s = 1500.0, 0.01
    rng = np.random.default_rng(3)
    z = rng.normal(size=3000)
    trace = EnvelopeTrace(step_s=step_s, keep_s=10.0)
    for start in range(0, z.size, 3):  # 2 ms chunks, as the simulated rig sends them
        trace.add(start / rate_hz, z[start:start + 3], rate_hz)
    t0, values = trace.recent()
    # Reference: numpy's max over whole steps of 15 samples (1500 Hz x 10 ms).
    expected = z.reshape(-1, 15).max(axis=1)
    assert t0 == 0.0 and values.size == expected.size
    np.testing.assert_allclose(values, expected, rtol=1e-6)  # float32 storage


def test_envelope_trace_marks_gaps_and_keeps_only_the_newest():
    trace = EnvelopeTrace(step_s=0.01, keep_s=0.1)
    trace.add(1.0, np.array([1.0, 2.0]), 1000.0)
    trace.add(1.05, np.array([3.0]), 1000.0)  # 40 ms of silence before it
    t0, values = trace.recent()
    assert t0 == pytest.approx(1.0)
    assert values[0] == 2.0 and np.isnan(values[1:5]).all() and values[5] == 3.0
    trace.add(2.0, np.array([4.0]), 1000.0)
    t0, values = trace.recent()
    assert t0 == pytest.approx(1.91) and values.size == 10 and values[-1] == 4.0 and np.isnan(values[:-1]).all()
    assert trace.recent(0.03)[1].size == 3


# ---------------------------------------------------------------- the state frame


def _detector_with_baseline() -> RippleDetector:
    det = RippleDetector(1500.0, 2, warm_up_s=1.0, baseline_window_s=2.0)
    rng = np.random.default_rng(0)
    for i in range(1500):
        det.process(i * 0.002, rng.normal(0.0, 20.0, (3, 2)))
    return det


def _event(onset_s: float, n_bins: int, decided=("towards_goal",)) -> ContentEvent:
    seq = [(onset_s + 0.015 * (k + 1), 3.0 * k, 80.0 - 10.0 * k, k % 3) for k in range(n_bins)]
    return ContentEvent(onset_s, onset_s + 0.015 * n_bins, n_bins, list(decided), onset_s + 0.03, seq,
                        [[2.5], [-math.inf]])


def _state(seq: int, t_s: float, ripples: dict | None) -> bytes:
    return protocol.encode_state(source="placeloop", seq=seq, t_s=t_s, state="decoding", armed=True,
                                 map_xy_cm=[0.0, 0.0], mean_xy_cm=[0.0, 0.0], tracked_xy_cm=[0.0, 0.0],
                                 hpd95_size=1.0, peak_prob=0.1, zone_masses={}, n_spikes=0, ripples=ripples)


def test_ripple_view_round_trips_through_the_state_frame():
    det = _detector_with_baseline()
    events = [_event(1.0 + i, 4) for i in range(12)]
    view = protocol.ripple_view(det, events)
    out = protocol.decode_output(_state(1, 3.0, view))["ripples"]
    assert out["threshold_sd"] == det.threshold_sd and out["end_sd"] == det.end_sd and out["ready"]
    assert out["n_events"] == 12 and len(out["events"]) == 8  # the newest eight
    assert out["events"][-1]["onset_s"] == 12.0
    e = out["events"][-1]
    np.testing.assert_allclose(e["bins"][:, 0], [15.0, 30.0, 45.0, 60.0], atol=1e-3)  # ms after the onset
    np.testing.assert_allclose(e["bins"][:, 1], [0.0, 3.0, 6.0, 9.0])
    assert e["bins"][:, 3].tolist() == [0, 1, 2, 0] and e["decided"] == ["towards_goal"]
    # The deciding log odds, towards then away per zone; an infinite one travels clipped (PROTOCOL.md, section 8).
    assert e["log_odds"].tolist() == [2.5, -RIPPLE_LOG_ODDS_MAX]
    # An event just detected has no bin yet, hence no log odds.
    fresh = protocol.decode_output(_state(1, 3.0, protocol.ripple_view(det, [ContentEvent(2.0)])))["ripples"]
    assert fresh["events"][0]["log_odds"].size == 0
    t0, env = det.trace_.recent(6.0)
    assert out["t0_s"] == t0
    np.testing.assert_array_equal(out["envelope_sd"], env)
    # Without the field the frame is as before: the key is optional.
    assert protocol.decode_output(_state(2, 3.0, None))["ripples"] is None


@pytest.mark.parametrize("bad, reason", [
    ({"threshold_sd": math.nan}, "bad_field"),
    ({"step_s": 0.0}, "bad_field"),
    ({"envelope_sd": np.zeros(RIPPLE_ENVELOPE_MAX + 1, np.float32)}, "bad_field"),
    ({"events": [{"onset_s": 1.0, "bins": [[1.0, 2.0, 3.0]]}]}, "bad_field"),
    ({"events": [{"onset_s": 1.0, "bins": [[1.0, 2.0, 3.0, -1.0]]}]}, "bad_field"),
    ({"events": [{"onset_s": 1.0, "bins": b"\x00" * 6}]}, "bad_array"),
    ({"events": [{"onset_s": 1.0, "decided": [""]}]}, "bad_field"),
    ({"events": [{"onset_s": 1.0, "log_odds": [1.0, 2.0, 3.0]}]}, "bad_field"),
    ({"events": [{"onset_s": 1.0, "log_odds": [1.0, math.inf]}]}, "bad_field"),
    ({"colour": "red"}, "bad_field"),
])
def test_a_bad_ripple_view_is_refused_with_a_reason(bad, reason):
    view = protocol.ripple_view(_detector_with_baseline(), [_event(1.0, 3)]) | bad
    with pytest.raises(protocol.ProtocolError) as err:
        _state(1, 3.0, view)
    assert err.value.reason == reason


def test_a_mangled_ripple_view_raises_only_protocol_errors():
    import copy
    import random

    import msgpack

    from rig_adapters.wire.framing import pack

    base = msgpack.unpackb(_state(1, 3.0, protocol.ripple_view(_detector_with_baseline(), [
        _event(1.0 + i, 3) for i in range(3)])), raw=False)
    rnd = random.Random(2)
    garbage = [None, True, -1, 2**64 - 1, 1e300, -1e300, math.nan, "x", b"\x00" * 5, [], [1.0, "a"], [[1.0]],
               {"on": 1.0}, [{"on": "x"}], list(range(300))]
    accepted = 0
    for _ in range(3000):
        m = copy.deepcopy(base)
        target = m["rip"] if rnd.random() < 0.5 else m["rip"]["ev"][rnd.randrange(3)]
        target[rnd.choice(list(target))] = rnd.choice(garbage)
        try:
            protocol.decode_output(pack(m))
            accepted += 1
        except protocol.ProtocolError as exc:
            assert exc.reason in ("bad_field", "bad_array")
    assert 0 < accepted < 3000  # some substitutions are valid values (NaN offset, empty names), most are not


def test_session_view_merges_events_across_frames_and_linearises_them():
    config = load_config(CONFIG)
    det = _detector_with_baseline()
    view = SessionView(config)
    events: list[ContentEvent] = []
    seq = 0
    for i in range(20):
        events.append(_event(1.0 + 0.5 * i, 3))
        if i % 3 == 2:  # the monitor sees only some frames; each repeats the newest eight events
            seq += 1
            view.add(protocol.decode_output(_state(seq, 2.0 + i, protocol.ripple_view(det, events))), 0.0)
    view.add(protocol.decode_output(_state(seq + 1, 30.0, protocol.ripple_view(det, events))), 0.0)
    assert view.ripple_events_seen == 20
    part = view._ripple_packet()
    assert part["events_seen"] == 20 and part["n_events"] == 20 and len(part["sequences"]) == 6
    last = part["sequences"][-1]
    # Positions along the graph: the environment's own linearisation (decoder.space.track_graphs).
    xy = np.array([row[1:3] for row in events[-1].sequence])
    np.testing.assert_allclose(last["positions"][0], config.environment.linearize(xy), atol=0.01)
    assert last["decided"] == ["towards_goal"] and last["decision_ms"] == pytest.approx(30.0)
    assert last["log_odds"] == [[2.5], [-1000.0]]


# ---------------------------------------------------------------- a live ripple session, watched and recorded


def _free_port() -> int:
    import socket

    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_http(url: str, timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            with urllib.request.urlopen(url, timeout=2):
                return
        except OSError:
            assert time.monotonic() < deadline, f"nothing answered at {url}"
            time.sleep(0.3)


@pytest.fixture(scope="module")
def watched_session(tmp_path_factory):
    """A short live ripple session through real processes, with the monitor's page in headless chromium."""
    if not CHROMIUM.exists():
        pytest.skip("needs Debian's chromium (.ci/run installs it)")
    from playwright.sync_api import sync_playwright

    from rig_adapters.sim.demo import run_demo

    tmp = tmp_path_factory.mktemp("ripple_session")
    log_dir, summary_path = tmp / "log", tmp / "summary.json"
    # The scenario with two content rules in place of its disruption rule (whose events, beneath the same
    # refractory cap, would hold the content rules back), and ripples more often: some events have their content
    # decided, two rules in two colours.
    doc = tomllib.loads(CONFIG.read_text())
    doc["zones"] = [{"kind": "circle", "name": "left_well", "center_cm": [0.0, 80.0], "radius_cm": 20.0}]
    doc["rules"] = [{"name": "towards_left", "kind": "replay_towards", "zone": "left_well", "min_bins": 2},
                     {"name": "away_from_left", "kind": "replay_away", "zone": "left_well", "min_bins": 2}]
    doc["simulation"]["lfp"]["ripple_rate_hz"] = 2.0
    config_path = tmp / "w_maze_content.toml"
    config_path.write_text(tomli_w.dumps(doc))
    endpoints: list[str] = []
    demo_rc: list[int] = []
    # 25 s of learning then 30 s of closed loop: the rat rests at a well at least once after the fit. At the
    # speed of the data, so that a loaded machine's loop keeps up: one that falls behind catches up in a burst
    # of state frames, which the monitor, a slow consumer by design, may lose (PROTOCOL.md, section 8).
    demo = threading.Thread(target=lambda: demo_rc.append(run_demo(
        config_path=str(config_path), speed=1.0, log_dir=str(log_dir), summary_path=str(summary_path), learn_s=25.0,
        decode_s=30.0, seed=5, monitor_state_endpoint=endpoints)), daemon=True)
    demo.start()
    deadline = time.monotonic() + 30
    while not endpoints:
        assert time.monotonic() < deadline, "the demo did not start"
        time.sleep(0.1)
    http_port = _free_port()
    monitor = subprocess.Popen(
        [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(config_path), "--state", endpoints[0],
         "--http-port", str(http_port)], cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    url = f"http://127.0.0.1:{http_port}/"
    errors: list[str] = []
    samples: list[dict] = []
    try:
        _wait_http(url + "api/environment", 60)
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1500, "height": 1400})
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(url)
            deadline = time.monotonic() + 240
            while demo.is_alive() and time.monotonic() < deadline:
                samples.append(page.evaluate("window.__monitorState"))
                time.sleep(0.5)
            time.sleep(1.0)  # the last packets reach the page
            samples.append(page.evaluate("window.__monitorState"))
            page.eval_on_selector("#ripple-panel", "el => el.scrollIntoView()")
            page.screenshot(path=str(tmp / "ripples.png"), full_page=True)
            browser.close()
    finally:
        monitor.terminate()
        monitor.communicate(timeout=10)
        demo.join(120)
    assert demo_rc == [0], "the demo failed"
    (tmp / "samples.json").write_text(json.dumps(samples))
    return {"samples": samples, "errors": errors, "summary": json.loads(summary_path.read_text()),
            "log_dir": log_dir, "tmp": tmp, "config": load_config(config_path)}


def test_the_page_shows_every_candidate_event_of_the_session(watched_session):
    s = watched_session
    assert not s["errors"], s["errors"]
    final = s["samples"][-1]["ripples"]
    assert final is not None, "the page never drew the ripple panel"
    kept = s["summary"]["ripples"]["events"]
    assert len(kept) > 0, "no candidate event in the session: the test saw nothing to show"
    # The panel's count is the summary's list of candidate events (decoder/session/ripples.py, status()).
    assert final["events_seen"] == len(kept) == final["n_events"], (
        [e["onset_s"] for e in kept], [x["ripples"] and x["ripples"]["events_seen"] for x in s["samples"]])
    assert final["count_text"].startswith(f"{len(kept)} candidate event")
    assert final["envelope_points"] > 100 and final["threshold_sd"] > 0
    shown = final["sequences"]
    assert 0 < len(shown) == final["cards_shown"] <= 6
    by_onset = {e["onset_s"]: e for e in kept}
    for e in shown:
        # The onset, bin count and decided content the page draws are the session's own.
        assert e["onset_s"] in by_onset
        assert e["bins"] == by_onset[e["onset_s"]]["n_bins"]
        assert e["decided"] == list(dict.fromkeys(by_onset[e["onset_s"]]["decided"]))


def test_the_report_draws_each_event_sequence_of_the_recorded_session(watched_session):
    from rig_adapters.offline.report import render_report
    from rig_adapters.offline.report_data import event_sequences, gather_session

    s = watched_session
    config = s["config"]
    record = gather_session(s["log_dir"])
    # The replay reproduces the live run's candidate events (the recorded bytes through the same pipeline).
    assert [e.as_dict() for e in record.content_events] == s["summary"]["ripples"]["events"]
    sequences = event_sequences(record.content_events, config.environment, config.zone_names(),
                                config.ripples.content_min_spikes)
    assert sequences and len(sequences) == min(24, sum(1 for e in record.content_events if e.sequence))
    for q, e in zip(sequences, (e for e in record.content_events if e.sequence)):
        assert q.onset_s == e.onset_s and q.bin_ms.size == e.n_bins
        # Positions along the graph are the environment's own linearisation of the MAP (decoder.space.track_graphs).
        xy = np.array([row[1:3] for row in e.sequence])
        np.testing.assert_allclose(q.positions[0], config.environment.linearize(xy))
        ok = q.used & np.isfinite(q.positions[0])
        if ok.sum() >= 2 and np.ptp(q.positions[0, ok]) > 0:
            # Reference: scipy.stats.kendalltau (tau-b, its default variant).
            expected = scipy.stats.kendalltau(q.bin_ms[ok], q.positions[0, ok]).statistic
            assert q.tau_linear == pytest.approx(expected, abs=1e-12)
        # The log odds the report shows are the pipeline's: at the decision, else at the last bin.
        assert set(q.log_odds_zones) == set(config.zone_names())
        assert q.log_odds_zones["left_well"] == pytest.approx(tuple(row[0] for row in e.log_odds), nan_ok=True)
    html = render_report(record)
    section = html[html.index('id="replay-content"'):]
    section = section[:section.index("</section>")]
    assert "<th>log odds (towards_left)</th>" in section
    assert 'alt="decoded sequence of each candidate event" src="data:image/png;base64,' in section
    assert f"The first {len(sequences)} candidate events of the replay" in section


@pytest.mark.parametrize("x, y", [
    ([1, 2, 3, 4, 5], [5, 6, 7, 8, 7]),
    ([1, 2, 3, 4, 5, 6], [3, 3, 1, 2, 2, 9]),     # ties in y
    ([0.1, 0.1, 0.3, 0.4], [2.0, 1.0, 1.0, 5.0]),  # ties in both
    ([1, 2], [2, 1]),
])
def test_kendall_tau_b_matches_scipy(x, y):
    from rig_adapters.offline.report_data import kendall_tau_b

    # Reference: scipy.stats.kendalltau, whose default is tau-b.
    assert kendall_tau_b(np.array(x, float), np.array(y, float)) == pytest.approx(
        scipy.stats.kendalltau(x, y).statistic, abs=1e-12)


def test_kendall_tau_b_is_nan_without_two_distinct_values():
    from rig_adapters.offline.report_data import kendall_tau_b

    assert math.isnan(kendall_tau_b(np.array([1.0]), np.array([2.0])))
    assert math.isnan(kendall_tau_b(np.array([1.0, 2.0, 3.0]), np.array([4.0, 4.0, 4.0])))


# ---------------------------------------------------------------- the live loop's ripple view


def test_the_loop_sends_the_ripple_view_while_learning_and_after_the_fit():
    """Real sockets on 127.0.0.1: the state stream carries the ripple view in learning frames and decoding frames."""
    from decoder.config import parse_config
    from decoder.session.pipeline import Pipeline
    from loop_helpers import loopback_endpoints, open_with_subscriber
    from rig_adapters.live.loop import LiveLoop
    from rig_adapters.sim.settings import SimulationSettings
    from rig_adapters.sim.simulation import SimulatedSession

    doc = tomllib.loads(CONFIG.read_text())
    doc["session"]["learn_s"] = 15.0
    doc["endpoints"] = loopback_endpoints()
    config = parse_config(tomli_w.dumps(doc))
    sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=3)
    loop = LiveLoop(config, Pipeline(config))
    frames = []
    watcher = open_with_subscriber(loop, doc["endpoints"]["state"])
    try:
        for msg in sim.messages(until_s=25.0):
            loop.handle_rig_bytes(protocol.encode(msg), time.time())
            while watcher.poll(0):
                frames.append(protocol.decode_output(watcher.recv()))
            if any(f["state"] == "decoding" and f["ripples"] for f in frames):
                break
    finally:
        watcher.close()
        loop._close_sockets()
    with_view = [f for f in frames if f["ripples"] is not None]
    # The detector runs from the first LFP chunk, so the view comes with the learning frames as well.
    assert any(f["state"] == "learning" for f in with_view), sorted({f["state"] for f in frames})
    assert any(f["state"] == "decoding" for f in with_view)
    assert all(v["ripples"]["threshold_sd"] > 0 for v in with_view)
