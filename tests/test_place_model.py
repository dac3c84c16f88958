"""Tests for decoder.encoding.place_model.

Each check of the science names its source beside the assertion: a reference
library (numpy, scipy), a published formula, or common practice. Trajectories
and place cells below are invented to drive the model; where a test judges
the model by them (the cross-validated error) it is a sanity bound, and says so.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import ndimage

from decoder.inference.decoding import BayesDecoder
from decoder.space.environments import Arena, LinearTrack
from decoder.encoding.place_model import (
    FORMAT_VERSION,
    ModelFileError,
    PlaceModel,
)
from decoder.encoding.running_speed import running_speed as _window_speed
from decoder.encoding.running_speed import running_speed_numpy as _window_speed_numpy
from decoder.encoding.spatial_metrics import skaggs_information

FPS = 30.0


# --- invented scenarios -----------------------------------------------------------


def circle_run(duration_s, *, center=(50.0, 50.0), radius_cm=30.0, speed_cm_s=15.0, fps=FPS, t0_s=100.0):
    """Frames of an animal running round a circle at constant speed."""
    t = t0_s + np.arange(int(duration_s * fps)) / fps
    angle = speed_cm_s / radius_cm * (t - t0_s)
    xy = np.column_stack([center[0] + radius_cm * np.cos(angle), center[1] + radius_cm * np.sin(angle)])
    return t, xy


def foraging(duration_s, *, size_cm=100.0, fps=FPS, seed=0):
    """Frames of a random forager in a square box (a smoothed random walk, reflected at the walls)."""
    rng = np.random.default_rng(seed)
    n = int(duration_s * fps)
    dt = 1.0 / fps
    xy = np.empty((n, 2))
    pos, vel = np.full(2, size_cm / 2), np.zeros(2)
    kicks = rng.normal(0.0, 4.0, (n, 2))
    for i in range(n):
        vel = 0.9 * vel + kicks[i]
        pos = pos + vel * dt
        low, high = pos < 1.0, pos > size_cm - 1.0
        pos = np.clip(pos, 1.0, size_cm - 1.0)
        vel = np.where(low, np.abs(vel), np.where(high, -np.abs(vel), vel))
        xy[i] = pos
    return np.arange(n) * dt, xy


def place_cell_spikes(t, xy, centers_cm, sigma_cm, peak_hz, *, base_hz=0.1, seed=1):
    """Poisson spikes of Gaussian place fields along a trajectory; unit ids 100, 101, ..."""
    rng = np.random.default_rng(seed)
    dt = np.diff(t, append=t[-1] + (t[-1] - t[-2]))
    d2 = ((xy[:, None, :] - centers_cm[None]) ** 2).sum(axis=-1)
    rate = peak_hz * np.exp(-d2 / (2 * sigma_cm**2)) + base_hz
    counts = rng.poisson(rate * dt[:, None])
    frame, unit = np.nonzero(counts)
    reps = counts[frame, unit]
    frame, unit = np.repeat(frame, reps), np.repeat(unit, reps)
    st = t[frame] + rng.uniform(0.0, 1.0, frame.size) * dt[frame]
    order = np.argsort(st)
    return st[order], 100 + unit[order]


def feed_live(model, t, xy, st, su, *, chunk_s=0.5, lag_s=0.3, seed=3):
    """Deliver frames in uneven chunks and spikes lagging behind them, as a rig would."""
    rng = np.random.default_rng(seed)
    edges = [t[0]]
    while edges[-1] <= t[-1]:
        edges.append(edges[-1] + rng.uniform(0.2, 2.0) * chunk_s)
    sent = 0
    for lo, hi in zip(edges[:-1], edges[1:]):
        f = (t >= lo) & (t < hi)
        model.update_frames(t[f], xy[f])
        upto = np.searchsorted(st, hi - lag_s)
        model.update_spikes(st[sent:upto], su[sent:upto])
        sent = max(sent, upto)
    model.update_spikes(st[sent:], su[sent:])


def box(bin_cm=4.0):
    return Arena.rectangle(width_cm=100, height_cm=100, bin_cm=bin_cm)


# --- running speed kernel --------------------------------------------------------------


def test_window_speed_kernel_matches_numpy_twin_and_polyfit():
    rng = np.random.default_rng(11)
    t = np.cumsum(rng.uniform(0.01, 0.05, 300))
    xy = np.cumsum(rng.normal(0, 0.5, (300, 2)), axis=0)
    fast = _window_speed(t, xy, 5, 290, 0.125, 0.5)
    twin = _window_speed_numpy(t, xy, 5, 290, 0.125, 0.5)
    # numpy twin: same arguments, same result up to summation order.
    np.testing.assert_allclose(fast, twin, rtol=1e-9)
    k = 100
    win = np.abs(t - t[k]) <= 0.125
    vx = np.polyfit(t[win], xy[win, 0], 1)[0]
    vy = np.polyfit(t[win], xy[win, 1], 1)[0]
    # numpy.polyfit: least-squares slope of position on time over the window.
    assert fast[k - 5] == pytest.approx(np.hypot(vx, vy), rel=1e-9)


def test_window_speed_uses_neighbours_at_a_low_frame_rate():
    t = np.arange(10) * 0.2
    xy = np.column_stack([5.0 * t, np.zeros(10)])
    # A 5 cm/s straight run; at 5 Hz the quarter-second window holds one frame,
    # so the neighbours carry the fit (least squares on a line is exact).
    np.testing.assert_allclose(_window_speed(t, xy, 0, 10, 0.125, 0.5), 5.0)
    assert np.isnan(_window_speed(t, xy, 0, 10, 0.125, 0.1)).all()


# --- occupancy -------------------------------------------------------------------------


def test_occupancy_matches_histogram2d_with_dt_weights():
    env = box(5.0)
    t, xy = circle_run(40.0)
    xy[200:204] = np.nan  # lost frames inside the allowed gap
    xy[600:630] = np.nan  # a 1 s tracking gap, longer than max_frame_gap_s
    t[450] = t[449] - 0.01  # one frame out of order
    model = PlaceModel(env, smooth_cm=0.0, min_occupancy_s=0.0)
    model.update_frames(t, xy)
    occupancy = model.fit().occupancy_s_

    keep = np.all(np.isfinite(xy), axis=1)
    keep[450] = False
    tv, xyv = t[keep], xy[keep]
    dt = np.diff(tv)
    settled = tv[:-1] + 0.5 * model.speed_window_s <= tv[-1]
    use = settled & (dt <= model.max_frame_gap_s)
    hist, _, _ = np.histogram2d(
        xyv[:-1][use, 0], xyv[:-1][use, 1], bins=[env.x_edges_cm, env.y_edges_cm], weights=dt[use]
    )
    # numpy.histogram2d with dt weights on the same edges; histogram2d is indexed
    # [ix, iy], the model row-major (iy, ix).
    np.testing.assert_allclose(occupancy, hist.T.ravel(), rtol=1e-12, atol=1e-12)
    c = model.counters_
    assert c["frames_lost"] == 34
    assert c["frames_out_of_order"] == 1


def test_speed_filter_drops_immobile_frames_despite_jitter():
    env = box(5.0)
    rng = np.random.default_rng(5)
    t1, run1 = circle_run(20.0, t0_s=0.0)
    t2 = t1[-1] + np.arange(1, 601) / FPS  # 20 s sitting still
    still = run1[-1] + rng.normal(0.0, 0.1, (600, 2))  # 1 mm tracker jitter
    t3 = t2[-1] + np.arange(1, 601) / FPS
    run3 = circle_run(20.0, t0_s=0.0)[1]
    t = np.concatenate([t1, t2, t3])
    xy = np.concatenate([run1, still, run3])
    jitter_speed = np.hypot(*np.diff(still, axis=0).T) * FPS
    # Frame-to-frame differences read jitter as running (why a window is used; common practice).
    assert np.median(jitter_speed) > 3.0

    model = PlaceModel(env, min_speed_cm_s=3.0)
    model.update_spikes(np.array([5.0, 30.0, 31.0, 32.0, 50.0]), np.full(5, 1))
    model.update_frames(t, xy)
    ready = model.readiness()
    # Common practice: 2-5 cm/s excludes immobility; about 40 s of the 60 s were running.
    assert ready.running_time_s == pytest.approx(40.0, abs=0.5)
    assert model.counters_["spikes_not_running"] == 3
    assert model.counters_["spikes_placed"] == 2


# --- spikes: early, late, too late, unknown ----------------------------------------------


def test_early_and_late_spikes_land_in_the_interpolated_bin():
    track = LinearTrack((0, 0), (200, 0), bin_cm=2.0)
    t = np.arange(0, 20, 1 / FPS)
    xy = np.column_stack([10.0 * t, np.zeros_like(t)])  # 10 cm/s along the track
    model = PlaceModel(track, smooth_cm=0.0, min_occupancy_s=0.0, unit_ids=[1, 2, 3])
    # Early: unit 1 fires at 3.31 s (33.1 cm, bin 16) before any frame has arrived.
    model.update_spikes(np.array([3.31]), np.array([1]))
    model.update_frames(t[:240], xy[:240])  # frames up to 8 s
    # Late: unit 2 fires at 5.05 s (50.5 cm, bin 25), delivered 3 s behind the frames.
    model.update_spikes(np.array([5.05]), np.array([2]))
    model.update_frames(t[240:], xy[240:])
    # Too late: 12 s behind the newest frame, beyond max_spike_delay_s = 5 s.
    model.update_spikes(np.array([7.5]), np.array([3]))
    # Unknown unit: not among the unit_ids given.
    model.update_spikes(np.array([10.0]), np.array([9]))
    model.fit()
    counts = model.rate_maps_hz_ * model.occupancy_s_
    # Linear interpolation between the bracketing frames (common practice).
    assert np.argmax(counts[0]) == 16
    assert np.argmax(counts[1]) == 25
    assert counts[0, 16] == pytest.approx(1.0)
    assert counts[1, 25] == pytest.approx(1.0)
    assert counts[2].max() == pytest.approx(model.rate_floor_hz * model.occupancy_s_.max())
    c = model.counters_
    assert (c["spikes_placed"], c["spikes_too_late"], c["spikes_unknown_unit"]) == (2, 1, 1)


def test_spikes_in_a_gap_before_tracking_or_outside_are_counted_not_placed():
    env = box(5.0)
    t, xy = circle_run(10.0, t0_s=10.0)
    xy[90:120] = np.nan  # 13.0-14.0 s lost: a 1 s gap
    xy[200:230] = [150.0, 50.0]  # 16.7-17.7 s: tracked outside the box
    model = PlaceModel(env)
    model.update_spikes(np.array([5.0, 13.5, 17.0]), np.array([4, 4, 4]))
    model.update_frames(t, xy)
    model.update_spikes(np.array([np.nan]), np.array([4]))
    c = model.counters_
    assert c["spikes_in_tracking_gap"] == 2  # before the first frame, and inside the gap
    assert c["spikes_outside_environment"] == 1
    assert c["spikes_bad_time"] == 1
    assert c["spikes_placed"] == 0
    assert c["frames_outside_environment"] == 30


def test_a_full_spike_buffer_drops_the_oldest_and_counts_them(monkeypatch):
    monkeypatch.setattr("decoder.encoding.online_counts._MAX_PENDING_SPIKES", 100)
    model = PlaceModel(box(5.0))
    t, xy = circle_run(10.0, t0_s=0.0)
    # The tracker stalls: 150 spikes arrive with no frame to place them.
    model.update_spikes(np.linspace(0.1, 9.0, 150), np.full(150, 5))
    assert model.counters_["spikes_buffer_full"] == 50
    model.update_frames(t, xy)
    c = model.counters_
    # Common practice for a live loop: every spike is either placed or counted under a reason.
    assert c["spikes_placed"] + c["spikes_buffer_full"] == 150
    assert c["spikes_placed"] == 100


def test_online_chunks_equal_one_big_update():
    env = box(5.0)
    t, xy = foraging(150.0, seed=21)
    rng = np.random.default_rng(4)
    centers = rng.uniform(10, 90, (12, 2))
    st, su = place_cell_spikes(t, xy, centers, 8.0, rng.uniform(5, 15, 12))
    settings = dict(cv_block_s=20.0, cv_folds=3)

    live = PlaceModel(env, **settings)
    feed_live(live, t, xy, st, su)
    whole = PlaceModel(env, **settings)
    whole.update_spikes(st, su)  # every spike waits in the buffer ...
    whole.update_frames(t, xy)  # ... until the frames that cover it arrive

    live.fit()
    whole.fit()
    assert live.counters_ == whole.counters_
    np.testing.assert_array_equal(live.unit_ids_, whole.unit_ids_)
    np.testing.assert_array_equal(live.occupancy_s_, whole.occupancy_s_)
    np.testing.assert_array_equal(live.rate_maps_hz_, whole.rate_maps_hz_)
    cv_live, cv_whole = live.cross_validated_error_cm(), whole.cross_validated_error_cm()
    np.testing.assert_array_equal(cv_live.errors_cm, cv_whole.errors_cm)
    # Units first seen in any order come out in ascending id.
    assert list(live.unit_ids_) == sorted(live.unit_ids_)
    # Memory stays bounded: only a few seconds of frames are kept.
    assert live._ft.size <= (live.max_spike_delay_s + 2.0) * FPS


# --- fitting --------------------------------------------------------------------------------


def raster_session(env, seed=8):
    """A sweep over every row of the box at 20 cm/s, with spikes of three cells."""
    rows = []
    t0 = 0.0
    for i, y in enumerate(np.arange(1.0, 100.0, 2.0)):
        x = np.arange(0.5, 99.5, 20.0 / FPS)
        if i % 2:
            x = x[::-1]
        rows.append(np.column_stack([x, np.full_like(x, y)]))
    xy = np.concatenate(rows)
    t = t0 + np.arange(len(xy)) / FPS
    rng = np.random.default_rng(seed)
    centers = rng.uniform(20, 80, (3, 2))
    st, su = place_cell_spikes(t, xy, centers, 10.0, np.array([12.0, 8.0, 15.0]), seed=seed)
    return t, xy, st, su


def test_smoothed_rate_map_matches_scipy_gaussian_filter_away_from_edges():
    env = box(2.0)
    t, xy, st, su = raster_session(env)
    model = PlaceModel(env, smooth_cm=5.0, min_occupancy_s=0.0)
    model.update_spikes(st, su)
    model.update_frames(t, xy)
    model.fit()
    ny, nx = env.grid_shape
    occ = model.occupancy_s_.reshape(ny, nx)
    sigma_bins = 5.0 / 2.0
    inner = slice(12, -12)  # 24 cm from every wall: beyond 4 sigma, where the mask cannot matter
    # Only the last frames, at the far wall, wait for their speed window; the rest is visited.
    assert model.visited_mask_.reshape(ny, nx)[1:-1].all()
    for unit in range(len(model.unit_ids_)):
        # Unsmoothed counts are not exposed; rebuild them from the spikes at the interpolated position.
        raw = np.zeros(env.n_bins)
        sel = su == model.unit_ids_[unit]
        x = np.interp(st[sel], t, xy[:, 0])
        y = np.interp(st[sel], t, xy[:, 1])
        np.add.at(raw, env.bin_index(np.column_stack([x, y])), 1)
        smooth_counts = ndimage.gaussian_filter(raw.reshape(ny, nx), sigma_bins, mode="constant")
        smooth_time = ndimage.gaussian_filter(occ, sigma_bins, mode="constant")
        expected = np.maximum(smooth_counts / smooth_time, model.rate_floor_hz)
        got = model.rate_maps_hz_[unit].reshape(ny, nx)
        # scipy.ndimage.gaussian_filter of counts over gaussian_filter of occupancy.
        np.testing.assert_allclose(got[inner, inner], expected[inner, inner], rtol=1e-9)


def test_fit_masks_unvisited_bins_and_applies_the_floor():
    env = box(5.0)
    t, xy = circle_run(60.0)
    model = PlaceModel(env, min_occupancy_s=0.2, rate_floor_hz=0.05)
    model.update_spikes(t[::50] + 0.001, np.full(len(t[::50]), 3))
    model.update_frames(t, xy)
    model.fit()
    visited = model.visited_mask_
    assert 0 < visited.sum() < env.n_bins
    # The threshold applies to the running time around each bin, a Gaussian of
    # smooth_cm with weight 1 at the bin (common practice): it fills holes along
    # the path but not the far side of the box. Reference: scipy.ndimage.gaussian_filter.
    s = model.smooth_cm / env.bin_cm
    ny, nx = env.grid_shape
    around = ndimage.gaussian_filter(model.occupancy_s_.reshape(ny, nx), s, mode="constant") * 2 * np.pi * s * s
    inner = (slice(4, -4), slice(4, -4))
    np.testing.assert_array_equal(
        visited.reshape(ny, nx)[inner], (env.valid_mask.reshape(ny, nx) & (around >= 0.2))[inner]
    )
    assert np.all(visited[model.occupancy_s_ >= 0.2])
    assert np.all(model.rate_maps_hz_[:, visited] >= 0.05)
    assert np.all(model.rate_maps_hz_[:, ~visited] == 0.0)
    occ = np.where(visited, model.occupancy_s_, 0.0)
    bits, bits_s = skaggs_information(model.rate_maps_hz_, occ)
    np.testing.assert_allclose(model.info_bits_per_spike_, bits)
    # Skaggs et al. 1993: bits/s = bits/spike x occupancy-weighted mean rate.
    np.testing.assert_allclose(model.info_bits_per_s_, model.info_bits_per_spike_ * model.mean_rate_hz_)


def test_fit_before_any_running_says_what_is_missing():
    model = PlaceModel(box())
    with pytest.raises(ValueError, match="min_occupancy_s"):
        model.fit()
    with pytest.raises(ValueError, match="no evaluation sample"):
        model.cross_validated_error_cm()
    ready = model.readiness(with_cv_error=True)
    assert (ready.coverage, ready.running_time_s, ready.n_tuned_units) == (0.0, 0.0, 0)
    assert np.isnan(ready.median_cv_error_cm)


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("min_speed_cm_s", -1.0),
        ("speed_window_s", 0.0),
        ("smooth_cm", float("nan")),
        ("rate_floor_hz", 0.0),
        ("max_frame_gap_s", -0.5),
        ("cv_folds", 1),
        ("cv_block_s", 0.0),
        ("cv_window_s", "half"),
    ],
)
def test_bad_settings_name_the_setting(name, value):
    with pytest.raises(ValueError, match=name):
        PlaceModel(box(), **{name: value})


def test_bad_inputs_are_refused_at_the_boundary():
    model = PlaceModel(box(), unit_ids=[1, 2])
    with pytest.raises(ValueError, match="xy_cm must have shape"):
        model.update_frames(np.arange(3.0), np.zeros((3, 3)))
    with pytest.raises(ValueError, match="unit_ids must be integers"):
        model.update_spikes(np.arange(2.0), np.array([1.5, 2.0]))
    with pytest.raises(ValueError, match="environment"):
        PlaceModel("box")
    with pytest.raises(ValueError, match="twice"):
        PlaceModel(box(), unit_ids=[3, 3])


# --- cross-validation and readiness --------------------------------------------------------


@pytest.fixture(scope="module")
def foraging_model():
    """Ten minutes of foraging in a 100 cm box with 60 invented place cells.

    Fields 20-40 cm across (sigma 6-10 cm), peaks 5-20 Hz, 0.1 Hz out of
    field: common practice for CA1 place cells in a box.
    """
    t, xy = foraging(600.0, seed=2)
    rng = np.random.default_rng(9)
    n = 60
    st, su = place_cell_spikes(
        t, xy, rng.uniform(0, 100, (n, 2)), rng.uniform(6, 10, n)[None, :], rng.uniform(5, 20, n), seed=10
    )
    model = PlaceModel(box(4.0), smooth_cm=4.0)
    feed_live(model, t, xy, st, su, chunk_s=1.0)
    return model


def test_cross_validated_error_on_simulated_place_cells_is_small(foraging_model):
    result = foraging_model.cross_validated_error_cm()
    # Sanity bound on invented cells: 60 place cells with 0.5 s windows decode a
    # 100 cm box to well under 10 cm median error.
    assert result.median_cm < 10.0
    assert result.median_cm == pytest.approx(np.median(result.errors_cm))
    # Blocked folds (60 s blocks, 5 folds, 10 min): every fold holds out about a fifth.
    assert np.all(result.fold_n_samples > 0.1 * result.errors_cm.size)
    assert np.all(np.isfinite(result.fold_median_cm))


def test_cross_validation_beats_chance(foraging_model):
    result = foraging_model.cross_validated_error_cm()
    rng = np.random.default_rng(0)
    guesses = rng.uniform(0, 100, (2000, 2))
    truth = rng.uniform(0, 100, (2000, 2))
    chance = np.median(np.hypot(*(guesses - truth).T))
    # Common practice: a decoder must beat random guessing (about 50 cm median here) by far.
    assert result.median_cm < 0.3 * chance


def test_readiness_reports_coverage_time_and_tuned_units(foraging_model):
    ready = foraging_model.readiness(with_cv_error=True)
    assert 0.5 < ready.coverage <= 1.0
    assert 300.0 < ready.running_time_s <= 600.0
    assert ready.spikes_per_unit.shape == (60,)
    assert np.all(ready.spikes_per_unit > 0)
    # Every invented cell has a field; common practice calls >= 0.5 bits/spike and >= 1 Hz peak tuned.
    assert ready.n_tuned_units >= 55
    assert ready.median_cv_error_cm == pytest.approx(float(foraging_model.cross_validated_error_cm()))
    as_dict = dict(ready)
    assert as_dict["n_tuned_units"] == ready.n_tuned_units
    assert set(as_dict) == {
        "coverage", "running_time_s", "unit_ids", "spikes_per_unit", "n_tuned_units", "median_cv_error_cm",
        "walk_sd_cm_per_sqrt_s",
    }


# --- model file ---------------------------------------------------------------------------


def test_save_load_round_trip_decodes_identically(foraging_model, tmp_path):
    model = foraging_model.fit()
    path = tmp_path / "session.placemodel"
    model.save(path)
    assert path.exists() and not list(tmp_path.glob("*.partial"))
    loaded = PlaceModel.load(path)
    for name in ("unit_ids_", "rate_maps_hz_", "occupancy_s_", "visited_mask_", "field_size_", "sparsity_"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(model, name))
    assert loaded.environment == model.environment
    assert loaded.counters_ == model.counters_
    rows = np.array([0, 5, 17, 40])
    counts = np.array([2.0, 1.0, 3.0, 1.0])
    a, b = (
        BayesDecoder(m.rate_maps_hz_, m.environment, m.visited_mask_, 0.25).decode(rows, counts)
        for m in (model, loaded)
    )
    np.testing.assert_array_equal(a.posterior, b.posterior)
    np.testing.assert_array_equal(
        loaded.cross_validated_error_cm().errors_cm, model.cross_validated_error_cm().errors_cm
    )
    np.testing.assert_array_equal(loaded.fit().rate_maps_hz_, model.rate_maps_hz_)


def test_unfitted_model_round_trips_and_keeps_learning(tmp_path):
    model = PlaceModel(box(5.0), cv_folds=3)
    t, xy = circle_run(30.0)
    model.update_spikes(t[::7] + 0.001, np.full(len(t[::7]), 42))
    model.update_frames(t, xy)
    model.save(tmp_path / "m.npz")
    loaded = PlaceModel.load(tmp_path / "m.npz")
    assert not hasattr(loaded, "rate_maps_hz_")
    t2, xy2 = circle_run(30.0, t0_s=t[-1] + 1.0)
    loaded.update_spikes(t2[::7] + 0.001, np.full(len(t2[::7]), 42))
    loaded.update_frames(t2, xy2)
    assert loaded.fit().unit_ids_.tolist() == [42]
    assert loaded.counters_["spikes_placed"] > model.counters_["spikes_placed"] > 100
    assert loaded.readiness().running_time_s > model.readiness().running_time_s


def _rewrite_header(src, dst, **changes):
    with np.load(src, allow_pickle=False) as npz:
        arrays = {name: npz[name] for name in npz.files}
    header = json.loads(str(arrays["header"][()]))
    header.update(changes)
    arrays["header"] = np.array(json.dumps(header))
    with open(dst, "wb") as fh:
        np.savez(fh, **arrays)


@pytest.fixture
def saved(tmp_path):
    model = PlaceModel(box(10.0))
    t, xy = circle_run(20.0)
    model.update_frames(t, xy)
    model.fit().save(tmp_path / "good.npz")
    return tmp_path / "good.npz"


def test_other_version_is_refused(saved, tmp_path):
    _rewrite_header(saved, tmp_path / "v2.npz", version=FORMAT_VERSION + 1)
    expected = f"format version {FORMAT_VERSION + 1}.*reads version {FORMAT_VERSION}"
    with pytest.raises(ModelFileError, match=expected):
        PlaceModel.load(tmp_path / "v2.npz")


def test_truncated_file_is_refused(saved, tmp_path):
    data = saved.read_bytes()
    (tmp_path / "cut.npz").write_bytes(data[: len(data) // 2])
    with pytest.raises(ModelFileError, match="truncated or damaged"):
        PlaceModel.load(tmp_path / "cut.npz")


def test_files_that_are_not_models_are_refused(saved, tmp_path):
    (tmp_path / "notes.txt").write_text("rat 12, day 3: good running\n")
    with pytest.raises(ModelFileError, match="not a placeloop place-model file"):
        PlaceModel.load(tmp_path / "notes.txt")
    with open(tmp_path / "other.npz", "wb") as fh:
        np.savez(fh, weights=np.ones(3))
    with pytest.raises(ModelFileError, match="not a placeloop place-model file"):
        PlaceModel.load(tmp_path / "other.npz")
    _rewrite_header(saved, tmp_path / "foreign.npz", format="someone.elses.format")
    with pytest.raises(ModelFileError, match="not a placeloop place-model file"):
        PlaceModel.load(tmp_path / "foreign.npz")


# --- held arrivals: batching never changes a result -------------------------------------------


def arrivals(t, xy, st, su, *, frames_per_call=1, spike_batch_s=0.02, lag_s=0.01, late=(), seed=5):
    """The session as a rig delivers it: frame calls and spike batches in order of delivery.

    Spike batches of ``spike_batch_s`` arrive ``lag_s`` after they end;
    ``late`` holds ``(index, delay_s)`` pairs: spike ``index`` comes alone,
    ``delay_s`` after it fired. Returns a list of ``("f", t, xy)`` and
    ``("s", t, unit)`` in delivery order.
    """
    events = []
    for i in range(0, len(t), frames_per_call):
        events.append((t[i], 0, ("f", t[i : i + frames_per_call], xy[i : i + frames_per_call])))
    late_idx = {i for i, _ in late}
    on_time = np.array([i not in late_idx for i in range(len(st))], dtype=bool)
    batch = np.floor(st / spike_batch_s).astype(np.int64)
    for b in np.unique(batch[on_time]):
        sel = on_time & (batch == b)
        events.append(((b + 1) * spike_batch_s + lag_s, 1, ("s", st[sel], su[sel])))
    for i, delay in late:
        events.append((st[i] + delay, 1, ("s", st[i : i + 1], su[i : i + 1])))
    events.sort(key=lambda e: (e[0], e[1]))
    return [e[2] for e in events]


def feed(model, events, *, read_every=0):
    """Deliver ``events``; every ``read_every`` events, read the state as the pipeline does."""
    for n, (kind, a, b) in enumerate(events, 1):
        if kind == "f":
            model.update_frames(a, b)
        else:
            model.update_spikes(a, b)
        if read_every and n % read_every == 0:
            model.occupancy_so_far_s()
            _ = model.counters_
    return model


def assert_same_model(a, b, *, pair_order=True):
    """Every learned array, counter and evaluation sample equal, to the bit (numpy.array_equal)."""
    a.fit()
    b.fit()
    assert a.counters_ == b.counters_
    for name in PlaceModel._LEARNED:
        assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=True), name
    for name in ("_fold_occ", "_cv_t", "_cv_xy", "_cv_fold"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    # Per-fold counts in output order (rows are kept in order of first arrival).
    fold_counts = [m._fold_counts[:, : m.n_units][:, m._output_order()] for m in (a, b)]
    assert np.array_equal(*fold_counts)
    for x, y in zip(a._cv_counts(), b._cv_counts()):
        assert np.array_equal(x, y)
    if pair_order:
        assert a._unit_list == b._unit_list
        pairs_a = [np.concatenate(p) for p in zip(*a._cv_pairs)]
        pairs_b = [np.concatenate(p) for p in zip(*b._cv_pairs)]
        for x, y in zip(pairs_a, pairs_b):
            assert np.array_equal(x, y)


@pytest.fixture(scope="module")
def short_session():
    """Two minutes of foraging at 50 Hz with 20 invented place cells, some frames lost."""
    fps = 50.0
    t, xy = foraging(120.0, fps=fps, seed=31)
    t = t + 10.0
    rng = np.random.default_rng(32)
    st, su = place_cell_spikes(t, xy, rng.uniform(10, 90, (20, 2)), 8.0, rng.uniform(5, 15, 20), seed=33)
    xy[rng.choice(len(t), 60, replace=False)] = np.nan  # lost frames
    xy[3000:3040] = np.nan  # a 0.8 s tracking gap
    return t, xy, st, su


def test_held_arrivals_give_what_working_each_in_at_once_gives(short_session, monkeypatch):
    t, xy, st, su = short_session
    rng = np.random.default_rng(34)
    # Late spikes: 1-3 s late (still placed) and 6-8 s late (too late to place).
    late = [(int(i), float(rng.uniform(1.0, 3.0))) for i in rng.choice(len(st), 40, replace=False)]
    late += [(int(i), float(rng.uniform(6.0, 8.0))) for i in rng.choice(len(st), 10, replace=False)]
    late = list({i: d for i, d in late}.items())
    events = arrivals(t, xy, st, su, late=late)
    events.insert(500, ("s", np.array([np.nan, 20.0]), np.array([100, 999])))  # a bad time, a new unit
    events.insert(900, ("f", np.array([t[300]]), np.array([[5.0, 5.0]])))  # a frame out of order
    settings = {"cv_block_s": 20.0, "cv_folds": 3}
    held = feed(PlaceModel(box(2.0), **settings), events, read_every=97)
    # A batch of one: every arrival is worked in at once, as the model did before it held any.
    monkeypatch.setattr("decoder.encoding.online_counts._FRAME_BATCH", 1)
    at_once = feed(PlaceModel(box(2.0), **settings), events)
    assert held.counters_["spikes_too_late"] > 0
    assert held.counters_["frames_out_of_order"] == 1
    # Exact equality, not closeness: the contract of the held path (numpy.array_equal),
    # down to the order of the evaluation-window pairs.
    assert_same_model(held, at_once)


@pytest.mark.parametrize("unit_ids", [None, list(range(100, 120))])
def test_one_at_a_time_large_chunks_and_interleaved_give_identical_models(short_session, unit_ids):
    t, xy, st, su = short_session
    settings = {"cv_block_s": 20.0, "cv_folds": 3, "unit_ids": unit_ids}
    one_by_one = feed(PlaceModel(box(2.0), **settings), arrivals(t, xy, st, su), read_every=50)
    chunked = feed(PlaceModel(box(2.0), **settings), arrivals(t, xy, st, su, frames_per_call=173, spike_batch_s=1.3))
    interleaved = PlaceModel(box(2.0), **settings)
    feed_live(interleaved, t, xy, st, su, chunk_s=0.7, lag_s=0.2)
    whole = PlaceModel(box(2.0), **settings)
    whole.update_spikes(st, su)
    whole.update_frames(t, xy)
    # Same frames and spikes, none too late: the same model whatever the chunking
    # (numpy.array_equal). Pairs may be listed in another order; their counts may not differ.
    for other in (chunked, interleaved, whole):
        assert_same_model(one_by_one, other, pair_order=False)


def test_readers_see_every_arrival_so_far(short_session, monkeypatch):
    t, xy, st, su = short_session
    events = arrivals(t, xy, st, su)
    held = PlaceModel(box(2.0))
    for kind, a, b in events[:1234]:
        (held.update_frames if kind == "f" else held.update_spikes)(a, b)
    monkeypatch.setattr("decoder.encoding.online_counts._FRAME_BATCH", 1)
    at_once = feed(PlaceModel(box(2.0)), events[:1234])
    # Nothing held back from a reader: occupancy and counters as if every arrival
    # had been worked in on the spot (numpy.array_equal).
    assert held.counters_ == at_once.counters_
    assert held.counters_["frames_received"] > 0 and held.counters_["spikes_received"] > 0
    assert np.array_equal(held.occupancy_so_far_s(), at_once.occupancy_so_far_s())
    assert held.n_units == at_once.n_units
    assert held.readiness().running_time_s == at_once.readiness().running_time_s


def test_held_arrays_are_copies_and_memory_stays_bounded(short_session):
    t, xy, _, _ = short_session
    model = PlaceModel(box(2.0))
    reference = PlaceModel(box(2.0))
    frame_t, frame_xy = np.zeros(1), np.zeros((1, 2))
    for i in range(2000):
        frame_t[0], frame_xy[0] = t[i], xy[i]  # the caller reuses its buffers
        model.update_frames(frame_t, frame_xy)
        reference.update_frames(t[i : i + 1], xy[i : i + 1].copy())
        assert len(model._held_t) < 64
    np.testing.assert_array_equal(model.occupancy_so_far_s(), reference.occupancy_so_far_s())
    assert model._ft.size <= (model.max_spike_delay_s + 2.0) * 50


def _fed_in_two_halves(session, smooth_cm, between):
    """A model fed the first half of ``session``, given to ``between``, then fed the rest; and one fed all at once."""
    t, xy, st, su = session
    half = len(t) // 2
    cut = np.searchsorted(st, t[half])
    model = PlaceModel(box(2.0), smooth_cm=smooth_cm)
    model.update_spikes(st[:cut], su[:cut])
    model.update_frames(t[:half], xy[:half])
    between(model)
    model.update_spikes(st[cut:], su[cut:])
    model.update_frames(t[half:], xy[half:])
    whole = PlaceModel(box(2.0), smooth_cm=smooth_cm)
    whole.update_spikes(st, su)
    whole.update_frames(t, xy)
    return model, whole


def _same_readiness(a, b, leave_out=()):
    for name in a:
        if name not in leave_out:
            np.testing.assert_array_equal(np.asarray(a[name]), np.asarray(b[name]), err_msg=name)


def test_readiness_right_after_a_fit_gives_what_its_totals_give_afresh(short_session, tmp_path):
    def fit_and_compare(model):
        model.fit()
        model.save(tmp_path / "fitted.npz")
        # A loaded model computes its readiness from the saved totals, not from a fit of its own.
        _same_readiness(model.readiness(), PlaceModel.load(tmp_path / "fitted.npz").readiness())

    model, never_fitted = _fed_in_two_halves(short_session, 4.0, fit_and_compare)
    # Counted after the fit: the readiness follows the new totals, as a model never fitted gives them
    # (all but the walk, which only a fit learns).
    after = model.readiness()
    assert after.running_time_s > model.occupancy_s_.sum()
    _same_readiness(after, never_fitted.readiness(), leave_out=("walk_sd_cm_per_sqrt_s",))


def test_tuned_count_so_far_matches_readiness_on_the_models_grid(foraging_model):
    # 4 cm bins and smooth_cm = 4: no coarser grid, so the very count readiness gives.
    assert foraging_model.n_tuned_units_so_far() == foraging_model.readiness().n_tuned_units


def test_tuned_count_so_far_on_a_coarser_grid_is_close_and_keeps_counting(short_session):
    # The coarse grid's counts start at the first call and follow every spike after.
    model, fresh = _fed_in_two_halves(short_session, 5.0, PlaceModel.n_tuned_units_so_far)
    assert model.n_tuned_units_so_far() == fresh.n_tuned_units_so_far()
    np.testing.assert_array_equal(model._tuning_counts[: model.n_units], fresh._tuning_counts[: fresh.n_units])
    # The pooled counts hold every placed spike that lands in a grid bin (exact integers).
    assert model._tuning_counts.sum() == model.counters_["spikes_placed"]
    # Sanity bound on invented cells: 4 cm bins under a 5 cm Gaussian call nearly
    # the same units tuned as the 2 cm maps do.
    assert abs(model.n_tuned_units_so_far() - model.readiness().n_tuned_units) <= 2


# -- movement model ------------------------------------------------------------------------


def _brownian_session(sd_cm_per_sqrt_s: float, minutes: float, seed: int):
    """Frames of a 2-D Brownian walk at 50 Hz in a 400 cm box (invented), and one unit's spikes."""
    rng = np.random.default_rng(seed)
    dt = 0.02
    n = int(minutes * 60 / dt)
    steps = rng.normal(0.0, sd_cm_per_sqrt_s * np.sqrt(dt), (n, 2))
    xy = 200.0 + np.cumsum(steps, axis=0)
    # Fold back at the walls (rarely reached at this spread).
    xy = np.abs(np.mod(xy, 800.0) - 400.0)
    t = np.arange(n) * dt
    spikes = np.sort(rng.uniform(0, t[-1], 2000))
    return t, xy, spikes


def test_the_walk_learned_at_fit_grows_like_brownian_motion():
    arena = Arena.rectangle(400, 400, bin_cm=10)
    sd = 12.0
    t, xy, spikes = _brownian_session(sd, 10.0, seed=31)
    model = PlaceModel(arena, min_occupancy_s=0.0)
    for start in range(0, t.size, 50):
        model.update_frames(t[start : start + 50], xy[start : start + 50])
    model.update_spikes(spikes, np.zeros(spikes.size, np.int64))
    model.fit()
    # Source: Brownian motion (Einstein 1905): the displacement variance per axis grows as
    # sigma^2 * lag, so the walk's variance per second is sigma^2. 30,000 frames at 25 lags
    # estimate it within a few per cent (sampling error of a variance from ~30,000 steps, ~1 %,
    # plus the trimming's correction, exact for Gaussian steps).
    assert model.walk_variance_cm2_per_s_ == pytest.approx(sd**2, rel=0.05)
    assert model.readiness().walk_sd_cm_per_sqrt_s == pytest.approx(sd, rel=0.03)
    movement = model.movement_model(0.02)
    # Source: the same law at a 20 ms step: s.d. sigma * sqrt(0.02 s); the jump is the
    # movement module's default rate of 0.05 per s.
    assert movement.sd_cm == pytest.approx(sd * np.sqrt(0.02), rel=0.03)
    assert movement.uniform_weight == pytest.approx(1 - np.exp(-0.05 * 0.02), rel=1e-12)


def test_the_movement_frames_are_bounded_and_the_newest(monkeypatch):
    from decoder.encoding import online_counts

    monkeypatch.setattr(online_counts, "_MAX_MOVEMENT_FRAMES", 500)
    arena = Arena.rectangle(400, 400, bin_cm=10)
    t, xy, _ = _brownian_session(12.0, 1.0, seed=32)
    model = PlaceModel(arena)
    for start in range(0, t.size, 64):
        model.update_frames(t[start : start + 64], xy[start : start + 64])
    kept_t, kept_xy = model.movement_frames()
    # Source: the buffer's contract — whole batches, the newest, about the cap and never
    # one batch more.
    assert 500 <= kept_t.size < 500 + 64
    np.testing.assert_array_equal(kept_t, t[-kept_t.size :])
    np.testing.assert_array_equal(kept_xy, xy[-kept_t.size :])


def test_a_model_without_movement_says_so():
    arena = Arena.rectangle(400, 400, bin_cm=10)
    model = PlaceModel(arena)
    with pytest.raises(ValueError, match="no learned movement model"):
        model.movement_model(0.02)


def test_the_learned_walk_survives_save_and_load(tmp_path):
    arena = Arena.rectangle(400, 400, bin_cm=10)
    t, xy, spikes = _brownian_session(12.0, 3.0, seed=33)
    model = PlaceModel(arena, min_occupancy_s=0.0)
    model.update_frames(t, xy)
    model.update_spikes(spikes, np.zeros(spikes.size, np.int64))
    model.fit()
    model.save(tmp_path / "m.npz")
    loaded = PlaceModel.load(tmp_path / "m.npz")
    # Source: the file's contract — what was learned reads back unchanged.
    assert loaded.walk_variance_cm2_per_s_ == model.walk_variance_cm2_per_s_


def test_held_out_steps_are_scored_against_a_running_median_of_the_tracked_frames():
    track = LinearTrack((0, 0), (100, 0), bin_cm=5)
    model = PlaceModel(track)
    t = np.arange(0, 2.0, 0.02)
    xy = np.column_stack([10 + 20 * t, np.zeros(t.size)])
    xy[50] = (80.0, 0.0)  # one outlier frame at t = 1 s, 50 cm off
    xy[70] = np.nan  # one lost frame
    model.update_frames(t, xy)
    bins, at = model._tracked_at(np.array([1.0, 1.4, 5.0]))
    # Source: definition of a running median (common practice) — a lone outlier among five frames is
    # replaced by a neighbour's value; here the straight run at 20 cm/s, 30 cm at 1 s, within a frame.
    assert at[0, 0] == pytest.approx(30.0, abs=0.4) and bins[0] == track.bin_index(at[:1])[0]
    assert at[1, 0] == pytest.approx(38.0, abs=0.4)
    # After the last frame the position is unknown.
    assert bins[2] == -1 and np.isnan(at[2]).all()
