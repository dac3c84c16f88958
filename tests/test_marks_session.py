"""Marked spikes on the wire and through the session pipeline: bad input, learning, decoding, replay.

The sessions here are simulated (invented tetrodes, rig_adapters.sim.marks);
they drive the plumbing, and the one figure of merit (the decoding error) is
a sanity bound only.
"""

import dataclasses
import math

import msgpack
import numpy as np
import pytest
import tomli_w

from decoder.config import parse_config
from decoder.messages import GroupAnnounce, MarkedSpikes, MessageError
from decoder.session.outputs import StepOutput
from decoder.session.pipeline import Pipeline
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.recording import record_simulated_session
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings
from rig_adapters.wire.protocol import ProtocolError, decode, encode

CONFIG = {
    "environment": {"kind": "rectangle", "width_cm": 60.0, "height_cm": 60.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "marks": {"enabled": True},
    "decoder": {"method": "filter", "step_s": 0.02, "prior": "state_space"},
    "sources": {"truth": "truth"},
    "session": {"learn_s": 60.0, "arm_after_fit": True, "cross_validate": False},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [45.0, 45.0], "radius_cm": 10.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 30, "n_grid_cells": 0, "n_nonspatial_cells": 4, "units_per_tetrode": 6,
                   "marks": {"send": "marks"}},
}


def _config(**changes):
    return parse_config(tomli_w.dumps({**CONFIG, **changes}))


def _messages(config, until_s, seed=3):
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    return list(session.messages(until_s=until_s))


@pytest.fixture(scope="module")
def marks_session():
    config = _config()
    return config, _messages(config, 90.0)


def _run(config, messages):
    pipeline = Pipeline(config)
    outputs = []
    for msg in messages:
        outputs.extend(pipeline.on_message(msg))
    return pipeline, outputs


# -- the wire ---------------------------------------------------------------


def test_marks_and_announced_groups_round_trip():
    msg = MarkedSpikes("ephys", 4, np.array([1.0, 1.5]), np.array([3, 7]), np.array([[50, 60, 70, 80], [1, 2, 3, 4]]))
    back = decode(encode(msg))
    np.testing.assert_array_equal(back.marks_uv, msg.marks_uv)
    assert back.marks_uv.dtype == np.float32 and back.group_id.tolist() == [3, 7]
    ann = GroupAnnounce("ephys", 0, [3, 7], [4, 2])
    back = decode(encode(ann))
    assert back.group_ids.tolist() == [3, 7] and back.group_channels.tolist() == [4, 2]


def _marks_map(**over):
    m = {"v": 1, "k": "marks", "src": "ephys", "seq": 1, "t": [0.5, 0.6], "g": [1, 1], "ch": 2, "m": [1.0, 2.0, 3.0, 4.0]}
    m.update(over)
    return msgpack.packb(m)


@pytest.mark.parametrize("over, reason", [
    ({"m": [1.0, float("nan"), 3.0, 4.0]}, "bad_field"),
    ({"m": [1.0, float("inf"), 3.0, 4.0]}, "bad_field"),
    ({"m": [1.0, 2.0, 3.0]}, "length_mismatch"),
    ({"ch": 0}, "bad_field"),
    ({"ch": 65}, "bad_field"),
    ({"g": [1]}, "length_mismatch"),
    ({"t": [0.6, 0.5]}, "bad_time"),
    ({"m": "1234"}, "bad_array"),
    ({"m": [1.0, 2.0, True, 4.0]}, "bad_array"),
])
def test_bad_marks_are_refused_with_a_reason(over, reason):
    with pytest.raises(ProtocolError) as err:
        decode(_marks_map(**over))
    assert err.value.reason == reason


@pytest.mark.parametrize("over, reason", [
    ({"ch": [4]}, "length_mismatch"),
    ({"g": [1, 1]}, "bad_field"),
    ({"ch": [4, 0]}, "bad_field"),
    ({"ch": [4, 65]}, "bad_field"),
    ({"units": [1]}, "unknown_field"),
])
def test_bad_group_announcements_are_refused_with_a_reason(over, reason):
    frame = {"v": 1, "k": "groups", "src": "ephys", "seq": 0, "g": [1, 2], "ch": [4, 4]}
    with pytest.raises(ProtocolError) as err:
        decode(msgpack.packb({**frame, **over}))
    assert err.value.reason == reason
    with pytest.raises(MessageError):
        GroupAnnounce("ephys", 0, [1, 1], [4, 4])


# -- the pipeline -------------------------------------------------------------


def test_marks_only_session_learns_fits_and_decodes(marks_session):
    config, messages = marks_session
    pipeline, outputs = _run(config, messages)
    steps = [o for o in outputs if isinstance(o, StepOutput)]
    assert pipeline.state == "decoding" and pipeline.steps.n_units == 0 and len(steps) > 1000
    errors = np.array([s.error_cm for s in steps])
    # Sanity bound on invented data: far better than chance in a 60 cm arena (~25 cm).
    assert np.nanmedian(errors) < 12.0
    marks = pipeline.readiness["marks"]
    assert {g["group"] for g in marks["groups"]} == set(pipeline.marks.channels)
    assert all(g["kept"] > 0 for g in marks["groups"])
    # The filter was calibrated on held-out learning steps decoded from their marks (PlaceModel.calibrate):
    # temperature, point estimate and drift are the fit's, and the readiness figures show its held-out error.
    fit = pipeline.model.temperature_fits_[config.decoder.step_s]
    figures = pipeline.readiness["filter"]
    assert fit.with_marks and figures["held_out_with_marks"] and fit.n_steps > 1000
    decoder = pipeline.steps.decoder
    assert (decoder.likelihood_temperature, decoder.point_estimate) == (fit.temperature, fit.point_estimate)
    assert marks["held_out_median_cm"] == min(fit.map_median_cm, fit.mean_median_cm) < 12.0
    # Source: the HPD coverage of a calibrated posterior is its regions' mass (common practice); the fit
    # widens an overconfident marks likelihood (coverage at T = 1 below the mass) to within a few steps of it.
    assert fit.coverage_at_1 < fit.region_mass and fit.temperature > 1.0
    assert abs(fit.coverage - fit.region_mass) < 0.02


def test_same_messages_give_the_same_digest(marks_session):
    config, messages = marks_session
    assert _run(config, messages)[0].digest == _run(config, messages)[0].digest


def test_replay_of_a_recorded_clusterless_session_matches_the_pipeline(tmp_path):
    config = _config()
    log = record_simulated_session(config, tmp_path / "log", until_s=75.0, seed=5)
    replayed = replay_session(log)
    direct, _ = _run(config, [decode(encode(m)) for m in _messages(config, 75.0, seed=5)])
    assert replayed.summary["decode"]["digest"] == direct.digest
    assert replayed.summary["decode"]["steps"] > 500


def test_bad_marks_are_counted_and_never_crash_or_trigger(marks_session):
    config, messages = marks_session
    pipeline, _ = _run(config, messages)
    t = pipeline.watermark.t_s
    events_before = pipeline.counters["events"]
    seq = max(m.seq for m in messages if m.source == "ephys") + 1
    bad = [
        MarkedSpikes("ephys", seq, np.array([t + 0.001]), np.array([999]), np.ones((1, 4)) * 80),       # unknown group
        MarkedSpikes("ephys", seq + 1, np.array([t + 0.002]), np.array([1]), np.ones((1, 3)) * 80),     # wrong width
        GroupAnnounce("ephys", seq + 2, [1], [2]),                                                      # group changes
        MarkedSpikes("ephys", seq + 3, np.array([t + 0.003]), np.array([1]), np.ones((1, 2)) * 80),     # its new width
    ]
    for msg in bad:
        pipeline.on_message(msg)
    c = pipeline.counters
    assert c["mark_unknown_group"] == 1
    assert c["mark_wrong_width"] == 2
    assert c["mark_group_changed"] == 1
    assert pipeline.marks.channels[1] == 4
    # A hostile burst: one group firing far beyond its ceiling is held back by the artefact guard.
    burst_t = t + 0.01 + np.arange(2000) * 1e-6
    pipeline.on_message(MarkedSpikes("ephys", seq + 4, burst_t, np.ones(2000, np.int64), np.full((2000, 4), 300.0)))
    assert c["mark_artefact_spikes"] > 1900
    assert c["events"] == events_before or pipeline.bank.armed
    assert pipeline.state == "decoding"


def test_a_session_without_the_marks_table_ignores_marks_but_follows_their_clock(marks_session):
    config, messages = marks_session
    plain = dataclasses.replace(config, marks=dataclasses.replace(config.marks, enabled=False))
    pipeline, outputs = _run(plain, messages[:2000])
    assert pipeline.marks is None
    assert pipeline.watermark.t_s > 5.0  # the marks alone moved the spike clock (no heartbeats are dropped here)


def test_sorted_units_and_marks_together_are_calibrated_together():
    config = _config(simulation={**CONFIG["simulation"], "marks": {"send": "both"}})
    pipeline, outputs = _run(config, _messages(config, 75.0))
    assert pipeline.state == "decoding" and pipeline.steps.n_units > 0 and pipeline.steps.marks is not None
    fit = pipeline.model.temperature_fits_[config.decoder.step_s]
    # One fit over the units' counts and the marks' terms, which the filter tempers alike.
    assert fit.with_marks and pipeline.steps.decoder.likelihood_temperature == fit.temperature
    assert math.isfinite(pipeline.readiness["marks"]["held_out_median_cm"])
    errors = np.array([o.error_cm for o in outputs if isinstance(o, StepOutput)])
    # Sanity bound on invented data, as above.
    assert np.nanmedian(errors) < 12.0


def test_marks_enabled_but_no_groups_announced_decodes_the_sorted_units():
    config = _config(simulation={**CONFIG["simulation"], "marks": {}})   # a rig of sorted units only
    pipeline, outputs = _run(config, _messages(config, 70.0))
    assert pipeline.state == "decoding" and pipeline.steps.n_units > 0 and pipeline.steps.marks is None
    assert "marks" not in pipeline.readiness


def test_the_session_model_file_holds_the_mark_model_and_a_loaded_one_decodes_the_marks(marks_session, tmp_path):
    from decoder.encoding.place_model import PlaceModel

    config, messages = marks_session
    pipeline, _ = _run(config, messages)
    fitted = pipeline.model.mark_model_
    assert fitted is pipeline.marks.decoding
    pipeline.model.save(tmp_path / "model.npz")
    loaded = PlaceModel.load(tmp_path / "model.npz")
    marks = loaded.mark_model_
    # The round trip: the same learned spikes, folds and fit (fitted again on the saved occupancy and bins).
    for name in ("enc_marks_", "enc_bins_", "enc_weights_", "ground_rate_hz_", "bin_scale_", "group_scale_"):
        np.testing.assert_array_equal(getattr(marks, name), getattr(fitted, name))
    for g in range(fitted.n_groups):
        np.testing.assert_array_equal(marks._folds[g], fitted._folds[g])
    step_s = config.decoder.step_s
    assert loaded.temperature_fits_[step_s] == pipeline.model.temperature_fits_[step_s]
    # A session that starts from the file decodes the marks with the fit made with them (no held-out spikes
    # are in the file, so it is not fitted again).
    again = Pipeline(config, loaded)
    assert again.steps.marks is not None and again.steps.decoder.likelihood_temperature == \
        pipeline.steps.decoder.likelihood_temperature
    start = next(i for i, m in enumerate(messages) if getattr(m, "t_s", None) is not None and np.size(m.t_s)
                 and np.max(m.t_s) > 75.0)
    announced = [m for m in messages[:start] if isinstance(m, GroupAnnounce)]
    steps = [o for m in announced + messages[start:] for o in again.on_message(m) if isinstance(o, StepOutput)]
    assert len(steps) > 300
    # Sanity bound on invented data, as above.
    assert np.nanmedian([s.error_cm for s in steps]) < 12.0
    # A file without a mark model (a session of sorted units) has none.
    plain = dataclasses.replace(config, marks=dataclasses.replace(config.marks, enabled=False))
    assert Pipeline(plain, loaded).steps.marks is None
