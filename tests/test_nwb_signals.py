"""NWB marks and LFP in (placeloop import --marks, --lfp): files made with pynwb, replayed through the loop.

Every file is built with pynwb's own API (``FeatureExtraction``,
``ElectricalSeries`` in an ``LFP`` container, the electrodes table) or its
testing helpers (``pynwb.testing.mock.ecephys``), so the layout is the
standard's reference implementation's. The marked spikes, LFP and positions
written into them come from the simulated rig (invented data): what is
checked is that the file's values reach the log as the NWB schema defines
them (``data * conversion`` in volts for an ElectricalSeries; features as
stored) and that a replay of the import decodes and detects with clean
counters.
"""

import datetime
import json

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

from hdmf.common import DynamicTableRegion  # noqa: E402
from pynwb import NWBHDF5IO, NWBFile  # noqa: E402
from pynwb.behavior import Position, SpatialSeries  # noqa: E402
from pynwb.ecephys import LFP, ElectricalSeries, FeatureExtraction  # noqa: E402
from pynwb.testing.mock.ecephys import mock_ElectricalSeries  # noqa: E402
from pynwb.testing.mock.file import mock_NWBFile  # noqa: E402

from decoder.config import load_config  # noqa: E402
from decoder.messages import GroupAnnounce, MarkedSpikes, TrackerFrames  # noqa: E402
from decoder.signals.lfp_chunk import LfpChunk  # noqa: E402
from rig_adapters import cli  # noqa: E402
from rig_adapters.sessions.recorder import read_log  # noqa: E402
from rig_adapters.sim.settings import SimulationSettings  # noqa: E402
from rig_adapters.sim.simulation import SimulatedSession  # noqa: E402
from rig_adapters.wire import protocol  # noqa: E402
from rig_adapters.wire.ingest import CHANNEL_RIG  # noqa: E402

from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
START = datetime.datetime(2026, 3, 2, 10, 30, tzinfo=datetime.timezone.utc)
MARKS_S, LFP_S = 150.0, 60.0


def _simulate(config_path: Path, until_s: float, seed: int) -> dict:
    config = load_config(config_path)
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=seed)
    out = {"marks_t": [], "marks_g": [], "marks": [], "t": [], "xy": [], "lfp": []}
    for msg in session.messages(until_s=until_s):
        if type(msg) is MarkedSpikes:
            out["marks_t"].append(msg.t_s)
            out["marks_g"].append(msg.group_id)
            out["marks"].append(msg.marks_uv)
        elif type(msg) is TrackerFrames and msg.source == "truth":
            out["t"].append(msg.t_s)
            out["xy"].append(msg.xy_cm)
        elif type(msg) is LfpChunk:
            out["lfp"].append(msg)
    return out


def _write(nwb, path):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def _file_with_position(sim, identifier):
    nwb = NWBFile(session_description="invented scenario", identifier=identifier, session_start_time=START)
    behavior = nwb.create_processing_module("behavior", "tracked behaviour")
    behavior.add(Position(spatial_series=[SpatialSeries(
        name="head_position", data=np.concatenate(sim["xy"]) / 100.0, timestamps=np.concatenate(sim["t"]),
        reference_frame="arena corner", unit="meters")]))
    return nwb


def _electrodes(nwb, n_groups, per_group):
    device = nwb.create_device(name="drive")
    groups = [nwb.create_electrode_group(name=f"tetrode{g}", description="tetrode", location="CA1", device=device)
              for g in range(n_groups)]
    for g in groups:
        for _ in range(per_group):
            nwb.add_electrode(location="CA1", group=g)
    return groups


def _marks_file(sim, path, feature_counts=None):
    """One FeatureExtraction per tetrode in an ecephys module: peak amplitude per channel (pynwb's API)."""
    nwb = _file_with_position(sim, "marks-arena")
    t, g, m = (np.concatenate(sim[k]) for k in ("marks_t", "marks_g", "marks"))
    group_ids = np.unique(g)
    _electrodes(nwb, group_ids.size, 4)
    ecephys = nwb.create_processing_module("ecephys", "spike features")
    for row, gid in enumerate(group_ids):
        pick = g == gid
        n_features = 1 if feature_counts is None else feature_counts[row]
        features = np.repeat(m[pick][:, :, None], n_features, axis=2).astype(np.float64)
        region = DynamicTableRegion(name="electrodes", data=list(range(4 * row, 4 * row + 4)),
                                    description=f"tetrode {gid}", table=nwb.electrodes)
        ecephys.add(FeatureExtraction(name=f"features_tetrode{gid}", electrodes=region,
                                      description=["peak amplitude (uV)", "peak again"][:n_features],
                                      times=t[pick], features=features))
    return _write(nwb, path), (t, g, m)


@pytest.fixture(scope="module")
def marks_sim():
    return _simulate(ROOT / "configs" / "tetrode_marks_arena.toml", MARKS_S, seed=3)


def test_marks_import_then_replay_decodes_clusterless_with_clean_counters(marks_sim, tmp_path, capsys):
    path, (t, g, m) = _marks_file(marks_sim, tmp_path / "marks.nwb")
    log_dir = tmp_path / "imported"
    assert cli.main(["import", str(path), "--out", str(log_dir), "--marks", "--learn-s", "0:110"]) == 0
    assert "marked spikes of 8 electrode groups" in capsys.readouterr().out
    skeleton = (log_dir / "config.toml").read_text()
    assert "[marks]\nenabled = true" in skeleton
    config = tmp_path / "replay.toml"
    config.write_text(skeleton.replace("learn_s = 0.0", "learn_s = 0.0\ncross_validate = false"))
    summary_path = tmp_path / "summary.json"
    assert cli.main(["replay", str(log_dir), "--config", str(config), "--summary", str(summary_path)]) == 0
    summary = json.loads(summary_path.read_text())
    assert summary["input"]["bad_messages"] == 0, summary["input"]["bad_reasons"]
    assert summary["session"]["state"] == "decoding" and summary["decode"]["steps"] > 1000
    # A clusterless decoder on an 80 cm arena from 8 tetrodes: well under a quarter of the arena's side.
    assert summary["decode"]["median_error_cm"] < 20.0, summary["decode"]
    # The file's features reach the wire as stored (FeatureExtraction: features[event, channel, feature]).
    groups, got_t, got_m = None, [], []
    for record in read_log(log_dir).records:
        if record.type == "input" and record.channel == CHANNEL_RIG:
            msg = protocol.decode(record.payload)
            if type(msg) is GroupAnnounce:
                groups = msg
            elif type(msg) is MarkedSpikes:
                got_t.append(msg.t_s)
                got_m.append(msg.marks_uv)
    assert groups.group_channels.tolist() == [4] * 8
    got_t = np.concatenate(got_t)
    order = np.argsort(t, kind="stable")
    keep = (t[order] >= got_t[0]) & (t[order] <= got_t[-1])
    np.testing.assert_array_equal(got_t, t[order][keep])
    np.testing.assert_array_equal(np.concatenate(got_m), m[order][keep].astype(np.float32))


def test_two_features_per_channel_make_marks_of_eight_values(marks_sim, tmp_path):
    from rig_adapters.exchange.nwb_reading import read_recording

    path, _ = _marks_file(marks_sim, tmp_path / "two.nwb", feature_counts=[2] * 8)
    rec = read_recording(path, marks=True)
    assert rec.marks.group_channels.tolist() == [8] * 8 and rec.unit_ids.size == 0


def test_feature_counts_that_differ_between_electrode_groups_are_one_sentence(marks_sim, tmp_path, capsys):
    path, _ = _marks_file(marks_sim, tmp_path / "odd.nwb", feature_counts=[1] * 7 + [2])
    out = tmp_path / "session"
    assert cli.main(["import", str(path), "--out", str(out), "--marks"]) == 2
    err = capsys.readouterr().err
    assert "different numbers of features per channel" in err and err.count("\n") == 1, err
    assert not out.exists()


def test_marks_asked_of_a_file_without_any_say_so(marks_sim, tmp_path, capsys):
    nwb = _file_with_position(marks_sim, "no-marks")
    nwb.add_unit(spike_times=[1.0, 2.0], id=1)
    path = _write(nwb, tmp_path / "plain.nwb")
    assert cli.main(["import", str(path), "--out", str(tmp_path / "s"), "--marks"]) == 2
    assert "holds no FeatureExtraction" in capsys.readouterr().err


# -- LFP ------------------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def ripple_sim():
    return _simulate(ROOT / "configs" / "w_maze_ripples.toml", LFP_S, seed=7)


def _lfp_file(sim, path, nan_at=None):
    """Sorted units, position in metres, and the LFP as int16 counts with NWB's conversion to volts."""
    from decoder.messages import SpikeBatch

    nwb = _file_with_position(sim, "w-maze-ripples")
    config = load_config(ROOT / "configs" / "w_maze_ripples.toml")
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=7)
    per_unit: dict[int, list] = {}
    for msg in session.messages(until_s=LFP_S):
        if type(msg) is SpikeBatch:
            for u in np.unique(msg.unit_id):
                per_unit.setdefault(int(u), []).append(msg.t_s[msg.unit_id == u])
    for u, parts in sorted(per_unit.items()):
        nwb.add_unit(spike_times=np.concatenate(parts), id=u)
    chunks = sim["lfp"]
    counts = np.concatenate([c.samples for c in chunks]).astype(np.float64)
    if nan_at is not None:
        counts[nan_at, 0] = np.nan
    _electrodes(nwb, 2, counts.shape[1] // 2)
    region = nwb.create_electrode_table_region(list(range(counts.shape[1])), "LFP channels")
    uv = chunks[0].uv_per_count
    ecephys = nwb.create_processing_module("ecephys", "LFP")
    ecephys.add(LFP(electrical_series=ElectricalSeries(
        name="lfp_ca1", data=counts if nan_at is not None else counts.astype(np.int16), electrodes=region,
        starting_time=float(chunks[0].t_s), rate=float(chunks[0].rate_hz), conversion=uv * 1e-6)))
    return _write(nwb, path), counts * uv


def test_lfp_import_then_replay_detects_ripples_with_clean_counters(ripple_sim, tmp_path, capsys):
    path, lfp_uv = _lfp_file(ripple_sim, tmp_path / "ripples.nwb")
    log_dir = tmp_path / "imported"
    assert cli.main(["import", str(path), "--out", str(log_dir), "--lfp", "lfp_ca1", "--learn-s", "0:40"]) == 0
    printed = capsys.readouterr().out
    skeleton = (log_dir / "config.toml").read_text()
    assert '[ripples]\nsource = "lfp"' in skeleton
    # The scenario's own [ripples] settings and rule, as a user completes the skeleton.
    config = tmp_path / "replay.toml"
    config.write_text(skeleton.replace("learn_s = 0.0", "learn_s = 0.0\ncross_validate = false")
                      + '\n[[rules]]\nname = "disrupt"\nkind = "ripple"\n')
    summary_path = tmp_path / "summary.json"
    assert cli.main(["replay", str(log_dir), "--config", str(config), "--summary", str(summary_path)]) == 0
    summary = json.loads(summary_path.read_text())
    counters = summary["ripples"]["counters"]
    n_chunks = int(printed.split("LFP: ")[1].split(" chunks")[0])
    assert counters["lfp_chunks"] == n_chunks > 0
    assert counters["lfp_gaps"] == counters["lfp_overlaps"] == counters["lfp_unusable"] == 0
    assert counters["ripples"] > 0, counters  # the scenario's animal rests at the wells, where ripples come
    assert summary["input"]["bad_messages"] == 0, summary["input"]["bad_reasons"]
    # NWB's ElectricalSeries rule: data * conversion is in volts; the wire carries µV.
    got = [protocol.decode(r.payload) for r in read_log(log_dir).records
           if r.type == "input" and r.channel == CHANNEL_RIG]
    lfp = [m for m in got if type(m) is LfpChunk]
    first = round((lfp[0].t_s - ripple_sim["lfp"][0].t_s) * lfp[0].rate_hz)
    stacked = np.concatenate([c.samples for c in lfp]).astype(np.float64)
    np.testing.assert_allclose(stacked, lfp_uv[first: first + stacked.shape[0]], rtol=1e-6, atol=1e-3)
    assert all(c.samples.shape[0] <= 6 for c in lfp)  # 4 ms at 1.5 kHz


def test_lfp_with_nan_is_one_sentence_naming_the_series_and_time(ripple_sim, tmp_path, capsys):
    path, _ = _lfp_file(ripple_sim, tmp_path / "nan.nwb", nan_at=3000)
    out = tmp_path / "session"
    assert cli.main(["import", str(path), "--out", str(out), "--lfp", "lfp_ca1"]) == 2
    err = capsys.readouterr().err
    assert "'ecephys/LFP/lfp_ca1' holds NaN or infinite samples" in err and err.count("\n") == 1, err
    assert not out.exists()


def test_an_lfp_series_named_wrong_lists_the_files_series(tmp_path, capsys):
    nwb = mock_NWBFile(session_start_time=START)
    nwb.add_unit(spike_times=[0.5, 1.0], id=1)
    nwb.add_acquisition(Position(spatial_series=[SpatialSeries(
        name="pos", data=np.ones((20, 2)), timestamps=np.arange(20) / 10, reference_frame="corner", unit="cm")]))
    mock_ElectricalSeries(name="raw_probe", nwbfile=nwb)
    path = _write(nwb, tmp_path / "mock.nwb")
    assert cli.main(["import", str(path), "--out", str(tmp_path / "s"), "--lfp", "lfp"]) == 2
    err = capsys.readouterr().err
    assert "no ElectricalSeries is named 'lfp'; the file has ['raw_probe']" in err, err


def _units_with_amplitudes(sim, path, short_row=None):
    """A Units table with a ragged per-spike amplitude column (pynwb: add_unit_column(index=True)), one unit per
    simulated tetrode's first channel, each unit on its tetrode's electrode group."""
    nwb = _file_with_position(sim, "unit-amplitudes")
    t, g, m = (np.concatenate(sim[k]) for k in ("marks_t", "marks_g", "marks"))
    groups = _electrodes(nwb, 2, 4)
    nwb.add_unit_column(name="spike_amplitudes", description="peak amplitude per spike (uV)", index=True)
    expected = {}
    for row, gid in enumerate(np.unique(g)[:2]):
        pick = g == gid
        amplitudes = m[pick][:, 0].astype(np.float64)
        if row == short_row:
            amplitudes = amplitudes[:-1]
        nwb.add_unit(spike_times=t[pick], spike_amplitudes=amplitudes, electrode_group=groups[row], id=row)
        expected[groups[row].name] = (t[pick], m[pick][:, 0])
    return _write(nwb, path), expected


def test_per_spike_amplitudes_of_the_units_table_are_marks_of_width_one_by_electrode_group(marks_sim, tmp_path):
    from rig_adapters.exchange.nwb_reading import read_recording

    path, expected = _units_with_amplitudes(marks_sim, tmp_path / "amplitudes.nwb")
    rec = read_recording(path, marks=True)
    assert list(rec.marks.group_names) == sorted(expected) and rec.marks.group_channels.tolist() == [1, 1]
    assert np.all(np.diff(rec.marks.t_s) >= 0)
    for gid, name in enumerate(rec.marks.group_names):
        pick = rec.marks.group_id == gid
        t, amplitude = expected[name]
        # As stored in the ragged column (pynwb's VectorIndex), one value per spike time, in time order.
        np.testing.assert_array_equal(rec.marks.t_s[pick], np.sort(t))
        np.testing.assert_array_equal(rec.marks.marks_uv[pick, 0], amplitude[np.argsort(t, kind="stable")]
                                      .astype(np.float32))


def test_amplitudes_that_do_not_match_the_spike_times_are_one_sentence(marks_sim, tmp_path, capsys):
    path, _ = _units_with_amplitudes(marks_sim, tmp_path / "short.nwb", short_row=1)
    out = tmp_path / "session"
    assert cli.main(["import", str(path), "--out", str(out), "--marks"]) == 2
    err = capsys.readouterr().err
    assert "per-spike amplitudes need one value per spike" in err and err.count("\n") == 1, err
    assert not out.exists()
