"""Parameter sweeps over recorded sessions: real logs, real processes, a real local Dask cluster.

The sessions are recorded from the simulated rig (invented data): they test
the plumbing — the grid, the runners, the figures and the JSON — and never
the science. The science here is the trade-off front, checked on a worked
example and against an independent algorithm.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from decoder.config import ConfigError, parse_config, with_overrides
from rig_adapters.sessions.recorder import LogFormatError
from rig_adapters.sessions.replay import replay_session, session_config
from rig_adapters.sim.recording import record_simulated_session
from rig_adapters.offline.sweep import (
    FRONT_FIGURES,
    TIMING_FIGURES,
    aggregate,
    front_points,
    main,
    parse_fixed,
    parse_grid,
    plan_sweep,
    run_sweep,
    split_values,
    trade_off_front,
)

pytestmark = pytest.mark.timeout(120)

# A small open field with one reward zone (invented, for plumbing only).
SESSION_TOML = """
[environment]
kind = "rectangle"
width_cm = 60.0
height_cm = 60.0
bin_cm = 4.0

[model]
smooth_cm = 5.0

[decoder]
window_s = 0.25
step_s = 0.05
prior = "state_space"
random_walk_sd_cm = 5.0

[sources]
truth = "truth"

[session]
learn_s = 40.0
arm_after_fit = false
cross_validate = false

[safety]
refractory_s = 2.0
max_per_minute = 20

[[zones]]
kind = "circle"
name = "corner"
center_cm = [40.0, 40.0]
radius_cm = 14.0

[[rules]]
name = "corner_reward"
zone = "corner"
mode = "mass"
min_mass = 0.5
consecutive_steps = 2

[simulation]
n_place_cells = 30
n_grid_cells = 0
n_nonspatial_cells = 4
"""

SESSION_S = 100.0
GRID = ["rules.min_mass=0.3,0.8"]
# The recorded config leaves the triggers disarmed; the sweep arms them.
FIXED = ["session.arm_after_fit=true"]


@pytest.fixture(scope="module")
def sessions(tmp_path_factory):
    root = tmp_path_factory.mktemp("sweep_sessions")
    config = parse_config(SESSION_TOML)
    return [str(record_simulated_session(config, root / f"session{seed}", until_s=SESSION_S, seed=seed))
            for seed in (1, 2)]


@pytest.fixture(scope="module")
def local_sweep(sessions, tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep_out")
    argv = [*sessions, "--set", GRID[0], "--fixed", FIXED[0], "--workers", "2",
            "--json", str(out / "sweep.json"), "--csv", str(out / "sweep.csv")]
    assert main(argv) == 0
    return json.loads((out / "sweep.json").read_text()), (out / "sweep.csv").read_text()


def _exact(figures: dict) -> dict:
    return {k: v for k, v in figures.items() if k not in TIMING_FIGURES}


# --- the grid and the errors before any work ------------------------------------------------------

def test_values_split_at_top_level_commas_only():
    assert split_values("0.01, 0.02,0.05") == ["0.01", "0.02", "0.05"]
    assert split_values('[1, 2],"a,b",uniform') == ["[1, 2]", '"a,b"', "uniform"]


def test_grid_reads_toml_values_and_bare_words():
    grid = parse_grid(["decoder.step_s=0.01,0.02", "decoder.prior=uniform,state_space", "rules.consecutive_steps=1,3"])
    assert grid == {"decoder.step_s": [0.01, 0.02], "decoder.prior": ["uniform", "state_space"],
                    "rules.consecutive_steps": [1, 3]}
    assert parse_fixed(["session.arm_after_fit=true"]) == {"session.arm_after_fit": True}


@pytest.mark.parametrize("items, words", [
    (["decoder.step_s"], "NAME=V1,V2"),
    (["decoder.step_s=0.01,"], "empty value"),
    (["decoder.step_s=0.01", "decoder.step_s=0.02"], "given twice"),
    (["decoder.step_s=0.01,0.01"], "repeats the value"),
])
def test_malformed_grid_says_what_is_wrong(items, words):
    with pytest.raises(ConfigError, match=words):
        parse_grid(items)


def test_plan_is_the_product_of_every_set(sessions):
    plan = plan_sweep(sessions, parse_grid(["decoder.step_s=0.025,0.05", "rules.min_mass=0.3,0.5,0.8"]))
    assert len(plan.settings) == 6
    assert plan.settings[1] == {"decoder.step_s": 0.025, "rules.min_mass": 0.5}


@pytest.mark.parametrize("grid, words", [
    (["decoder.stepsize_s=0.01,0.02"], "decoder.stepsize_s"),
    (["nonsense.key=1,2"], "nonsense"),
    (["rules.min_mass=0.5,1.5"], "min_mass"),
    (["decoder.step_s=0.05,-0.01"], "step_s must be a positive number"),
    (["decoder.step_s=0.05,0.5"], "must not exceed window_s"),
])
def test_unknown_setting_or_impossible_value_is_named_before_any_replay(sessions, grid, words, capsys):
    with pytest.raises(ConfigError, match=words):
        plan_sweep(sessions, parse_grid(grid))
    assert main([*sessions, "--set", grid[0]]) == 2
    err = capsys.readouterr().err
    assert words in err and "replays done" not in err


def test_a_file_that_is_not_a_session_log_is_refused(tmp_path, sessions, capsys):
    not_a_log = tmp_path / "notes.txt"
    not_a_log.write_text("spikes and frames, honest\n")
    with pytest.raises(LogFormatError, match="not a placeloop session log"):
        plan_sweep([sessions[0], str(not_a_log)], {})
    with pytest.raises(LogFormatError, match="without a session.plog"):
        plan_sweep([str(tmp_path)], {})
    with pytest.raises(FileNotFoundError, match="does not exist"):
        plan_sweep([str(tmp_path / "missing")], {})
    assert main([str(not_a_log), "--set", GRID[0]]) == 2
    assert "not a placeloop session log" in capsys.readouterr().err


def test_a_setting_both_swept_and_fixed_is_refused(sessions):
    with pytest.raises(ConfigError, match="both swept"):
        plan_sweep(sessions, parse_grid(["rules.min_mass=0.3,0.8"]), {"rules.min_mass": 0.5})


# --- running: local processes and a local Dask cluster --------------------------------------------

def test_local_sweep_replays_every_session_with_every_setting(sessions, local_sweep):
    result, csv_text = local_sweep
    assert result["runner"] == "local" and result["workers"] == 2
    assert result["sessions"] == sessions
    assert result["settings"] == [{"rules.min_mass": 0.3}, {"rules.min_mass": 0.8}]
    assert result["fixed"] == {"session.arm_after_fit": True}
    assert result["front_figures"] == list(FRONT_FIGURES)
    assert len(result["tasks"]) == 4 and len(result["rows"]) == 2
    assert len(csv_text.strip().splitlines()) == 3
    digests = [row["figures"]["digests"] for row in result["rows"]]
    assert digests[0] != digests[1], "two thresholds should decode to different event streams"
    for row in result["rows"]:
        assert row["figures"]["failed"] == 0 and row["figures"]["steps"] > 0


def test_a_sweep_task_is_the_replay_with_those_settings(sessions, local_sweep):
    result, _ = local_sweep
    task = next(t for t in result["tasks"] if t["setting"] == 1 and t["session"] == 0)
    config = with_overrides(session_config(sessions[0]), {"session.arm_after_fit": True, "rules.min_mass": 0.8})
    summary = replay_session(sessions[0], config=config).summary
    assert task["figures"]["digest"] == summary["decode"]["digest"]
    assert task["figures"]["hits"] == summary["behaviour"]["hits"]
    assert task["figures"]["false_events"] == summary["behaviour"]["false_events"]


def test_rows_aggregate_their_sessions(local_sweep):
    result, _ = local_sweep
    for s, row in enumerate(result["rows"]):
        tasks = [t["figures"] for t in sorted(result["tasks"], key=lambda t: t["session"]) if t["setting"] == s]
        f = row["figures"]
        for key in ("hits", "misses", "false_events", "triggers", "steps", "entries"):
            assert f[key] == sum(t[key] for t in tasks)
        # The median across sessions of the per-session medians (numpy.median as the reference).
        assert f["median_error_cm"] == pytest.approx(np.median([t["median_error_cm"] for t in tasks]))
        assert f["added_latency_p99_ms"] == max(t["added_latency_p99_ms"] for t in tasks)
        assert f["digests"] == [t["digest"] for t in tasks]


def test_rows_mark_the_front_of_their_figures(local_sweep):
    result, _ = local_sweep
    points = front_points([r["figures"] for r in result["rows"]], result["latency_grain_ms"])
    assert [r["front"] for r in result["rows"]] == trade_off_front(points).tolist()
    assert any(r["front"] for r in result["rows"])  # a finite set always has a non-dominated point


def test_dask_cluster_gives_the_same_digests_and_figures(sessions, local_sweep):
    distributed = pytest.importorskip("dask.distributed")
    local, _ = local_sweep
    plan = plan_sweep(sessions, parse_grid(GRID), parse_fixed(FIXED))
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        progress = io.StringIO()
        result = run_sweep(plan, scheduler=cluster.scheduler_address, progress=progress).to_json()
    assert result["runner"] == "dask"
    assert "4/4 replays done" in progress.getvalue() and "ETA" in progress.getvalue()
    assert [r["figures"]["digests"] for r in result["rows"]] == [r["figures"]["digests"] for r in local["rows"]]
    assert [_exact(r["figures"]) for r in result["rows"]] == [_exact(r["figures"]) for r in local["rows"]]
    assert [_exact(t["figures"]) for t in result["tasks"]] == [_exact(t["figures"]) for t in local["tasks"]]


def test_a_failed_replay_is_counted_not_fatal():
    figures = aggregate([{"error": "OSError: gone"}])
    assert figures["failed"] == 1 and figures["sessions"] == 0 and figures["digests"] == [None]
    assert figures["median_error_cm"] is None and figures["hits"] == 0


# --- the trade-off front --------------------------------------------------------------------------

def test_front_on_a_worked_example():
    # Worked by hand from the definition of dominance (Kung, Luccio & Preparata 1975, J. ACM 22:469):
    # j dominates i when j <= i on every figure and j < i on one.
    points = np.array([
        [1.0, 5.0],     # A: best error                                   -> front
        [2.0, 3.0],     # B                                               -> front
        [3.0, 3.0],     # C: B is as fast and more accurate               -> dominated
        [4.0, 1.0],     # D: best latency among the measured              -> front
        [2.0, 3.0],     # E: equal to B; equal points do not dominate     -> front
        [5.0, 5.0],     # F: every other point beats it                   -> dominated
        [np.inf, 0.0],  # G: error unmeasured (worst), latency best       -> front
    ])
    assert trade_off_front(points).tolist() == [True, True, False, True, True, False, True]


def test_front_with_five_figures_on_a_worked_example():
    # Columns as FRONT_FIGURES: error cm, added latency ms, behavioural latency ms, misses, false events.
    points = np.array([
        [6.0, 0.20, 300.0, 4, 2],  # front: fewest false events among the accurate ones
        [6.0, 0.20, 300.0, 4, 3],  # dominated by row 0 (one more false event, all else equal)
        [9.0, 0.10, 250.0, 2, 5],  # front: fastest, fewest misses
        [9.0, 0.10, 250.0, 3, 5],  # dominated by row 2
        [5.0, 0.30, 400.0, 6, 6],  # front: most accurate
    ])
    assert trade_off_front(points).tolist() == [True, False, True, False, True]


def test_front_points_round_wall_clock_figures_only_and_mark_missing_as_worst():
    figures = [
        {"median_error_cm": 7.01, "added_latency_p50_ms": 0.151, "behaviour_latency_p50_ms": 300.0,
         "misses": 2, "false_events": 1},
        {"median_error_cm": 7.02, "added_latency_p50_ms": 0.169, "behaviour_latency_p50_ms": None,
         "misses": 2, "false_events": 1},
    ]
    points = front_points(figures, latency_grain_ms=0.1)
    assert points[:, 1].tolist() == pytest.approx([0.2, 0.2])
    assert points[:, 0].tolist() == [7.01, 7.02] and points[1, 2] == np.inf
    # With the jitter rounded away, row 0 is as fast and better elsewhere: it alone is on the front.
    assert trade_off_front(points).tolist() == [True, False]
    assert front_points(figures, latency_grain_ms=0.0)[:, 1].tolist() == [0.151, 0.169]


def _kung_2d(points: np.ndarray) -> np.ndarray:
    # Kung, Luccio & Preparata (1975), J. ACM 22:469, two-figure case: sort lexicographically and
    # sweep; a point is dominated exactly when an earlier, different point has a second figure no
    # larger than its own.
    order = np.lexsort((points[:, 1], points[:, 0]))
    on_front = np.zeros(len(points), bool)
    best_second = np.inf
    i = 0
    while i < len(order):
        j = i
        while j < len(order) and np.array_equal(points[order[j]], points[order[i]]):
            j += 1
        dominated = best_second <= points[order[i], 1]
        on_front[order[i:j]] = not dominated
        best_second = min(best_second, points[order[i], 1])
        i = j
    return on_front


def test_front_matches_an_independent_sweep_in_two_figures():
    rng = np.random.default_rng(4)
    for _ in range(50):
        # Few distinct values, so ties and duplicates are common.
        points = rng.integers(0, 5, size=(rng.integers(1, 30), 2)).astype(float)
        assert trade_off_front(points).tolist() == _kung_2d(points).tolist()


def test_front_in_many_figures_is_mutually_non_dominated_and_covers_the_rest():
    # Two properties of the maximal elements of a finite set under a strict partial order
    # (common practice): no front point dominates another, and every other point is dominated by one.
    rng = np.random.default_rng(5)

    def dominates(a, b):
        return bool(np.all(a <= b) and np.any(a < b))

    for _ in range(30):
        points = rng.integers(0, 4, size=(rng.integers(1, 25), 5)).astype(float)
        front = trade_off_front(points)
        for i in np.flatnonzero(front):
            assert not any(dominates(points[j], points[i]) for j in np.flatnonzero(front))
        for i in np.flatnonzero(~front):
            assert any(dominates(points[j], points[i]) for j in np.flatnonzero(front))


def test_front_refuses_nan_and_flat_input():
    with pytest.raises(ValueError, match="NaN"):
        trade_off_front([[1.0, np.nan]])
    with pytest.raises(ValueError, match="2-D"):
        trade_off_front([1.0, 2.0])
