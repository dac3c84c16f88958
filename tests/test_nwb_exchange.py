"""NWB in and out (rig_adapters.exchange): import, replay, export, tables, bad input.

Every NWB file here is built with pynwb's own API or its testing helpers
(``pynwb.testing.mock``), so the format is the standard's reference
implementation's, not ours; exports are read back with pynwb and checked
with nwbinspector, the NWB project's own best-practice checker. The spike
times and positions written into those files come from the simulated rig
(invented data): what is checked is the import's promise (the file's spikes
and positions, in the file's units, reach the log unchanged) and the bar of
issue 16 (export's decoded positions score the same against the file's own
positions as the replay reports).
"""

import datetime
import json
import math

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")
nwbinspector = pytest.importorskip("nwbinspector")
pq = pytest.importorskip("pyarrow.parquet")

from pynwb import NWBHDF5IO, NWBFile  # noqa: E402
from pynwb.behavior import Position, SpatialSeries  # noqa: E402
from pynwb.file import Subject  # noqa: E402
from pynwb.testing.mock.behavior import mock_CompassDirection, mock_SpatialSeries  # noqa: E402
from pynwb.testing.mock.file import mock_NWBFile  # noqa: E402

from decoder.config import load_config  # noqa: E402
from decoder.messages import SpikeBatch, TrackerFrames  # noqa: E402
from rig_adapters import cli  # noqa: E402
from rig_adapters.exchange.nwb_import import guess_environment, import_nwb, learning_intervals  # noqa: E402
from rig_adapters.exchange.nwb_reading import NwbImportError, read_recording  # noqa: E402
from rig_adapters.sessions.recorder import read_log  # noqa: E402
from rig_adapters.sim.settings import SimulationSettings  # noqa: E402
from rig_adapters.sim.simulation import SimulatedSession  # noqa: E402
from rig_adapters.wire import protocol  # noqa: E402
from rig_adapters.wire.ingest import CHANNEL_CONTROL, CHANNEL_RIG  # noqa: E402

from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
ARENA = ROOT / "configs" / "round_arena_goal.toml"
LEARN_S, DECODE_S = 100.0, 40.0
START = datetime.datetime(2026, 3, 2, 10, 30, tzinfo=datetime.timezone.utc)

ZONES = """
[[zones]]
kind = "circle"
name = "goal"
center_cm = [62.0, 58.0]
radius_cm = 12.0

[[rules]]
name = "goal_reward"
zone = "goal"
mode = "mass"
min_mass = 0.6
consecutive_steps = 3
"""


@pytest.fixture(scope="module")
def simulated():
    """Spike times per unit and positions on the acquisition clock from the simulated rig (invented data)."""
    config = load_config(ARENA)
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=11)
    spikes, units, ft, fxy = [], [], [], []
    for msg in session.messages(until_s=LEARN_S + DECODE_S):
        if type(msg) is SpikeBatch:
            spikes.append(msg.t_s)
            units.append(msg.unit_id)
        elif type(msg) is TrackerFrames and msg.source == "truth":
            ft.append(msg.t_s)
            fxy.append(msg.xy_cm)
    t, u = np.concatenate(spikes), np.concatenate(units)
    return {"units": {int(i): t[u == i] for i in np.unique(u)}, "t": np.concatenate(ft), "xy_cm": np.concatenate(fxy)}


def _write(nwb, path):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def _recording_in_metres(sim, path, waveforms=False):
    """A file as an acquisition pipeline writes it, with pynwb's API: Units, behavior/Position in metres, epochs."""
    nwb = NWBFile(session_description="round arena foraging (invented scenario)", identifier="arena-m1-d2",
                  session_start_time=START)
    nwb.subject = Subject(subject_id="m1", species="Mus musculus", sex="F", age="P84D")
    if waveforms:
        nwb.add_unit_column(name="waveform_mean", description="mean waveform")
    for unit_id, times in sim["units"].items():
        extra = {"waveform_mean": np.zeros((8, 4))} if waveforms else {}
        nwb.add_unit(spike_times=times, id=unit_id, **extra)
    behavior = nwb.create_processing_module("behavior", "tracked behaviour")
    behavior.add(Position(spatial_series=[SpatialSeries(
        name="head_position", data=sim["xy_cm"] / 100.0, timestamps=sim["t"], reference_frame="arena corner",
        unit="meters")]))
    nwb.add_epoch(0.0, LEARN_S, ["foraging", "learn"])
    nwb.add_epoch(LEARN_S, LEARN_S + DECODE_S, ["foraging", "test"])
    return _write(nwb, path)


@pytest.fixture(scope="module")
def round_trip(simulated, tmp_path_factory):
    """placeloop import -> replay -> export (NWB and Parquet), as a user types them."""
    tmp = tmp_path_factory.mktemp("round_trip")
    recording = _recording_in_metres(simulated, tmp / "recording.nwb")
    log_dir = tmp / "imported"
    assert cli.main(["import", str(recording), "--out", str(log_dir)]) == 0
    config = tmp / "with_zone.toml"
    # The skeleton plus a zone and its rule, as the user completes it; no cross-validation (seconds per replay).
    skeleton = (log_dir / "config.toml").read_text()
    config.write_text(skeleton.replace("learn_s = 0.0", "learn_s = 0.0\ncross_validate = false") + ZONES)
    summary = tmp / "replay.json"
    assert cli.main(["replay", str(log_dir), "--config", str(config), "--summary", str(summary)]) == 0
    out = tmp / "decoded.nwb"
    assert cli.main(["export", str(log_dir), "--config", str(config), "--out", str(out)]) == 0
    tables = tmp / "tables"
    assert cli.main(["export", str(log_dir), "--config", str(config), "--format", "parquet", "--out", str(tables)]) == 0
    return {"recording": recording, "log": log_dir, "summary": json.loads(summary.read_text()), "nwb": out,
            "tables": tables}


def test_the_bar_exported_decoding_scores_as_the_replay_against_the_files_own_positions(round_trip, simulated):
    replay_median = round_trip["summary"]["decode"]["median_error_cm"]
    with NWBHDF5IO(str(round_trip["nwb"]), "r") as io:
        nwb = io.read()
        # The decoded position, the point estimate the replay scores (the MAP or the posterior mean, chosen at fit).
        series = nwb.processing["placeloop_decoding"]["decoded_position"].spatial_series["decoded"]
        t = series.get_timestamps()
        # NWB: data * conversion is in `unit` (the TimeSeries schema); metres -> cm is * 100.
        decoded_cm = np.asarray(series.data[:]) * series.conversion * 100.0
        assert series.unit == "meters"
    with NWBHDF5IO(str(round_trip["recording"]), "r") as io:
        pos = io.read().processing["behavior"]["Position"].spatial_series["head_position"]
        own_t, own_cm = np.asarray(pos.timestamps[:]), np.asarray(pos.data[:]) * 100.0
    own = np.column_stack([np.interp(t, own_t, own_cm[:, 0]), np.interp(t, own_t, own_cm[:, 1])])
    error = np.median(np.hypot(*(decoded_cm - own).T))
    assert len(t) == round_trip["summary"]["decode"]["steps"] > 1500
    # Issue 16's bar: within 10% of the replay's own figure.
    assert abs(error - replay_median) <= 0.1 * replay_median, (error, replay_median)
    assert replay_median < 10.0  # a working decoder on a 90 cm arena with 80 units


def test_nwbinspector_finds_nothing_critical_in_the_export(round_trip):
    messages = list(nwbinspector.inspect_nwbfile(nwbfile_path=str(round_trip["nwb"])))
    critical = [m for m in messages if m.importance.name == "CRITICAL"]
    assert critical == [], [(m.check_function_name, m.message) for m in critical]
    # The subject came from the imported file, through the log's header.
    with NWBHDF5IO(str(round_trip["nwb"]), "r") as io:
        nwb = io.read()
        assert (nwb.subject.subject_id, nwb.subject.sex, nwb.subject.age) == ("m1", "F", "P84D")
        assert nwb.session_start_time == START
        assert "[environment]" in nwb.notes and "goal_reward" in nwb.notes
        assert json.loads(nwb.data_collection)["readiness"]["n_tuned_units"] >= 1
        assert "cross_validate = false" in nwb.notes


def test_the_export_reads_back_to_the_same_numbers_as_the_tables(round_trip):
    steps = pq.read_table(round_trip["tables"] / "steps.parquet").to_pydict()
    events = pq.read_table(round_trip["tables"] / "events.parquet").to_pydict()
    with NWBHDF5IO(str(round_trip["nwb"]), "r") as io:
        nwb = io.read()
        module = nwb.processing["placeloop_decoding"]
        np.testing.assert_allclose(module["decoded_position"].spatial_series["map"].get_timestamps(), steps["t_s"])
        np.testing.assert_array_equal(module["decoded_position"].spatial_series["map"].data[:],
                                      np.column_stack([steps["map_x_cm"], steps["map_y_cm"]]))
        np.testing.assert_array_equal(module["decoded_position"].spatial_series["posterior_mean"].data[:],
                                      np.column_stack([steps["mean_x_cm"], steps["mean_y_cm"]]))
        np.testing.assert_array_equal(module["peak_probability"].data[:], steps["peak_prob"])
        np.testing.assert_array_equal(module["hpd95_size"].data[:], steps["hpd95_size"])
        np.testing.assert_array_equal(module["zone_mass"].data[:, 0], steps["zone_mass_goal"])
        table = nwb.intervals["trigger_events"].to_dataframe()
        assert len(table) == len(events["event_id"]) > 0
        np.testing.assert_array_equal(table["stop_time"].to_numpy(), events["t_s"])
        assert list(table["zone"]) == events["zone"] and list(table["rule"]) == events["rule"]
        maps = module["rate_maps"].to_dataframe()
        bins = module["spatial_bins"].to_dataframe()
        assert np.stack(maps["rate_map_hz"].to_numpy()).shape == (len(maps), len(bins))
        assert (maps["information_bits_per_spike"] >= 0).all()
    # The zone's mass is a probability (a fact of the posterior), and events fire only where the rule's mass held.
    assert all(0.0 <= m <= 1.0 + 1e-12 for m in steps["zone_mass_goal"])
    assert all(m >= 0.6 for m in events["zone_mass"])


def test_the_log_carries_the_files_spikes_and_positions_as_a_rig_sends_them(round_trip, simulated):
    result = read_log(round_trip["log"])
    assert result.clean_close
    spikes_t, frames_t, frames_xy, kinds, controls = [], [], [], [], []
    heartbeats = []
    for record in result.records:
        if record.type != "input":
            continue
        if record.channel == CHANNEL_CONTROL:
            controls.append(protocol.decode_control_request(record.payload).command)
            continue
        assert record.channel == CHANNEL_RIG
        msg = protocol.decode(record.payload)
        kinds.append(type(msg).__name__)
        if type(msg) is SpikeBatch:
            spikes_t.append(msg.t_s)
        elif type(msg) is TrackerFrames:
            frames_t.append(msg.t_s)
            frames_xy.append(msg.xy_cm)
        elif type(msg).__name__ == "Heartbeat":
            heartbeats.append(msg.t_s)
    assert kinds[:2] == ["SourceAnnounce", "SourceAnnounce"]
    assert controls == ["start_learning", "fit", "arm"]
    # A heartbeat at least once per decoding step (PROTOCOL.md, section 5).
    assert np.max(np.diff(heartbeats)) <= 0.02 + 1e-9
    all_spikes = np.sort(np.concatenate(list(simulated["units"].values())))
    got = np.concatenate(spikes_t)
    in_range = all_spikes[(all_spikes >= got[0]) & (all_spikes <= got[-1])]
    np.testing.assert_array_equal(got, in_range)
    # Metres in the file, cm on the wire: exactly * 100 (NWB's conversion rule, data * conversion in `unit`).
    t = np.concatenate(frames_t)
    idx = np.searchsorted(simulated["t"], t)
    np.testing.assert_allclose(np.concatenate(frames_xy), simulated["xy_cm"][idx], rtol=1e-12, atol=1e-9)


def test_a_mock_file_in_cm_with_gaps_unsorted_times_and_heading_in_degrees(simulated, tmp_path):
    nwb = mock_NWBFile(session_start_time=START)
    for unit_id, times in list(simulated["units"].items())[:20]:
        nwb.add_unit(spike_times=times[times < 30.0], id=unit_id)
    t = simulated["t"][simulated["t"] < 30.0]
    xy = simulated["xy_cm"][: t.size].copy()
    xy[100:160] = np.nan                       # the tracker lost the animal
    keep = (t < 10.0) | (t > 12.0)             # and a two-second gap with no samples at all
    t, xy = t[keep], xy[keep]
    swap = np.arange(t.size)
    swap[[5, 6]] = swap[[6, 5]]                # two samples written out of order
    heading_deg = np.linspace(0, 720, t.size)
    series = mock_SpatialSeries(name="led", data=xy[swap], timestamps=t[swap], unit="cm", rate=None)
    nwb.add_acquisition(Position(name="camera", spatial_series=[series]))
    mock_CompassDirection(spatial_series=mock_SpatialSeries(name="heading", data=heading_deg, timestamps=t,
                                                             unit="degrees", rate=None), nwbfile=nwb)
    path = _write(nwb, tmp_path / "mock.nwb")
    rec = read_recording(path)
    assert rec.position_name == "camera/led"
    np.testing.assert_array_equal(rec.frame_t_s, t)
    np.testing.assert_array_equal(rec.frame_xy_cm, xy)  # cm stays cm; NaN stays a lost frame
    assert any("unsorted" in note for note in rec.notes)
    # Degrees to radians, wrapped to (-pi, pi]: exp(i*theta) is the same angle (common practice).
    np.testing.assert_allclose(np.exp(1j * rec.frame_head_rad), np.exp(1j * np.deg2rad(heading_deg)), atol=1e-9)
    result = import_nwb(path, tmp_path / "log", learn_s=(0.0, 20.0))
    assert result.learn_intervals_s[0][1] == 20.0 and read_log(result.log_dir).clean_close


def _plain_file(sim, path, position_unit="meters", with_position=True, spike_times=True):
    nwb = NWBFile(session_description="bad input case", identifier="bad", session_start_time=START)
    if spike_times:
        for unit_id, times in list(sim["units"].items())[:5]:
            nwb.add_unit(spike_times=times[times < 20], id=unit_id)
    else:
        nwb.add_unit_column(name="quality", description="sorting quality")
        nwb.add_unit(quality=1.0, id=1)
    if with_position:
        t = sim["t"][sim["t"] < 20]
        nwb.add_acquisition(Position(spatial_series=[SpatialSeries(
            name="pos", data=sim["xy_cm"][: t.size], timestamps=t, reference_frame="corner", unit=position_unit)]))
    return _write(nwb, path)


@pytest.mark.parametrize("case, words", [
    ("no_position", "holds no Position container"),
    ("no_unit", "names no unit"),
    ("pixels", "not a length placeloop knows"),
    ("no_spike_times", "no spike_times column"),
    ("truncated", "not a readable NWB file"),
    ("not_nwb", "not a readable NWB file"),
])
def test_bad_input_is_one_clear_sentence_and_leaves_no_session_behind(simulated, tmp_path, capsys, case, words):
    path = tmp_path / "in.nwb"
    if case == "no_position":
        _plain_file(simulated, path, with_position=False)
    elif case == "no_unit":
        _plain_file(simulated, path, position_unit="")
    elif case == "pixels":
        _plain_file(simulated, path, position_unit="pixels")
    elif case == "no_spike_times":
        _plain_file(simulated, path, spike_times=False)
    elif case == "truncated":
        data = _plain_file(simulated, path).read_bytes()
        path.write_bytes(data[: len(data) // 3])
    else:
        path.write_text("session,animal\n1,m1\n")
    out = tmp_path / "session"
    assert cli.main(["import", str(path), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert words in err and err.count("\n") == 1, err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.nwb"]


def test_pixels_import_with_a_scale_and_mean_waveforms_are_named_not_marks(simulated, tmp_path, capsys):
    path = _plain_file(simulated, tmp_path / "px.nwb", position_unit="pixels")
    rec = read_recording(path, cm_per_unit=0.5)
    with NWBHDF5IO(str(path), "r") as io:
        np.testing.assert_allclose(rec.frame_xy_cm, io.read().acquisition["Position"]["pos"].data[:] * 0.5)
    wf = _recording_in_metres(simulated, tmp_path / "wf.nwb", waveforms=True)
    assert cli.main(["import", str(wf), "--out", str(tmp_path / "s"), "--stop-s", "30"]) == 0
    assert "mean waveforms, one per unit: not marks" in capsys.readouterr().out
    assert cli.main(["import", str(wf), "--out", str(tmp_path / "s2"), "--marks"]) == 2
    assert "holds no FeatureExtraction" in capsys.readouterr().err and not (tmp_path / "s2").exists()


def test_learning_part_from_epochs_trials_or_seconds(simulated, tmp_path):
    rec = read_recording(_recording_in_metres(simulated, tmp_path / "r.nwb"))
    rec.trials = [(10.0, 20.0, ()), (25.0, 30.0, ()), (40.0, 50.0, ())]
    assert learning_intervals(rec, 0.0, 140.0) == ([(0.0, LEARN_S)], "the file's first epoch")
    assert learning_intervals(rec, 0.0, 140.0, learn_epoch="test")[0] == [(LEARN_S, 140.0)]
    assert learning_intervals(rec, 0.0, 140.0, learn_trials=(0, 2))[0] == [(10.0, 20.0), (25.0, 30.0)]
    assert learning_intervals(rec, 5.0, 140.0, learn_s=(0.0, 60.0))[0] == [(5.0, 60.0)]
    with pytest.raises(NwbImportError, match="no epoch is tagged 'sleep'"):
        learning_intervals(rec, 0.0, 140.0, learn_epoch="sleep")
    with pytest.raises(NwbImportError, match="one way only"):
        learning_intervals(rec, 0.0, 140.0, learn_s=(0, 1), learn_epoch="learn")


def test_the_guessed_environment_covers_the_positions(simulated):
    rng = np.random.default_rng(0)
    # The simulated animal forages in a round arena 90 cm across: a circle around all of it.
    env = guess_environment(simulated["xy_cm"], 2)
    assert env["kind"] == "circle"
    assert np.hypot(*(simulated["xy_cm"] - env["center_cm"]).T).max() <= env["radius_cm"]
    box = rng.uniform((0, 0), (120, 60), (5000, 2))
    env = guess_environment(box, 2)
    assert env["kind"] == "rectangle" and env["width_cm"] >= 120 and env["height_cm"] >= 60
    line = np.column_stack([rng.uniform(0, 200, 5000), rng.normal(0, 1, 5000)])
    env = guess_environment(line, 2)
    assert env["kind"] == "linear_track" and env["end_cm"][0] - env["start_cm"][0] >= 200


def test_a_missing_extra_says_what_to_install(monkeypatch, tmp_path):
    monkeypatch.setitem(__import__("sys").modules, "pynwb", None)
    with pytest.raises(NwbImportError, match=r"pip install 'placeloop\[nwb\]'"):
        read_recording(tmp_path / "x.nwb")


def test_a_missing_table_library_says_what_to_install(monkeypatch, round_trip, tmp_path, capsys):
    monkeypatch.setitem(__import__("sys").modules, "pyarrow", None)
    assert cli.main(["export", str(round_trip["log"]), "--format", "csv", "--out", str(tmp_path / "t")]) == 2
    assert "pip install 'placeloop[nwb]'" in capsys.readouterr().err


def test_export_refuses_to_overwrite(round_trip, capsys):
    assert cli.main(["export", str(round_trip["log"]), "--out", str(round_trip["nwb"])]) == 2
    assert "exists already" in capsys.readouterr().err
    assert math.isfinite(round_trip["summary"]["decode"]["median_error_cm"])
