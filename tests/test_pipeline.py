"""The session pipeline driven by lists of messages (decoder.session.pipeline).

The simulated session here is invented data; it drives the plumbing (states,
clocks, counters, determinism). The one figure of merit, the decoding error,
is a sanity bound only.
"""

import copy
import dataclasses

import msgpack
import numpy as np
import pytest
import tomli_w

from decoder.config import parse_config
from decoder.encoding.place_model import PlaceModel
from decoder.messages import ControlCommand, Heartbeat, SourceAnnounce, SpikeBatch, TrackerFrames
from decoder.session.outputs import LearningProgress, Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.session.streams import RESYNC_AFTER_MESSAGES
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings

CONFIG = {
    "environment": {"kind": "rectangle", "width_cm": 80.0, "height_cm": 80.0, "bin_cm": 4.0},
    "model": {"cv_folds": 2, "cv_block_s": 20.0},
    "decoder": {"window_s": 0.25, "step_s": 0.025, "prior": "state_space", "random_walk_sd_cm": 4.0},
    "sources": {"truth": "truth"},
    "session": {"learn_s": 120.0, "arm_after_fit": True, "cross_validate": False},
    "safety": {"refractory_s": 3.0, "max_per_minute": 10, "max_per_session": 50, "stall_limit_s": 1.0},
    "zones": [{"kind": "circle", "name": "goal", "center_cm": [60.0, 60.0], "radius_cm": 12.0}],
    "rules": [{"name": "reward", "zone": "goal", "mode": "mass", "min_mass": 0.6, "consecutive_steps": 3}],
    "simulation": {"n_place_cells": 50, "n_grid_cells": 5, "n_nonspatial_cells": 5},
}


def _config(**changes):
    doc = {**CONFIG, **changes}
    return parse_config(tomli_w.dumps(doc))


def _messages(config, until_s, seed=3):
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    return list(session.messages(until_s=until_s))


@pytest.fixture(scope="module")
def session_messages():
    config = _config()
    return config, _messages(config, 160.0)


def _run(config, messages):
    pipeline = Pipeline(config)
    outputs = []
    for msg in messages:
        outputs.extend(pipeline.on_message(msg))
    return pipeline, outputs


def test_plan_learns_fits_arms_and_decodes(session_messages):
    config, messages = session_messages
    pipeline, outputs = _run(config, messages)
    kinds = [o.kind for o in outputs if isinstance(o, Notice)]
    assert kinds[:1] == ["state"] and "fitted" in kinds and "armed" in kinds
    assert any(isinstance(o, LearningProgress) for o in outputs)
    steps = [o for o in outputs if isinstance(o, StepOutput)]
    # 40 s of decoding at 25 ms steps.
    assert abs(len(steps) - 40.0 / 0.025) <= 2
    # Steps end on whole multiples of the step, in order, without gaps.
    ks = np.array([s.k for s in steps])
    assert np.all(np.diff(ks) == 1)
    # Sanity bound on invented cells (fields 15-30 cm, common practice): the
    # median error is a few bins, far below the 80 cm box.
    assert pipeline.errors.percentile(50) < 12.0
    # The tracker ran on its own clock; alignment from sync pulses must have
    # happened for positions to be known at all.
    assert np.isfinite(steps[-1].tracked_xy_cm).all()
    assert pipeline.counters["clock_mismatch"] == 0
    # The readiness report says how much of each zone the learned map covers.
    assert 0.0 <= pipeline.readiness["zone_coverage"]["goal"] <= 1.0


def test_same_messages_give_the_same_digest(session_messages):
    config, messages = session_messages
    first, _ = _run(config, messages)
    second, _ = _run(config, messages)
    assert first.digest == second.digest
    assert first.counters == second.counters


def test_duplicated_and_unknown_inputs_are_counted_not_used(session_messages):
    config, messages = session_messages
    clean, _ = _run(config, messages)
    noisy = list(messages)
    spikes = [i for i, m in enumerate(noisy) if isinstance(m, SpikeBatch) and m.t_s.size and m.t_s[0] > 130]
    # A duplicated spike batch (same seq) must not be counted twice.
    noisy.insert(spikes[0] + 1, noisy[spikes[0]])
    pipeline, _ = _run(config, noisy)
    assert pipeline.counters["stale_messages"] == 1
    assert pipeline.digest == clean.digest
    # Spikes from a unit the model does not know are counted and dropped.
    unknown = SpikeBatch("ephys", 10**9, [150.0001], [999999])
    extra = list(messages)
    # Where the stream is at 150 s: a batch ten seconds late would be refused as a clock set back.
    extra.insert(next(i for i in spikes if messages[i].t_s[0] > 150.0001), unknown)
    pipeline, _ = _run(config, extra)
    assert pipeline.counters["unknown_units"] == 1
    # Its seq jumps by 10**9 and the next batch carries on from before: one bad number, no lost data.
    assert pipeline.health.total_gaps == 0 and pipeline.health.sources["ephys"].resyncs == 1


def test_a_time_jump_is_refused_and_does_not_run_away(session_messages):
    config, messages = session_messages
    bogus = Heartbeat("ephys", 10**8, 1e7)
    cut = next(i for i, m in enumerate(messages) if isinstance(m, Heartbeat) and m.t_s > 140)
    pipeline, outputs = _run(config, messages[:cut] + [bogus] + messages[cut:])
    assert pipeline.counters["time_jumps"] == 1
    assert pipeline.spike_watermark_s < 200


def test_control_commands_drive_the_session_without_a_plan(session_messages):
    _, messages = session_messages
    config = _config(session={"learn_s": 0.0, "cross_validate": False})
    pipeline = Pipeline(config)
    out = pipeline.on_message(ControlCommand("control", 1, "arm"))
    assert out[0].kind == "refused"                     # nothing to decode with yet
    assert pipeline.on_message(ControlCommand("control", 2, "fit"))[0].kind == "refused"
    pipeline.on_message(ControlCommand("control", 3, "start_learning"))
    for msg in messages[: len(messages) * 3 // 4]:
        pipeline.on_message(msg)
    assert pipeline.state == "learning"
    kinds = [o.kind for o in pipeline.on_message(ControlCommand("control", 4, "fit"))]
    assert "fitted" in kinds and pipeline.state == "decoding" and not pipeline.bank.armed
    assert pipeline.on_message(ControlCommand("control", 5, "arm"))[0].kind == "armed"
    pipeline.on_message(ControlCommand("control", 6, "stall", {"stream": "ephys"}))
    assert not pipeline.bank.armed


def test_a_restarted_spike_source_disarms_and_starts_steps_afresh(session_messages):
    config, messages = session_messages
    pipeline, _ = _run(config, messages)
    assert pipeline.bank.armed
    out = pipeline.on_message(SourceAnnounce("ephys", 0, "spikes", "acquisition", 30000.0, [101]))
    assert any(isinstance(o, Notice) and o.kind == "disarmed" for o in out)
    assert not pipeline.bank.armed
    # The restarted clock begins again near zero: steps follow it, none are "late".
    pipeline.on_message(SpikeBatch("ephys", 1, [0.5], [101]))
    out = pipeline.on_message(Heartbeat("ephys", 2, 1.0))
    steps = [o for o in out if isinstance(o, StepOutput)]
    assert steps and steps[0].t_s > 0.5 and steps[-1].t_s <= 1.0


def test_frames_wait_for_clock_alignment_and_lost_frames_are_skipped():
    config = _config()
    pipeline = Pipeline(config)
    pipeline.on_message(SourceAnnounce("ephys", 0, "spikes", "acq", 30000.0, [1, 2]))
    pipeline.on_message(SourceAnnounce("tracker", 0, "tracker", "camera", 50.0))
    pipeline.on_message(TrackerFrames("tracker", 1, [10.0, 10.02], [[5.0, 5.0], [np.nan, np.nan]]))
    # Different clocks and no sync pulse yet: the frames wait.
    assert pipeline.tracked.newest_t_s == -np.inf
    assert len(pipeline.positions.pending) == 1


def test_config_validation_names_the_problem():
    with pytest.raises(ValueError, match="step_s"):
        _config(decoder={"window_s": 0.01, "step_s": 0.02})
    with pytest.raises(ValueError, match="not on loopback"):
        _config(endpoints={"events": "tcp://0.0.0.0:5771"})
    with pytest.raises(ValueError, match="zone 'nowhere'"):
        _config(rules=[{"name": "r", "zone": "nowhere"}])
    with pytest.raises(ValueError, match="unknown key"):
        _config(decoder={"windw_s": 0.2})
    with pytest.raises(ValueError, match="method must be one of \\('sliding_window', 'filter'\\)"):
        _config(decoder={"method": "smoother"})
    with pytest.raises(ValueError, match="set prior = 'state_space'"):
        _config(decoder={"method": "filter", "prior": "uniform"})
    with pytest.raises(ValueError, match="likelihood_temperature must be a positive"):
        _config(decoder={"method": "filter", "likelihood_temperature": 0.0})
    for name in ("ephys", "tracker"):
        with pytest.raises(ValueError, match="truth must name a third source"):
            _config(sources={"spikes": "ephys", "tracker": "tracker", "truth": name})
    ok = _config(endpoints={"events": "tcp://0.0.0.0:5771", "allow_remote": True})
    assert ok.endpoints.events == "tcp://0.0.0.0:5771"
    assert dataclasses.is_dataclass(ok)


def test_unit_ids_spread_too_wide_for_a_lookup_table_decode_the_same(session_messages):
    # Ids ten million apart and ids next to each other go through the same lookup; the decoded
    # steps, the events and the counters must not depend on their spacing (common practice:
    # a rig's unit ids are labels, their spacing means nothing).
    config, messages = session_messages
    spread = []
    for msg in messages:
        if isinstance(msg, SourceAnnounce) and msg.unit_ids.size:
            msg = dataclasses.replace(msg, unit_ids=msg.unit_ids * 10**7)
        elif isinstance(msg, SpikeBatch):
            msg = dataclasses.replace(msg, unit_id=msg.unit_id * 10**7)
        spread.append(msg)
    cut = next(i for i, m in enumerate(messages) if isinstance(m, SpikeBatch) and m.t_s.size and m.t_s[0] > 140)
    tight, _ = _run(config, messages[:cut] + [SpikeBatch("ephys", 10**9, [140.5], [123457])] + messages[cut:])
    wide, _ = _run(config, spread[:cut] + [SpikeBatch("ephys", 10**9, [140.5], [123457])] + spread[cut:])
    assert wide.digest == tight.digest
    assert wide.counters == tight.counters
    assert wide.counters["unknown_units"] == 1


def test_each_message_kind_goes_to_its_handler_and_strays_are_counted():
    pipeline = Pipeline(_config(session={"learn_s": 0.0}))
    assert pipeline.on_message(TrackerFrames.one("ephys", 0, 1.0, 5.0, 5.0)) == []      # frames from the spike source
    assert pipeline.on_message(SpikeBatch("elsewhere", 0, [1.0], [1])) == []             # spikes from nobody we know
    assert pipeline.counters["unknown_source"] == 2
    assert pipeline.on_message(Heartbeat("tracker", 0, 1.0)) == []                       # a position source is alive
    assert pipeline.counters["unknown_source"] == 2 and pipeline.spike_watermark_s == -np.inf
    pipeline.on_message(Heartbeat("ephys", 1, 2.0))
    assert pipeline.spike_watermark_s == 2.0
    out = pipeline.on_message(ControlCommand("anyone", 0, "start_learning"))
    assert [n.kind for n in out] == ["state"] and pipeline.state == "learning"
    pipeline.on_message(TrackerFrames.one("tracker", 1, 2.0, 5.0, 6.0))
    assert pipeline.tracked.position_at(2.0) == (5.0, 6.0)


def test_a_restarted_spike_source_starts_its_steps_afresh_disarmed(session_messages):
    config, messages = session_messages
    pipeline, _ = _run(config, messages)
    assert pipeline.bank.armed and pipeline.spike_watermark_s > 150
    out = pipeline.on_message(SpikeBatch("ephys", 0, [0.2], [101]))
    assert [n.kind for n in out if isinstance(n, Notice)][:2] == ["source_restart", "disarmed"]
    assert not pipeline.bank.armed and pipeline.spike_watermark_s == 0.2


# -- streams that jump (issue 17, item 4) and what a gap means (item 6) --------------
# Facts of the trade behind these checks (common practice): a ZeroMQ PUB/SUB link over TCP
# delivers one publisher's messages in order or not at all, so a sequence number out of line
# is a lost message (a gap) or a corrupt number; and a clock that stamps acquisition data
# never leaps ahead by seconds between two messages sent milliseconds apart.


def _index(messages, kind, source, after_s):
    return next(i for i, m in enumerate(messages) if isinstance(m, kind) and m.source == source
                and np.size(m.t_s) and np.min(m.t_s) > after_s)


def _steps(outputs):
    return [o for o in outputs if isinstance(o, StepOutput)]


def test_a_spike_batch_whose_seq_jumps_by_a_million_resynchronises(session_messages):
    config, messages = session_messages
    clean, clean_out = _run(config, messages)
    i = _index(messages, SpikeBatch, "ephys", 140.0)
    # One corrupt number: the source carries on from before it.
    corrupt = messages[:i] + [dataclasses.replace(messages[i], seq=messages[i].seq + 10**6)] + messages[i + 1:]
    pipeline, outputs = _run(config, corrupt)
    assert pipeline.digest == clean.digest and len(_steps(outputs)) == len(_steps(clean_out))
    assert pipeline.bank.armed
    h = pipeline.health.sources["ephys"]
    assert (h.gaps, h.resyncs, h.stale) == (0, 1, 0)
    # A source that really moved its numbering on: the numbers skipped are a gap, nothing is dropped.
    shifted = messages[:i] + [dataclasses.replace(m, seq=m.seq + 10**6) if m.source == "ephys" else m
                              for m in messages[i:]]
    pipeline, outputs = _run(config, shifted)
    assert pipeline.digest == clean.digest
    assert pipeline.health.sources["ephys"].gaps == 10**6 and pipeline.counters["stale_messages"] == 0


def test_a_tracker_frame_stamped_1000_s_ahead_is_dropped_and_counted(session_messages):
    config, messages = session_messages
    _, clean_out = _run(config, messages)
    i = _index(messages, TrackerFrames, "tracker", 140.0)
    frame = messages[i]
    bogus = dataclasses.replace(frame, t_s=frame.t_s + 1000.0)
    pipeline, outputs = _run(config, messages[:i] + [bogus] + messages[i + 1:])
    assert pipeline.counters["frames_dropped_ahead"] == frame.t_s.size
    assert pipeline.counters["time_jumps"] == 0           # the spike stream's clock never moved
    assert pipeline.spike_watermark_s < 200
    # The tracked position is known after it as before: one frame lost, not the rest of the session.
    tracked = np.array([np.isfinite(s.tracked_xy_cm).all() for s in _steps(outputs)])
    clean_tracked = np.array([np.isfinite(s.tracked_xy_cm).all() for s in _steps(clean_out)])
    assert tracked[-1] and tracked.sum() >= clean_tracked.sum() - 2


def test_a_heartbeat_29_s_ahead_is_refused_and_decoding_goes_on(session_messages):
    config, messages = session_messages
    clean, clean_out = _run(config, messages)
    i = _index(messages, Heartbeat, "ephys", 140.0)
    bogus = dataclasses.replace(messages[i], t_s=messages[i].t_s + 29.0)
    pipeline, outputs = _run(config, messages[:i] + [bogus] + messages[i + 1:])
    assert pipeline.counters["time_jumps"] == 1 and pipeline.counters["steps_skipped"] == 0
    assert config.session.max_time_jump_s < 29.0
    # The steps it would have closed close at the next message: none is lost.
    assert [s.k for s in _steps(outputs)] == [s.k for s in _steps(clean_out)]
    assert pipeline.bank.armed


def test_a_spike_clock_that_stays_ahead_is_followed_and_the_triggers_disarm(session_messages):
    config, messages = session_messages
    i = _index(messages, SpikeBatch, "ephys", 140.0)
    later = []
    for m in messages[i:]:
        if m.source == "ephys" and isinstance(m, (SpikeBatch, Heartbeat)):
            m = dataclasses.replace(m, t_s=m.t_s + 100.0)
        later.append(m)
    pipeline, outputs = _run(config, messages[:i] + later)
    notices = [o for o in outputs if isinstance(o, Notice) and o.kind in ("time_jump", "disarmed")]
    assert [n.kind for n in notices] == ["time_jump", "disarmed"]
    assert notices[1].detail == {"reason": "time_jump"}
    assert not pipeline.bank.armed and pipeline.bank.status()["disarm_reason"] == "time_jump"
    assert pipeline.counters["time_jumps"] == RESYNC_AFTER_MESSAGES - 1     # refused until they agreed
    # Decoding goes on, on the new clock (the session's data end at 160 s, now stamped 260 s).
    assert pipeline.spike_watermark_s > 250.0 and _steps(outputs)[-1].t_s > 250.0


def test_a_spike_clock_set_back_is_followed_and_the_triggers_disarm(session_messages):
    # Before issue 17's fix, times 100 s behind left the watermark where it was:
    # no step closed for the rest of the session while the triggers stayed armed, with no notice.
    config, messages = session_messages
    i = _index(messages, SpikeBatch, "ephys", 140.0)
    later = []
    for m in messages[i:]:
        if m.source == "ephys" and isinstance(m, (SpikeBatch, Heartbeat)):
            m = dataclasses.replace(m, t_s=m.t_s - 100.0)
        later.append(m)
    pipeline, outputs = _run(config, messages[:i] + later)
    notices = [o for o in outputs if isinstance(o, Notice) and o.kind in ("time_jump", "disarmed")]
    assert [n.kind for n in notices] == ["time_jump", "disarmed"]
    assert notices[1].detail == {"reason": "time_jump"}
    # (The trigger bank then also sees its steps' times go back, and says so as its last reason.)
    assert not pipeline.bank.armed
    assert pipeline.counters["time_jumps"] == RESYNC_AFTER_MESSAGES - 1
    # Decoding goes on, on the clock set back (the session's data end at 160 s, now stamped 60 s).
    assert 55.0 < pipeline.spike_watermark_s < 61.0 and 55.0 < _steps(outputs)[-1].t_s < 61.0


def test_a_rejected_frame_is_no_gap_and_a_lost_one_is(session_messages):
    config, messages = session_messages
    tracker = [i for i, m in enumerate(messages) if isinstance(m, TrackerFrames) and m.source == "tracker"]
    rejected, lost = tracker[len(tracker) // 2], tracker[len(tracker) // 2 + 10]
    pipeline = Pipeline(config)
    for i, msg in enumerate(messages):
        if i == rejected:
            assert pipeline.count_bad_message("bad_time", msg.source, msg.seq) == []
        elif i != lost:
            pipeline.on_message(msg)
    h = pipeline.health.summary()["tracker"]
    assert (h["gaps"], h["rejected"]) == (1, 1)
    assert pipeline.counters["bad_messages"] == 1 and pipeline.bad_reasons == {"bad_time": 1}


def test_rejected_rig_bytes_are_counted_per_source_apart_from_gaps():
    from rig_adapters.wire import protocol
    from rig_adapters.wire.ingest import Ingest

    ingest = Ingest(Pipeline(_config(session={"learn_s": 0.0})))
    frames = [protocol.encode(TrackerFrames.one("tracker", s, 1.0 + s / 50, 5.0, 5.0)) for s in range(4)]
    nan_time = msgpack.unpackb(frames[1])
    nan_time["t"] = np.array([np.nan]).tobytes()
    for payload in (frames[0], msgpack.packb(nan_time), frames[2], b"\xc1", frames[3]):
        ingest.rig_bytes(payload)
    h = ingest.pipeline.health.summary()["tracker"]
    assert (h["gaps"], h["rejected"], h["messages"]) == (0, 1, 3)
    assert ingest.pipeline.counters["bad_messages"] == 2     # the NaN time and the unreadable byte


def test_a_model_that_fails_to_install_leaves_the_old_one(session_messages):
    config, messages = session_messages
    pipeline, _ = _run(config, messages)
    model, steps, state, digest = pipeline.model, pipeline.steps, pipeline.state, pipeline.digest
    broken = copy.copy(model)
    broken.visited_mask_ = np.zeros_like(model.visited_mask_)   # a model that never saw the animal
    with pytest.raises(ValueError, match="no bin is valid"):
        pipeline.install_model(broken, pipeline.spike_watermark_s, loaded=True)
    assert pipeline.model is model and pipeline.steps is steps and pipeline.state == state
    assert not pipeline.model_is_loaded and pipeline.bank.armed and pipeline.digest == digest


def test_the_filter_method_decodes_each_spike_once_with_the_learned_movement(session_messages):
    _, messages = session_messages
    config = _config(decoder={**CONFIG["decoder"], "method": "filter", "likelihood_temperature": 1.5})
    pipeline, outputs = _run(config, messages)
    dec = pipeline.steps.decoder
    movement = pipeline.model.movement_model(0.025)
    # Source: the setting's definition — windows of step_s, the walk and jump of the movement
    # model learned from this session's frames, the configured temperature.
    assert dec.window_s == 0.025 and dec.likelihood_temperature == 1.5
    assert dec.random_walk_sd_cm == movement.walk_sd_cm(4.0)
    assert dec.uniform_weight == movement.uniform_weight > 0
    assert pipeline.readiness["filter"]["walk_sd_cm"] == dec.random_walk_sd_cm
    assert np.isfinite(pipeline.readiness["walk_sd_cm_per_sqrt_s"])
    steps = [o for o in outputs if isinstance(o, StepOutput)]
    assert abs(len(steps) - 40.0 / 0.025) <= 2 and dec.underflow_resets == 0
    # Sanity bound on invented cells, as for the sliding window above.
    assert pipeline.errors.percentile(50) < 12.0


def test_the_filter_fits_its_temperature_at_fit_time_and_the_model_file_keeps_it(session_messages, tmp_path):
    config, messages = session_messages
    assert config.decoder.method == "filter" and config.decoder.likelihood_temperature is None   # the defaults
    pipeline, outputs = _run(config, messages)
    fit = pipeline.model.temperature_fits_[0.025]
    # Source: the setting's definition — unset, the decoder takes the temperature fitted for its step,
    # and the readiness figures report it; the fit decoded held-out learning steps with a tracked position.
    assert pipeline.steps.decoder.likelihood_temperature == fit.temperature >= 1.0
    assert pipeline.readiness["filter"]["likelihood_temperature"] == fit.temperature
    assert 0 < fit.n_steps <= 3000 and fit.coverage_at_1 <= fit.coverage
    # The decoded position is the point estimate chosen with the temperature, reported beside it,
    # and the one the session's error is measured from.
    assert pipeline.steps.decoder.point_estimate == fit.point_estimate == pipeline.readiness["filter"]["point_estimate"]
    assert pipeline.readiness["filter"]["held_out_map_median_cm"] == fit.map_median_cm
    step = [o for o in outputs if isinstance(o, StepOutput) and np.isfinite(o.error_cm)][-1]
    assert step.error_cm == pytest.approx(np.hypot(*(step.step.decoded_xy_cm - step.true_xy_cm)))
    path = tmp_path / "model.npz"
    pipeline.model.save(path)
    loaded = PlaceModel.load(path)
    assert loaded.temperature_fits_ == pipeline.model.temperature_fits_
    assert loaded.likelihood_temperature(0.025) == fit.temperature
    assert loaded.point_estimate(0.025) == fit.point_estimate
    # A loaded model has no held-out spikes: another step cannot be fitted, and says why.
    with pytest.raises(ValueError, match="no held-out learning steps"):
        loaded.likelihood_temperature(0.01)
