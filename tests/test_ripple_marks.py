"""Replay content decoded from waveform marks: content bins with the marked point-process terms.

References: a brute-force evaluation of the marked point-process likelihood
(Kloosterman et al. 2014, J Neurophysiol 111:217: lambda(m, x) = mu p(m, x) /
pi(x), a window's log-likelihood sum_k log lambda(m_k, x) - dt Lambda(x);
Deng et al. 2015, Neural Comput 27:1438; both formulas from memory), with the
uniform prior; the sorted units' part is the Poisson likelihood with
``scipy.stats.poisson`` as the reference pmf (Zhang et al. 1998, J
Neurophysiol 79:1017). The spikes of the small cases are drawn at random;
the sessions are simulated (invented tetrodes and replays) and drive the
plumbing only.
"""

from __future__ import annotations

import dataclasses
import math

import msgpack
import numpy as np
import pytest
import tomli_w
from scipy import stats

from decoder.config import parse_config
from decoder.encoding.mark_model import MarkModel
from decoder.messages import MarkedSpikes
from decoder.session.pipeline import Pipeline
from decoder.session.replay_content import ReplayContent
from decoder.session.ripples import ContentOutput
from decoder.space.environments import LinearTrack
from rig_adapters.sessions.replay import replay_session
from rig_adapters.sim.recording import record_simulated_session
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession
from rig_adapters.wire.ingest import Ingest
from rig_adapters.wire.protocol import encode

TRACK = LinearTrack((0, 0), (100, 0), bin_cm=10)
END = np.zeros((1, TRACK.n_bins), bool)
END[0, -2:] = True
BW_UV, SMOOTH_CM, BIN_S = 15.0, 12.0, 0.015


def _mark_model(rng) -> tuple[MarkModel, np.ndarray]:
    """Two groups of three channels, 60 spikes each at random bins and marks; no kernel cut-off in reach."""
    model = MarkModel(TRACK, bandwidth_uv=BW_UV, smooth_cm=SMOOTH_CM, cutoff_sd=50.0)
    centres = TRACK.bin_centers_cm
    for g in range(2):
        model.add_group(10 + g, 3)
        xy = centres[rng.integers(0, TRACK.n_bins, 60)]
        model.update(np.full(60, 10 + g), (60 + 40 * rng.random((60, 3))).astype(np.float32), xy, np.full(60, 10.0))
    occupancy = 1.0 + rng.random(TRACK.n_bins)
    return model.fit(occupancy, TRACK.valid_mask), occupancy


def _brute_marks(model: MarkModel, occupancy: np.ndarray, groups: np.ndarray, marks: np.ndarray,
                 resting_bin: int | None = None) -> np.ndarray:
    """sum_k log lambda(m_k, x) - dt sum_g Lambda_g(x), straight from the published form (see the module docstring).

    With ``resting_bin`` a, the superposition of the replay's process and the resting animal's own:
    sum_k log(lambda(m_k, x) + lambda(m_k, a)) - dt sum_g (Lambda_g(x) + Lambda_g(a)).
    """
    x = TRACK.bin_centers_cm[:, 0]
    occ_smooth = np.exp(-0.5 * ((x[:, None] - x[None, :]) / SMOOTH_CM) ** 2) @ occupancy
    out = np.zeros(TRACK.n_bins)
    for g, m in zip(groups, marks):
        enc_m, enc_x = model._marks[g].astype(np.float64), x[model._bins[g]]
        km = np.exp(-0.5 * (((enc_m - m.astype(np.float64)) / BW_UV) ** 2).sum(axis=1)) / (2 * np.pi * BW_UV**2) ** 1.5
        lam = np.array([np.sum(km * np.exp(-0.5 * ((x[j] - enc_x) / SMOOTH_CM) ** 2)) / occ_smooth[j]
                        for j in range(TRACK.n_bins)])
        out += np.log(lam if resting_bin is None else lam + lam[resting_bin])
    for g in range(2):
        enc_x = x[model._bins[g]]
        ground = np.array([np.sum(np.exp(-0.5 * ((xj - enc_x) / SMOOTH_CM) ** 2)) for xj in x]) / occ_smooth
        out -= BIN_S * (ground if resting_bin is None else ground + ground[resting_bin])
    return out


def _softmax(log_post: np.ndarray) -> np.ndarray:
    p = np.exp(log_post - log_post.max())
    return p / p.sum()


def test_a_content_bin_from_marks_alone_is_the_marked_point_process_posterior_with_a_uniform_prior():
    rng = np.random.default_rng(4)
    model, occupancy = _mark_model(rng)
    content = ReplayContent.for_model(np.zeros((0, TRACK.n_bins)), TRACK, TRACK.valid_mask, END, bin_s=BIN_S,
                                      max_event_s=0.1, marks=model)
    t = np.array([0.995, 1.002, 1.006, 1.011, 1.014, 1.016])  # the first before the bin, the last after it
    groups = np.array([11, 10, 11, 11, 10, 10])
    marks = (60 + 40 * rng.random((6, 3))).astype(np.float32)
    content.take_marks(t, model.rows_of(groups), marks)
    content.begin(1.0)
    (b,) = content.due(1.0151)
    inside = slice(1, 5)
    # Kloosterman et al. 2014 (from memory): P(x | marks) ∝ exp(sum_k log lambda(m_k, x) - dt Lambda(x)), flat prior.
    want = _softmax(_brute_marks(model, occupancy, groups[inside] - 10, marks[inside]))
    np.testing.assert_allclose(b.posterior, want, rtol=1e-5, atol=1e-12)  # float32 marks and kernel weights
    assert b.n_spikes == 4 and b.n_marks_over_cap == 0


@pytest.mark.parametrize("resting_xy_cm, rest", [(None, None), ((14.0, 0.0), 1), ((math.nan, math.nan), None)],
                         ids=["no_position", "resting_in_bin_1", "lost_position"])
def test_units_and_marks_together_add_their_terms(resting_xy_cm, rest):
    rng = np.random.default_rng(5)
    model, occupancy = _mark_model(rng)
    x = TRACK.bin_centers_cm[:, 0]
    maps = 0.5 + 30.0 * np.exp(-0.5 * ((x[None, :] - np.array([15.0, 50.0, 85.0])[:, None]) / 10.0) ** 2)
    content = ReplayContent.for_model(maps, TRACK, TRACK.valid_mask, END, bin_s=BIN_S, max_event_s=0.1,
                                      unit_ids=np.array([7, 8, 9]), marks=model)
    content.take_spikes(np.array([2.001, 2.004, 2.009, 2.012]), np.array([9, 9, 8, 9]))
    groups, marks = np.array([10, 11, 10]), (60 + 40 * rng.random((3, 3))).astype(np.float32)
    content.take_marks(np.array([2.003, 2.007, 2.013]), model.rows_of(groups), marks)
    content.begin(2.0, resting_xy_cm=None if resting_xy_cm is None else np.array(resting_xy_cm))
    (b,) = content.due(2.016)
    counts = np.array([0, 1, 3])
    # Zhang et al. 1998 with scipy.stats.poisson as the reference pmf, plus the marks' brute-force terms.
    # Where the animal rests on the track (14 cm: bin 1, 10 to 20 cm), its own place's firing superposes
    # on the replay's: independent Poisson processes superpose with their intensities added (a textbook
    # property, common practice), so a unit's rate is r(x) + r(a) and a mark's lambda(m, x) + lambda(m, a).
    # A lost position adds nothing.
    rates = maps if rest is None else maps + maps[:, rest:rest + 1]
    units = stats.poisson.logpmf(counts[:, None], BIN_S * rates).sum(axis=0)
    want = _softmax(units + _brute_marks(model, occupancy, groups - 10, marks, resting_bin=rest))
    np.testing.assert_allclose(b.posterior, want, rtol=1e-5, atol=1e-12)
    assert b.n_spikes == 7


def test_marks_beyond_the_cap_and_of_unknown_groups_stay_out():
    rng = np.random.default_rng(6)
    model, occupancy = _mark_model(rng)
    content = ReplayContent.for_model(np.zeros((0, TRACK.n_bins)), TRACK, TRACK.valid_mask, END, bin_s=BIN_S,
                                      max_event_s=0.1, marks=model, max_marks_per_bin=2)
    marks = (60 + 40 * rng.random((4, 3))).astype(np.float32)
    content.take_marks(np.array([3.001, 3.002]), model.rows_of(np.array([99, 10])), marks[:2])  # group 99: not in the model
    content.take_marks(np.array([3.003, 3.004]), model.rows_of(np.array([11, 10])), marks[2:])
    content.begin(3.0)
    (b,) = content.due(3.02)
    # The first two known marked spikes in time are decoded; the third is beyond the cap.
    want = _softmax(_brute_marks(model, occupancy, np.array([0, 1]), marks[1:3]))
    np.testing.assert_allclose(b.posterior, want, rtol=1e-5, atol=1e-12)
    assert b.n_spikes == 2 and b.n_marks_over_cap == 1


# -- a ripple session whose spikes reach the decoder as tetrode marks ---------------------------------------

CONFIG = {
    "environment": {"kind": "linear_track", "start_cm": [0.0, 0.0], "end_cm": [100.0, 0.0], "bin_cm": 4.0},
    "marks": {"enabled": True},
    "session": {"learn_s": 20.0, "arm_after_fit": True, "cross_validate": False},
    "ripples": {"source": "lfp", "warm_up_s": 3.0, "baseline_window_s": 20.0, "max_speed_cm_s": 6.0},
    "safety": {"refractory_s": 0.05, "max_per_minute": 1000},
    # Most replays after learning (seed 2) run through the track's middle (82 to 58 cm, 58 to 98 cm, 70 to
    # 98 cm, ...: the simulator's record), and the rule asks for that content.
    "zones": [{"kind": "interval", "name": "middle", "start_cm": 40.0, "end_cm": 80.0}],
    "rules": [{"name": "mid", "kind": "replay_mass", "zone": "middle", "min_mass": 0.5, "min_bins": 2}],
    "simulation": {"n_place_cells": 24, "units_per_tetrode": 6, "end_pause_s": [3.0, 6.0],
                   "track_lateral_sd_cm": 0.1, "lfp": {"n_channels": 4, "ripple_rate_hz": 2.0},
                   "replay": {"goal_cm": [100.0, 0.0]}, "marks": {"send": "marks"}},
}
UNTIL_S = 45.0


@pytest.fixture(scope="module")
def session():
    config = parse_config(tomli_w.dumps(CONFIG))
    sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=2)
    return config, list(sim.messages(until_s=UNTIL_S))


def _through_ingest(config, frames):
    pipeline = Pipeline(config)
    ingest = Ingest(pipeline)
    content = []
    for frame in frames:
        content.extend(o for o in ingest.rig_bytes(frame) if isinstance(o, ContentOutput))
    return pipeline, content


def test_a_marks_only_ripple_session_decodes_content_from_marks_and_its_replay_reproduces_the_live_run(session,
                                                                                                        tmp_path):
    config, messages = session
    live, content = _through_ingest(config, [encode(m) for m in messages])
    assert live.state == "decoding" and live.steps.n_units == 0  # no sorted unit: the marks alone decode
    assert live.ripples.content.marks is not None
    assert content and sum(c.content.n_spikes for c in content) > 0
    assert any(e.rule == "mid" for c in content for e in c.events)
    log_dir = record_simulated_session(config, tmp_path / "session", until_s=UNTIL_S, seed=2)
    replayed = replay_session(log_dir)
    assert replayed.pipeline.ripples.digest == live.ripples.digest
    assert replayed.summary["ripples"]["counters"] == live.ripples.counters
    assert replayed.summary["decode"]["digest"] == live.digest


def _bad_frames(t_s: float, seq: int) -> list[bytes]:
    """Marked spikes the pipeline must refuse: an unknown group, a wrong width, NaN marks on the wire."""
    unknown = MarkedSpikes("ephys", seq, np.array([t_s]), np.array([999]), np.full((1, 4), 200.0))
    wrong = MarkedSpikes("ephys", seq + 1, np.array([t_s]), np.array([1]), np.full((1, 3), 200.0))
    nan = msgpack.packb({"v": 1, "k": "marks", "src": "ephys", "seq": seq + 2, "t": [t_s], "g": [1], "ch": 4,
                         "m": [200.0, float("nan"), 200.0, 200.0]})
    return [encode(unknown), encode(wrong), nan]


def test_bad_marks_during_a_candidate_event_are_counted_and_change_nothing(session):
    config, messages = session
    clean, clean_content = _through_ingest(config, [encode(m) for m in messages])
    # The same session with bad marks sent while each candidate event's bins are being decoded, stamped at the
    # stream's time (so that they move no clock); the later frames of the source are numbered after them.
    pipeline = Pipeline(config)
    ingest = Ingest(pipeline)
    shift, injected, content = 0, 0, []
    for msg in messages:
        if msg.source == "ephys":
            msg = dataclasses.replace(msg, seq=msg.seq + shift)
        content.extend(o for o in ingest.rig_bytes(encode(msg)) if isinstance(o, ContentOutput))
        c = pipeline.ripples.content
        if msg.source == "ephys" and c is not None and c.active and math.isfinite(pipeline.watermark.t_s):
            for frame in _bad_frames(pipeline.watermark.t_s, msg.seq + 1):
                content.extend(o for o in ingest.rig_bytes(frame) if isinstance(o, ContentOutput))
            shift += 3
            injected += 1
    assert injected >= 5
    assert pipeline.counters["mark_unknown_group"] == injected
    assert pipeline.counters["mark_wrong_width"] == injected
    assert pipeline.bad_reasons.get("bad_field") == injected
    # Nothing they carried reached a content bin or a rule: the same bins, posteriors and events.
    assert pipeline.ripples.digest == clean.ripples.digest
    assert [e for c in content for e in c.events] == [e for c in clean_content for e in c.events]
    assert pipeline.digest == clean.digest


def test_a_session_with_sorted_units_and_marks_decodes_content_from_both():
    doc = {**CONFIG, "simulation": {**CONFIG["simulation"], "marks": {"send": "both"}}}
    runs = {}
    for enabled in (True, False):
        config = parse_config(tomli_w.dumps({**doc, "marks": {"enabled": enabled}}))
        sim = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=2)
        pipeline = Pipeline(config)
        content = []
        for msg in sim.messages(until_s=UNTIL_S):
            content.extend(o.content for o in pipeline.on_message(msg) if isinstance(o, ContentOutput))
        runs[enabled] = pipeline, {(b.onset_s, b.index): b for b in content}
    (both, with_marks), (units, without) = runs[True], runs[False]
    assert both.ripples.content.marks is not None and units.ripples.content.marks is None
    assert both.ripples.content.decoder.n_units == units.ripples.content.decoder.n_units > 0
    # The same ripples, bins and sorted spikes; with [marks] on, each bin adds its marked spikes too
    # (every sorted spike is also sent as a mark here: a sorter keeps the large units).
    assert with_marks.keys() == without.keys() and len(with_marks) > 10
    assert all(with_marks[k].n_spikes >= without[k].n_spikes for k in with_marks)
    assert sum(with_marks[k].n_spikes for k in with_marks) > sum(without[k].n_spikes for k in without)
    assert any(not np.allclose(with_marks[k].posterior, without[k].posterior) for k in with_marks)
