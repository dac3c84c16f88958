"""LFP on the wire, through the ingest and the session's LFP stream, recorded and replayed.

The samples are invented (noise, a 200 Hz burst); what is checked is the
protocol (PROTOCOL.md, section "LFP"), the counters of bad input, the ripple
rule beneath the caps, and that a replay reproduces the live run.
"""

import math

import msgpack
import numpy as np
import pytest
import tomli_w

from decoder.config import ConfigError, SafetyCaps, TriggerRule, parse_config
from decoder.session.pipeline import Pipeline
from decoder.session.ripples import RippleOutput
from decoder.session.triggers import TriggerBank
from decoder.signals.lfp_chunk import LfpChunk
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.recording import record_simulated_session
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession
from rig_adapters.wire.ingest import Ingest
from rig_adapters.wire.protocol import ProtocolError, decode, encode

RATE_HZ = 1500.0

CONFIG = {
    "environment": {"kind": "rectangle", "width_cm": 60.0, "height_cm": 60.0, "bin_cm": 5.0},
    "ripples": {"source": "lfp", "warm_up_s": 2.0, "baseline_window_s": 10.0, "max_speed_cm_s": math.inf},
    "safety": {"refractory_s": 0.2, "max_per_minute": 100},
    "rules": [{"name": "disrupt", "kind": "ripple"}],
}


def _frame(**fields):
    m = {"v": 1, "k": "lfp", "src": "lfp", "seq": 0, "t": 0.0, "rate_hz": RATE_HZ, "ch": 2, "fmt": "i16",
         "uv": 0.195, "s": np.zeros(6, "<i2").tobytes()}
    m.update(fields)
    return msgpack.packb({k: v for k, v in m.items() if v is not None}, use_bin_type=True)


def test_int16_and_float32_chunks_round_trip():
    for samples, scale in ((np.arange(-6, 6, dtype=np.int16).reshape(4, 3), 0.195),
                           (np.linspace(-1, 1, 12, dtype=np.float32).reshape(6, 2), 1.0)):
        msg = LfpChunk("lfp", 7, 2.5, RATE_HZ, samples, scale)
        back = decode(encode(msg))
        np.testing.assert_array_equal(back.samples, samples)
        assert (back.t_s, back.rate_hz, back.uv_per_count, back.seq) == (2.5, RATE_HZ, scale, 7)
        np.testing.assert_allclose(back.samples_uv(), samples.astype(np.float64) * scale)


@pytest.mark.parametrize("fields, reason", [
    ({"s": np.zeros(5, "<i2").tobytes()}, "length_mismatch"),        # not a whole number of samples
    ({"s": b"\x00" * 7}, "bad_array"),                                # not a whole number of int16
    ({"s": [0, 0, 0, 0]}, "bad_array"),                               # a list, not bin
    ({"fmt": "f32", "s": np.array([0, np.nan], "<f4").tobytes()}, "bad_array"),  # a NaN sample
    ({"fmt": "i8"}, "bad_field"),
    ({"ch": 0}, "bad_field"),
    ({"uv": None}, "missing_field"),                                  # int16 without its scale
    ({"uv": -1.0}, "bad_field"),
    ({"rate_hz": 10.0}, "bad_field"),
    ({"t": math.nan}, "bad_time"),
    ({"extra": 1}, "unknown_field"),
])
def test_bad_chunks_are_refused_with_a_reason(fields, reason):
    with pytest.raises(ProtocolError) as err:
        decode(_frame(**fields))
    assert err.value.reason == reason


def _pipeline(**changes):
    return Pipeline(parse_config(tomli_w.dumps({**CONFIG, **changes})))


def _chunk(seq, t_s, x, rate=RATE_HZ):
    return LfpChunk("lfp", seq, t_s, rate, x.astype(np.float32))


def test_gaps_overlaps_and_changes_of_rate_or_channels_are_counted_and_never_trigger():
    p = _pipeline()
    ingest = Ingest(p)
    rng = np.random.default_rng(0)
    x = rng.standard_normal((3, 2)) * 10
    assert ingest.rig_bytes(encode(_chunk(0, 0.0, x))) == []
    ingest.rig_bytes(encode(_chunk(1, 0.002, x)))            # continuous
    ingest.rig_bytes(encode(_chunk(2, 0.010, x)))            # a gap of 6 samples
    ingest.rig_bytes(encode(_chunk(3, 0.009, x)))            # begins before the last one ended
    ingest.rig_bytes(encode(_chunk(4, 0.012, x, rate=2000.0)))
    ingest.rig_bytes(encode(_chunk(5, 0.012, np.zeros((3, 3)))))
    ingest.rig_bytes(_frame(seq=6, s=np.zeros(5, "<i2").tobytes()))
    c = p.ripples.counters
    assert (c["lfp_chunks"], c["lfp_gaps"], c["lfp_overlaps"], c["lfp_rate_changes"], c["lfp_shape_changes"]) == \
        (3, 1, 1, 1, 1)
    assert p.bad_reasons == {"length_mismatch": 1}
    assert p.bank.n_events == 0


def test_a_rate_too_low_for_the_ripple_band_is_refused_not_fatal():
    p = _pipeline()
    assert p.on_message(LfpChunk("lfp", 0, 0.0, 400.0, np.zeros((3, 2), np.float32))) == []
    assert p.ripples.counters["lfp_unusable"] == 1 and p.ripples.detector is None


def test_an_lfp_chunk_from_another_source_is_counted_as_unknown():
    p = _pipeline()
    p.on_message(LfpChunk("probe2", 0, 0.0, RATE_HZ, np.zeros((3, 2), np.float32)))
    assert p.counters["unknown_source"] == 1


def _ripple_signal(seconds, bursts_s, seed=1):
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE_HZ)
    x = rng.standard_normal((n, 2)) * 10
    t = np.arange(n) / RATE_HZ
    for b in bursts_s:
        envelope = 80 * np.exp(-0.5 * ((t - b) / 0.01) ** 2)
        x += (envelope * np.sin(2 * np.pi * 190 * t))[:, None]
    return x


def _feed(p, x, seq0=0):
    out = []
    for k, i in enumerate(range(0, x.shape[0], 3)):
        out.extend(p.on_message(_chunk(seq0 + k, i / RATE_HZ, x[i:i + 3])))
    return out


def test_every_ripple_is_disrupted_beneath_the_caps():
    p = _pipeline()
    p.bank.arm(0.0)
    bursts = [3.0, 3.1, 4.0, 5.0, 6.0]  # the second comes inside the refractory period of the first
    out = _feed(p, _ripple_signal(7.0, bursts))
    ripples = [o for o in out if isinstance(o, RippleOutput)]
    assert len(ripples) == len(bursts)
    assert all(abs(r.detection.onset_s - b) < 0.03 for r, b in zip(ripples, bursts))
    fired = [r for r in ripples if r.events]
    assert [round(r.events[0].t_s, 1) for r in fired] == [3.0, 4.0, 5.0, 6.0]
    assert p.bank.counters["refractory"] == 1
    assert all(r.events[0].rule == "disrupt" and r.events[0].zone == "" for r in fired)


def test_a_ripple_while_moving_or_disarmed_triggers_nothing():
    p = _pipeline(ripples={**CONFIG["ripples"], "max_speed_cm_s": 4.0})
    p.bank.arm(0.0)
    out = _feed(p, _ripple_signal(4.0, [3.0]))
    (ripple,) = [o for o in out if isinstance(o, RippleOutput)]
    assert ripple.moving and not ripple.events  # no tracker: the speed is unknown, never still
    p = _pipeline()
    out = _feed(p, _ripple_signal(4.0, [3.0]))
    assert not [o for o in out if isinstance(o, RippleOutput)][0].events
    assert p.bank.counters["disarmed"] == 1


def test_ripple_rules_have_no_zone_and_zone_rules_need_one():
    with pytest.raises(ConfigError, match="no zone"):
        parse_config(tomli_w.dumps({**CONFIG, "rules": [{"name": "r", "kind": "ripple", "zone": "goal"}]}))
    with pytest.raises(ValueError, match="zone must be"):
        TriggerRule("feeder")
    bank = TriggerBank([TriggerRule("r", kind="ripple")], zone_names=[], caps=SafetyCaps(refractory_s=0.1))
    bank.arm(0.0)
    # A stalled LFP stream disarms the bank like a stalled spike stream.
    assert bank.ripple(1.0, np.array([np.nan, np.nan]), 0.0, stream_lag_s=5.0) == []
    assert bank.disarm_reason == "stall" and bank.counters["disarmed"] == 1


def test_a_replay_of_a_ripple_session_reproduces_the_live_run(tmp_path):
    doc = {
        "environment": {"kind": "linear_track", "start_cm": [0.0, 0.0], "end_cm": [100.0, 0.0], "bin_cm": 4.0},
        "session": {"learn_s": 15.0, "arm_after_fit": True, "cross_validate": False},
        "ripples": {"source": "lfp", "warm_up_s": 3.0, "baseline_window_s": 20.0, "max_speed_cm_s": 6.0},
        "safety": {"refractory_s": 0.2, "max_per_minute": 100},
        "rules": [{"name": "disrupt", "kind": "ripple"}],
        "simulation": {"n_place_cells": 20, "end_pause_s": [3.0, 6.0], "track_lateral_sd_cm": 0.1,
                       "lfp": {"n_channels": 4, "ripple_rate_hz": 2.0}},
    }
    config = parse_config(tomli_w.dumps(doc))
    live = Pipeline(config)
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=2)
    ripples = []
    for msg in session.messages(until_s=40.0):
        ripples.extend(o for o in live.on_message(msg) if isinstance(o, RippleOutput))
    assert len(session.lfp.ripples) > 3 and len(ripples) > 3
    log_dir = record_simulated_session(config, tmp_path / "session", until_s=40.0, seed=2)
    replayed = replay_session(log_dir)
    assert replayed.pipeline.ripples.digest == live.ripples.digest
    assert replayed.summary["ripples"]["counters"] == live.ripples.counters
    assert replayed.summary["decode"]["digest"] == live.digest
