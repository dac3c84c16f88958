"""Replaying recorded sessions (rig_adapters.sessions.replay, placeloop replay).

The sessions are the simulated rig's (invented data). What is checked is the
replay's promise: the same bytes through the same pipeline give the same
steps, events and digest as the live run; damaged logs replay up to the
damage and say where.
"""

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
import tomli_w

from decoder.config import ConfigError, load_config, parse_config, with_overrides
from rig_adapters.sessions.recorder import LogFormatError
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.recording import record_simulated_session

ROOT = Path(__file__).resolve().parent.parent
DEMO_CONFIG = ROOT / "configs" / "round_arena_goal.toml"


@pytest.fixture(scope="module")
def live_session(tmp_path_factory):
    """A real demo: simulated rig, decoder and stand-in as processes over loopback ZeroMQ."""
    tmp = tmp_path_factory.mktemp("demo")
    log_dir = tmp / "session"
    summary = tmp / "summary.json"
    proc = subprocess.run(
        [sys.executable, "-m", "rig_adapters.cli", "demo", "--speed", "12", "--learn-s", "60",
         "--decode-s", "45", "--log", str(log_dir), "--summary", str(summary)],
        cwd=ROOT, capture_output=True, text=True, timeout=240,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    return log_dir, json.loads(summary.read_text())


def test_replay_with_the_recorded_config_reproduces_the_live_run(live_session):
    log_dir, live = live_session
    replay = replay_session(log_dir).summary
    assert live["decode"]["steps"] > 1000
    assert replay["decode"]["digest"] == live["decode"]["digest"]
    assert replay["decode"]["steps"] == live["decode"]["steps"]
    assert replay["triggers"]["count"] == live["triggers"]["count"]
    assert replay["decode"]["median_error_cm"] == live["decode"]["median_error_cm"]
    # Only the live run has a stimulator stand-in, a demo section and an events socket with listeners.
    assert set(live) <= set(replay) | {"standin", "demo", "event_listeners"}


def test_replay_cli_with_other_settings_shows_what_would_have_happened(live_session, tmp_path):
    log_dir, live = live_session
    out = tmp_path / "replay.json"
    proc = subprocess.run(
        [sys.executable, "-m", "rig_adapters.cli", "replay", str(log_dir), "--set", "decoder.step_s=0.01",
         "--summary", str(out)], cwd=ROOT, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    other = json.loads(out.read_text())
    # Half the step, about twice the steps; a different run, a different digest.
    assert abs(other["decode"]["steps"] - 2 * live["decode"]["steps"]) <= 4
    assert other["decode"]["digest"] != live["decode"]["digest"]
    bad = subprocess.run([sys.executable, "-m", "rig_adapters.cli", "replay", str(log_dir), "--set",
                          "decoder.stride_s=0.01"], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "stride_s" in bad.stderr


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    doc = {
        "environment": {"kind": "rectangle", "width_cm": 60.0, "height_cm": 60.0, "bin_cm": 4.0},
        "model": {"cv_folds": 2, "cv_block_s": 10.0},
        "decoder": {"window_s": 0.25, "step_s": 0.025},
        "sources": {"truth": "truth"},
        "session": {"learn_s": 40.0, "arm_after_fit": True, "cross_validate": False},
        "zones": [{"kind": "circle", "name": "goal", "center_cm": [40.0, 40.0], "radius_cm": 10.0}],
        "rules": [{"name": "reward", "zone": "goal", "min_mass": 0.6, "consecutive_steps": 3}],
        "simulation": {"n_place_cells": 30, "n_grid_cells": 0, "n_nonspatial_cells": 2},
    }
    config = parse_config(tomli_w.dumps(doc))
    log_dir = tmp_path_factory.mktemp("rec") / "session"
    record_simulated_session(config, log_dir, until_s=70.0, seed=4)
    return config, log_dir


def test_a_truncated_log_replays_up_to_the_damage_and_says_where(recorded, tmp_path):
    config, log_dir = recorded
    whole = replay_session(log_dir)
    damaged = tmp_path / "damaged"
    damaged.mkdir()
    data = (log_dir / "session.plog").read_bytes()
    (damaged / "session.plog").write_bytes(data[: int(len(data) * 0.8)] + b"\x17\x00")
    (damaged / "config.toml").write_bytes((log_dir / "config.toml").read_bytes())
    part = replay_session(damaged)
    assert part.damage and "byte" in part.damage
    assert not part.clean_close
    assert 0 < part.summary["decode"]["steps"] < whole.summary["decode"]["steps"]


def test_a_file_that_is_not_a_log_or_of_another_version_is_refused(recorded, tmp_path):
    config, log_dir = recorded
    other = tmp_path / "other"
    other.mkdir()
    (other / "config.toml").write_text(config.source_text)
    (other / "session.plog").write_bytes(b"this is not a session log at all")
    with pytest.raises(LogFormatError):
        replay_session(other)
    data = bytearray((log_dir / "session.plog").read_bytes())
    data[8] = 99  # the format version, after the 8 magic bytes (LOG_FORMAT.md)
    (other / "session.plog").write_bytes(bytes(data))
    with pytest.raises(LogFormatError, match="version"):
        replay_session(other)


def test_replaying_twice_is_deterministic_and_overrides_are_validated(recorded):
    config, log_dir = recorded
    a = replay_session(log_dir).summary
    b = replay_session(log_dir).summary
    assert a["decode"]["digest"] == b["decode"]["digest"]
    assert a["behaviour"] == b["behaviour"]
    with pytest.raises(ConfigError, match="min_mass"):
        with_overrides(config, {"rules.min_mass": 1.5})
    assert load_config(log_dir / "config.toml").decoder == config.decoder


def test_heartbeats_from_the_position_sources_change_nothing_decoded(recorded, tmp_path):
    # PROTOCOL.md asks heartbeats of spike sources only; a rig whose tracker sends them
    # anyway must decode to the same steps and events (the digest covers both).
    config, log_dir = recorded
    doc = tomllib.loads(config.source_text)
    doc["simulation"]["position_heartbeats"] = True
    chatty = record_simulated_session(parse_config(tomli_w.dumps(doc)), tmp_path / "chatty", until_s=70.0, seed=4)
    quiet, loud = replay_session(log_dir), replay_session(chatty)
    assert loud.records_read > quiet.records_read
    assert loud.summary["decode"]["digest"] == quiet.summary["decode"]["digest"]
    assert loud.summary["decode"]["steps"] == quiet.summary["decode"]["steps"] > 0
