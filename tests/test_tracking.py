"""Tracked-position lookup and running speed (decoder.session.tracking)."""

import numpy as np

from decoder.session.tracking import TrackHistory


def test_speed_of_a_constant_velocity_run():
    hist = TrackHistory(speed_window_s=0.25)
    t = np.arange(0, 2, 0.02)
    xy = np.column_stack([20.0 * t, np.zeros_like(t)])   # 20 cm/s along x
    hist.add(t.tolist(), xy.tolist())
    pos, speed = hist.at(1.0)
    np.testing.assert_allclose(pos, [20.0, 0.0])
    # Displacement over the lag divided by the lag: exact for straight, uniform motion.
    assert abs(speed - 20.0) < 1e-9


def test_lost_old_and_out_of_order_frames():
    hist = TrackHistory(max_age_s=0.1)
    hist.add([0.0, 0.02], [[1.0, 1.0], [np.nan, np.nan]])
    hist.add([0.01], [[5.0, 5.0]])
    assert hist.out_of_order == 1
    pos, _ = hist.at(0.05)
    np.testing.assert_allclose(pos, [1.0, 1.0])          # the lost frame is skipped
    pos, speed = hist.at(0.5)
    assert np.all(np.isnan(pos)) and np.isnan(speed)     # too old to trust
    pos, _ = hist.at(-1.0)
    assert np.all(np.isnan(pos))


def test_long_streams_compact_without_losing_recent_frames():
    hist = TrackHistory(keep_s=2.0)
    t = np.arange(0, 600, 0.02)
    xy = np.column_stack([np.sin(t), np.cos(t)]) * 10
    for i in range(t.size):
        hist.add(t[i:i + 1].tolist(), xy[i:i + 1].tolist())
    pos, _ = hist.at(599.5)
    np.testing.assert_allclose(pos, xy[np.searchsorted(t, 599.5, side="right") - 1])
    assert len(hist) <= 4096 + 1


def test_position_at_is_at_xy_without_the_speed():
    # Two lookups of one history must agree wherever asked: inside, between frames, too old, too early.
    rng = np.random.default_rng(2)
    hist = TrackHistory(max_age_s=0.1)
    t = np.cumsum(rng.uniform(0.005, 0.05, 300))
    xy = rng.uniform(0, 100, (t.size, 2))
    xy[rng.random(t.size) < 0.1] = np.nan
    hist.add(t.tolist(), xy.tolist())
    for q in np.concatenate([[-1.0, t[0], t[-1] + 1.0], rng.uniform(0, t[-1], 500)]):
        x, y, _ = hist.at_xy(q)
        np.testing.assert_array_equal(hist.position_at(q), (x, y))
