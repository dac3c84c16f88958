"""The session report (rig_adapters.offline.report, placeloop report).

The sessions are the simulated rig's (invented data). What is checked: the
HTML is one self-contained file (every section, every image a valid PNG,
nothing fetched from off the page, even in a real browser with the network
blocked), its figures are the replay's, the rate-map figures follow the
published Skaggs formula, the live run's latency stamps are read per stage,
a damaged log is reported up to the damage, and a sweep adds its trade-off.
"""

import base64
import dataclasses
import html
import io
import json
import re
import shutil
import subprocess
import sys
import time
import tomllib
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlparse

import numpy as np
import pytest
import tomli_w
from PIL import Image

from decoder.config import parse_config
from decoder.session.outputs import StepOutput
from decoder.session.pipeline import Pipeline
from rig_adapters.offline import report, report_data
from rig_adapters.wire import protocol
from rig_adapters.wire.ingest import CHANNEL_EVENTS, CHANNEL_RIG, Ingest
from rig_adapters.sessions.recorder import SessionRecorder, iter_records, read_log
from rig_adapters.sessions.recorder import CONFIG_SIDECAR
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.recording import record_simulated_session
from rig_adapters.offline.report import build_parser, main, write_report

pytestmark = pytest.mark.timeout(120)

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking"]

SECTIONS = ["summary", "trajectory", "error", "events", "latency", "rate-maps", "settings"]

#: The 8-byte signature every PNG file starts with (PNG specification, W3C/ISO 15948, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

#: Elements without an end tag (HTML Living Standard, "void elements").
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class _Page(HTMLParser):
    """What the tests read from a report: sections, images, figures, and whether tags balance."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.images: list[dict] = []
        self.figures: dict[str, object] = {}
        self.bits: dict[int, float] = {}
        self.stack: list[str] = []
        self.unbalanced: list[str] = []
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "img":
            self.images.append(a)
        if "data-figure" in a:
            self.figures[a["data-figure"]] = json.loads(a["data-value"])
        if "data-bits" in a:
            self.bits[int(a["data-unit"])] = float(a["data-bits"])
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if self.stack and self.stack[-1] == tag:
            self.stack.pop()
        else:
            self.unbalanced.append(tag)


def _config_doc() -> dict:
    return {
        "environment": {"kind": "rectangle", "width_cm": 60.0, "height_cm": 60.0, "bin_cm": 4.0},
        "model": {"cv_folds": 2, "cv_block_s": 10.0},
        "decoder": {"window_s": 0.25, "step_s": 0.025},
        "sources": {"truth": "truth"},
        "session": {"learn_s": 60.0, "arm_after_fit": True, "cross_validate": False},
        "safety": {"refractory_s": 2.0},
        "zones": [{"kind": "circle", "name": "goal", "center_cm": [40.0, 40.0], "radius_cm": 10.0}],
        "rules": [{"name": "reward", "zone": "goal", "min_mass": 0.6, "consecutive_steps": 3}],
        "simulation": {"n_place_cells": 30, "n_grid_cells": 0, "n_nonspatial_cells": 2},
    }


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """A 100-s simulated session (60 s learning, then armed), its report and its replay summary."""
    tmp = tmp_path_factory.mktemp("report")
    config = parse_config(tomli_w.dumps(_config_doc()))
    log_dir = record_simulated_session(config, tmp / "session", until_s=100.0, seed=4)
    out = tmp / "report.html"
    record = write_report(log_dir, out)
    # An independent replay; its outputs also feed a trace with small caps, to see the thinning at work.
    steps, events = [], []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(report_data, "TRACE_SAMPLES", 100)
        mp.setattr(report_data, "MAX_EVENT_PANELS", 4)
        mp.setattr(report_data, "EXCERPT_S", 10.0)
        small = report.SessionTrace()

        def on_output(out):
            small.add(out)
            if isinstance(out, StepOutput):
                steps.append(out.t_s)
                events.extend(ev.event_id for ev in out.events)

        replay = replay_session(log_dir, on_output=on_output).summary
        small_html = report.render_report(dataclasses.replace(record, trace=small))
    return {"log_dir": log_dir, "record": record, "html": out.read_text(), "path": out, "replay": replay, "tmp": tmp,
            "small": small, "small_html": small_html, "steps": steps, "events": events}


def test_every_section_is_there_and_the_page_is_well_formed(session):
    page = _Page(session["html"])
    assert [i for i in page.ids if i in SECTIONS] == SECTIONS
    assert "damage" not in page.ids and "trade-off" not in page.ids
    # Every element but the void ones is closed, in order (HTML Living Standard, tree construction).
    assert page.stack == [] and page.unbalanced == []
    # One figure each for trajectory, error, events, latency and rate maps.
    assert len(page.images) == 5
    assert all(img.get("alt") for img in page.images)
    # The cautions go with the output (common practice for software that drives reward and stimulation).
    assert "no hardware interlock" in session["html"] and "animal-use protocol" in session["html"]
    # The settings say which method decoded (the config names none: the default, the filter).
    assert "method filter: bins of 0.025 s" in session["html"]


def test_every_image_is_an_inline_png_that_decodes(session):
    for img in _Page(session["html"]).images:
        head, _, data = img["src"].partition(",")
        assert head == "data:image/png;base64"
        raw = base64.b64decode(data, validate=True)
        assert raw[:8] == PNG_SIGNATURE  # PNG specification, section 5.2
        with Image.open(io.BytesIO(raw)) as im:  # Pillow, an independent PNG decoder
            im.verify()
        with Image.open(io.BytesIO(raw)) as im:
            assert im.format == "PNG" and min(im.size) > 100


def test_nothing_is_fetched_from_off_the_page(session):
    text = session["html"]
    assert not re.search(r"https?://", text)
    # Every src/href is an inline data: URI or a link inside the page.
    refs = re.findall(r"""\b(?:src|href)\s*=\s*["']?([^"'\s>]*)""", text, flags=re.IGNORECASE)
    assert refs and all(r.startswith("data:") or r.startswith("#") for r in refs)
    assert not re.search(r"<script|<link|@import|url\(", text, flags=re.IGNORECASE)
    # A few MB at most for a 30-minute session; figures here are bounded in size, not in session length.
    assert len(text) < 2_000_000


def test_the_header_figures_are_the_replays(session):
    figures = _Page(session["html"]).figures
    replay = session["replay"]
    checked = 0
    for key, value in figures.items():
        top = key.split(".")[0]
        if top in ("decode", "triggers", "behaviour", "session", "input"):
            expected = replay
            for part in key.split("."):
                expected = expected[part]
            # The replay is deterministic: the same log through the same pipeline gives the same figures.
            assert value == (None if expected is None else pytest.approx(expected, rel=1e-12)), key
            checked += 1
    assert checked >= 15
    assert figures["decode.steps"] == replay["decode"]["steps"] > 1000
    assert figures["triggers.count"] == replay["triggers"]["count"] > 0
    assert session["record"].summary["decode"]["digest"] == replay["decode"]["digest"]
    # Percentiles of the entry-to-event latencies, recomputed with numpy as the reference.
    lat = session["record"].behaviour_latency_ms
    assert lat.size == replay["behaviour"]["hits"]
    assert figures["replay.entry_to_event_ms.p50"] == pytest.approx(np.percentile(lat, 50), rel=1e-12)
    assert figures["replay.decode_per_step_ms.n"] == replay["decode"]["steps"]
    # Steps end at multiples of step_s; the decoded span is (steps - 1) steps long.
    step_s = _config_doc()["decoder"]["step_s"]
    assert figures["report.decoded_s"] == pytest.approx((replay["decode"]["steps"] - 1) * step_s, rel=1e-9)


def test_a_long_session_is_thinned_to_evenly_spaced_steps_and_events(session):
    small, steps, events = session["small"], session["steps"], session["events"]
    assert len(steps) == session["replay"]["decode"]["steps"]
    # Every stride-th step and event is kept, the stride doubling until no more than the cap remain.
    kept = [row[0] for row in small.steps.items]
    assert small.steps.stride == 16 and kept == steps[::16] and len(kept) <= 100
    assert [ev.event_id for ev in small.events.items] == events[:: small.events.stride]
    assert 2 <= len(small.events.items) <= 4 and len(small.event_times_s) == len(events)
    # The first 10 s of decoding are kept step by step, and drawn as an excerpt below the whole session.
    assert [row[0] for row in small.excerpt] == [t for t in steps if t - steps[0] <= 10.0]
    text = session["small_html"]
    assert f"{len(kept)} of {len(steps)} decoded steps drawn" in text
    assert f"{len(small.events.items)} of {len(events)} events shown" in text
    trajectory = [img for img in _Page(text).images if img["alt"].startswith("tracked")][0]
    with Image.open(io.BytesIO(base64.b64decode(trajectory["src"].partition(",")[2]))) as im:
        # Two views of x and y, one above the other: taller than wide (the whole session alone is wider).
        assert im.size[1] > im.size[0]


def test_rate_maps_are_ranked_by_skaggs_information(session):
    model = session["record"].model
    bits = _Page(session["html"]).bits
    assert len(bits) == len(model.unit_ids_) == 32
    # Skaggs, McNaughton, Gothard & Markus (1993), NIPS 5: I = sum_i p_i (r_i / r) log2(r_i / r),
    # p_i the occupancy probability of a visited bin, r = sum_i p_i r_i; written out here independently.
    p = np.where(model.visited_mask_, model.occupancy_s_, 0.0)
    p = p / p.sum()
    for row, unit in enumerate(model.unit_ids_):
        r_i = model.rate_maps_hz_[row]
        r = np.sum(p * r_i)
        inside = (p > 0) & (r_i > 0)
        expected = np.sum(p[inside] * (r_i[inside] / r) * np.log2(r_i[inside] / r))
        assert bits[int(unit)] == pytest.approx(expected, rel=1e-9)
    shown = list(bits.values())
    assert shown == sorted(shown, reverse=True)


def test_a_linear_track_session_is_drawn_along_the_track(tmp_path):
    doc = tomllib.loads((ROOT / "configs" / "linear_track_2m.toml").read_text())
    doc["session"] = {"learn_s": 50.0, "arm_after_fit": True, "cross_validate": False}
    doc["simulation"].update(n_place_cells=30, n_grid_cells=0, n_nonspatial_cells=2)
    log_dir = record_simulated_session(parse_config(tomli_w.dumps(doc)), tmp_path / "track", until_s=80.0, seed=3)
    record = write_report(log_dir, tmp_path / "track.html")
    page = _Page((tmp_path / "track.html").read_text())
    assert [i for i in page.ids if i in SECTIONS] == SECTIONS and page.stack == []
    assert record.summary["triggers"]["count"] > 0 and record.model is not None
    assert len(page.images) == 5
    for img in page.images:
        with Image.open(io.BytesIO(base64.b64decode(img["src"].partition(",")[2]))) as im:
            im.verify()  # Pillow, an independent PNG decoder


def _rerecord_with_live_events(log_dir: Path, out_dir: Path) -> list[tuple[float, float, float]]:
    """Record a session the way the live loop does: each input on receipt, each event as sent, wall stamps taken now.

    The inputs are the simulated session's bytes; the pipeline, the event
    encoder and the recorder are the real ones, without the sockets.
    """
    config = parse_config((log_dir / CONFIG_SIDECAR).read_text())
    pipeline = Pipeline(config)
    ingest = Ingest(pipeline)
    stamps = []
    with SessionRecorder(out_dir, flush_interval_s=1.0, fsync="never") as recorder:
        recorder.write_sidecar(CONFIG_SIDECAR, config.source_text.encode())
        for record in iter_records(log_dir):
            if record.type != "input" or record.channel != CHANNEL_RIG:
                continue
            received = time.time()
            recorder.record_input(record.payload, received, CHANNEL_RIG)
            outputs = ingest.rig_bytes(record.payload)
            decoded = time.time()
            for out in outputs:
                if not isinstance(out, StepOutput):
                    continue
                for event in out.events:
                    payload = protocol.encode_event(
                        source="placeloop", seq=len(stamps), event_id=event.event_id, zone=event.zone,
                        rule=event.rule, t_s=out.t_s, map_xy_cm=out.step.map_xy_cm,
                        mean_xy_cm=out.step.mean_xy_cm, zone_mass=float(event.zone_mass),
                        tracked_xy_cm=out.tracked_xy_cm, wall_received_s=received, wall_decoded_s=decoded,
                    )
                    sent = protocol.decode_output(payload)["wall_sent_s"]
                    recorder.record_output(payload, sent, CHANNEL_EVENTS)
                    stamps.append((received, decoded, sent))
            recorder.maybe_flush(decoded)
    return stamps


def test_the_live_runs_own_stamps_give_the_latency_per_stage(session, tmp_path):
    live_dir = tmp_path / "live"
    stamps = np.array(_rerecord_with_live_events(session["log_dir"], live_dir))
    record = write_report(live_dir, tmp_path / "live.html")
    figures = _Page((tmp_path / "live.html").read_text()).figures
    # The same inputs through the same pipeline: as many events sent as the replay makes.
    assert figures["live.events"] == figures["triggers.count"] == session["replay"]["triggers"]["count"]
    ms = np.diff(stamps, axis=1) * 1e3
    # Stamps are taken in the order receipt, decoded, sent (how the loop stamps them; common practice).
    assert np.all(ms >= 0)
    # Percentiles recomputed with numpy as the reference.
    assert figures["live.received_to_decoded_ms.p50"] == pytest.approx(np.percentile(ms[:, 0], 50), rel=1e-9)
    assert figures["live.decoded_to_sent_ms.max"] == pytest.approx(ms[:, 1].max(), rel=1e-9)
    assert figures["live.received_to_sent_ms.p99"] == pytest.approx(
        np.percentile(ms.sum(axis=1), 99), rel=1e-9, abs=1e-9)
    assert record.live.unreadable == 0


def _sweep_doc() -> dict:
    """A small sweep result written by hand in the layout ``placeloop sweep --json`` documents (invented figures)."""
    settings = [{"decoder.step_s": step, "rules.min_mass": mass} for step in (0.02, 0.05) for mass in (0.5, 0.7)]
    rows = [{
        "setting": setting,
        "figures": {"steps": 1600, "entries": 6, "hits": 6 - i, "misses": i, "false_events": false,
                    "triggers": 10 - i, "median_error_cm": 4.0 + i, "added_latency_p50_ms": 0.2 + 0.1 * i,
                    "added_latency_p99_ms": 2.0 + 0.5 * i, "behaviour_latency_p50_ms": behaviour_ms,
                    "wall_s": 3.0, "digests": ["ab" * 32], "sessions": 1, "failed": 0, "damaged": 0},
        # The first setting is at least as good as the last on every figure: the last is off the front.
        "front": i != 3,
    } for i, (setting, false, behaviour_ms) in enumerate(zip(settings, (3, 2, 1, 3), (300.0, 260.0, 220.0, 320.0)))]
    return {"settings": settings, "swept": {"decoder.step_s": [0.02, 0.05], "rules.min_mass": [0.5, 0.7]},
            "fixed": {}, "sessions": ["/data/session"], "latency_grain_ms": 0.1, "rows": rows, "tasks": [],
            "front_figures": ["median_error_cm", "added_latency_p50_ms", "behaviour_latency_p50_ms", "misses",
                              "false_events"],
            "runner": "local", "workers": 2, "wall_s": 12.0}


@pytest.fixture(scope="module")
def damaged_with_sweep(session):
    """``placeloop report`` in its own process, on the session cut at 80 % of its bytes, with a sweep."""
    tmp = session["tmp"]
    damaged = tmp / "damaged"
    damaged.mkdir()
    data = (session["log_dir"] / "session.plog").read_bytes()
    (damaged / "session.plog").write_bytes(data[: int(len(data) * 0.8)])
    shutil.copy(session["log_dir"] / CONFIG_SIDECAR, damaged / CONFIG_SIDECAR)
    sweep = tmp / "sweep.json"
    sweep.write_text(json.dumps(_sweep_doc()))
    out = tmp / "damaged.html"
    proc = subprocess.run(
        [sys.executable, "-m", "rig_adapters.cli", "report", str(damaged), "--sweep", str(sweep), "--out", str(out)],
        cwd=ROOT, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    return {"log_dir": damaged, "proc": proc, "path": out, "html": out.read_text()}


def test_a_truncated_log_is_reported_up_to_the_damage(session, damaged_with_sweep):
    text = damaged_with_sweep["html"]
    page = _Page(text)
    # The recorder's own reader says where the log stops; the report repeats it first, before any figure.
    damage = read_log(damaged_with_sweep["log_dir"]).damage
    assert damage and "byte" in damage
    assert page.ids.index("damage") < page.ids.index("summary")
    banner = text[text.index('id="damage"'): text.index('id="summary"')]
    assert html.escape(damage) in banner
    assert "warning: the log is incomplete or damaged" in damaged_with_sweep["proc"].stderr
    assert 0 < page.figures["decode.steps"] < session["replay"]["decode"]["steps"]
    # The last decoded step named in the banner is the last one the report covers.
    last_s = float(re.search(r"decoded up to data time ([0-9.]+) s", banner).group(1))
    first_s = session["record"].trace.first_step_s  # the same bytes up to the damage: the same first step
    assert last_s == pytest.approx(first_s + page.figures["report.decoded_s"], abs=1e-3)


def test_the_cli_adds_the_trade_off_of_a_sweep(damaged_with_sweep):
    text = damaged_with_sweep["html"]
    page = _Page(text)
    assert [i for i in page.ids if i in SECTIONS + ["trade-off"]] == SECTIONS[:-1] + ["trade-off", "settings"]
    assert len(page.images) == 6
    section = text.split('id="trade-off"')[1].split("</section>")[0]
    assert "3 on the trade-off front" in section and "decoder.step_s" in section
    assert page.stack == [] and page.unbalanced == []


def test_bad_input_says_what_is_wrong(session, tmp_path, capsys):
    log_dir = str(session["log_dir"])
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"rows": [{"setting": {}}]}))
    assert main([log_dir, "--sweep", str(bad), "--out", str(tmp_path / "x.html")]) == 2
    assert "row 0 has no 'figures'" in capsys.readouterr().err
    assert main([log_dir, "--set", "decoder.stride_s=0.01", "--out", str(tmp_path / "x.html")]) == 2
    assert "stride_s" in capsys.readouterr().err
    other = tmp_path / "other"
    other.mkdir()
    shutil.copy(session["log_dir"] / CONFIG_SIDECAR, other / CONFIG_SIDECAR)
    (other / "session.plog").write_bytes(b"this is not a session log at all")
    assert main([str(other), "--out", str(tmp_path / "x.html")]) == 2
    assert "error:" in capsys.readouterr().err
    assert not (tmp_path / "x.html").exists()
    assert "hardware interlock" in build_parser().format_help()


@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed at /usr/bin/chromium "
                    "(apt-get install chromium); the browser test needs it")
def test_the_report_opens_in_a_browser_with_the_network_blocked(damaged_with_sweep):
    from playwright.sync_api import sync_playwright

    # The report with the sweep holds every kind of figure a report can hold.
    path = damaged_with_sweep["path"]
    blocked = []
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            context = browser.new_context()

            def guard(route):
                url = route.request.url
                if url.startswith("data:") or (urlparse(url).scheme == "file" and url.endswith(path.name)):
                    route.continue_()
                else:
                    blocked.append(url)
                    route.abort()

            context.route("**/*", guard)
            page = context.new_page()
            page.goto(path.as_uri())
            widths = page.eval_on_selector_all("img", "els => els.map(e => e.complete ? e.naturalWidth : 0)")
        finally:
            browser.close()
    assert blocked == []
    assert len(widths) == 6 and min(widths) > 100


def test_ripple_events_and_their_decided_content_are_a_table_only_when_there_are_any(session):
    record = session["record"]
    assert "replay-content" not in _Page(session["html"]).ids
    # Events as RippleStream.status() lists them (tests/test_ripple_content_pipeline.py runs the real ones).
    summary = {**record.summary, "ripples": {"events": [
        {"onset_s": 312.25, "duration_ms": 64.0, "decided": ["towards_left"], "decision_ms": 33.0},
        {"onset_s": 318.5, "duration_ms": 41.0, "decided": [], "decision_ms": None}]}}
    html_text = report.render_report(dataclasses.replace(record, summary=summary))
    page = _Page(html_text)
    assert "replay-content" in page.ids and page.stack == [] and page.unbalanced == []
    assert "towards_left" in html_text and "<td>none</td>" in html_text
