"""Parameter sweeps: replay recorded sessions over a grid of settings.

``placeloop sweep LOG... --set NAME=V1,V2,...`` replays every session once per
setting of the grid (the product of every ``--set``), each replay with
``with_overrides(session_config(LOG), {**fixed, **setting})``, and tabulates
per setting what would have happened: decoding error, added latency,
behavioural latency, hits, misses and false events. A setting is on the
trade-off front when no other setting is at least as good on every one of
:data:`FRONT_FIGURES` and strictly better on one; the front compares added
latency, a wall-clock figure, in multiples of ``--latency-grain-ms``.
Everything is validated before any work starts.

The replays run in parallel on the local cores (one process each), or on a
Dask cluster given ``--scheduler``; a task is a plain function of (log path,
overrides), so either runner gives the same digests and the same figures
(apart from the wall-clock ones, :data:`TIMING_FIGURES`). On a cluster every
worker must see the session logs at the same path (a shared file system) and
run the same placeloop.

Figures of one replay (``tasks[i].figures``)
-------------------------------------------
steps : int
    Decoded steps.
median_error_cm : float or None
    Median decoding error (the replay's ``decode.median_error_cm``).
added_latency_p50_ms, added_latency_p99_ms : float or None
    Latency the decoder added, measured in the replaying process (the
    replay's ``latency_ms``). A replay that measured none there reports its
    per-step decoding time (``latency_stages_ms.decode_per_step``), which in
    a replay spans the same interval: from reading the message that closed
    a step to the step's output.
behaviour_latency_p50_ms : float or None
    Median time from the animal entering a zone to the event for it.
entries, hits, misses, false_events : int
    Zone entries, those answered by an event, those not, and events that
    belong to no entry (``behaviour`` in the replay summary).
triggers : int
    Events the rules fired.
digest : str
    The replay's ``decode.digest`` (every decoded step and event).
damage : str or None
    Where a damaged log stopped the replay.
wall_s, x_realtime : float
    Wall time of the replay and its speed as a multiple of real time.
error : str
    Present only when the replay failed; then it is the only figure.

Figures of one setting (``rows[i].figures``), across sessions
--------------------------------------------------------------
Sums of ``steps``, ``entries``, ``hits``, ``misses``, ``false_events``,
``triggers`` and ``wall_s``; the median across sessions of
``median_error_cm``, ``added_latency_p50_ms`` and
``behaviour_latency_p50_ms``; the largest ``added_latency_p99_ms``;
``digests`` (one per session, in session order, None for a failed replay);
``sessions`` (replays that ran), ``failed`` and ``damaged`` (counts).

JSON written by ``--json`` (keys are stable; the session report reads them)
--------------------------------------------------------------------------
``settings``
    The grid, in order: one ``{NAME: value}`` dict per setting.
``swept``
    ``{NAME: [values]}`` as given to ``--set``.
``fixed``
    ``{NAME: value}`` as given to ``--fixed``.
``sessions``
    Absolute paths of the session logs, in order.
``front_figures``
    The figures the trade-off front compares, all "lower is better".
``latency_grain_ms``
    The front compared added latency rounded to multiples of this (ms); the
    figures themselves are not rounded.
``rows``
    One per setting, in grid order: ``{"setting": {...}, "figures": {...},
    "front": bool}``.
``tasks``
    One per replay: ``{"setting": i, "session": j, "figures": {...}}`` with
    indices into ``settings`` and ``sessions``.
``runner``
    ``"local"`` or ``"dask"``; ``workers`` the local process count (None on
    Dask); ``wall_s`` the sweep's wall time.

Values that are not finite are written as null.
"""

from __future__ import annotations

import argparse
import concurrent.futures
import csv
import itertools
import json
import logging
import math
import multiprocessing
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from decoder.config import ConfigError, parse_setting_value, parse_settings, with_overrides
from rig_adapters.console import HelpFormat, setup_logging
from rig_adapters.sessions.summary import jsonable
from rig_adapters.sessions.recorder import LOG_NAME, LogFormatError, iter_records
from rig_adapters.sessions.replay import replay_session, session_config

log = logging.getLogger(__name__)

#: Figures the trade-off front compares; lower is better on each.
FRONT_FIGURES = ("median_error_cm", "added_latency_p50_ms", "behaviour_latency_p50_ms", "misses", "false_events")
#: Figures measured on the wall clock: they differ from run to run, all else is exact.
TIMING_FIGURES = ("added_latency_p50_ms", "added_latency_p99_ms", "wall_s", "x_realtime")
#: The front compares added latency in multiples of this (ms): a replay's per-step
#: time jitters by some hundredths of a millisecond from run to run.
DEFAULT_LATENCY_GRAIN_MS = 0.1

CAUTION = """\
A sweep replays recorded data only and drives no hardware. A setting chosen
from it acts on a living animal once it is used live: software is no hardware
interlock, so keep current and pulse limits and a manual cut-off in the
hardware; stay inside the approved animal-use protocol and local rules; and
dry-run the chosen setting (placeloop demo, placeloop run --dry-run) before a
live animal is connected."""


# --- the grid -------------------------------------------------------------------------------------

def split_values(text: str) -> list[str]:
    """Split ``V1,V2,...`` at the commas outside brackets and quotes.

    Examples
    --------
    >>> split_values('0.01, 0.02')
    ['0.01', '0.02']
    >>> split_values('[1, 2],"a,b"')
    ['[1, 2]', '"a,b"']
    """
    parts, depth, quote, start = [], 0, "", 0
    for i, ch in enumerate(text):
        if quote:
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
        elif ch in "[{":
            depth += 1
        elif ch in "]}":
            depth -= 1
        elif ch == "," and depth == 0:
            parts.append(text[start:i].strip())
            start = i + 1
    parts.append(text[start:].strip())
    return parts


def parse_grid(items: list[str] | None) -> dict[str, list]:
    """Read ``--set NAME=V1,V2,...`` options into ``{NAME: [values]}``.

    Raises
    ------
    ConfigError
        For an item without ``=``, an empty value, a name given twice or a
        value repeated within one name.
    """
    grid: dict[str, list] = {}
    for item in items or []:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name:
            raise ConfigError(f"--set takes NAME=V1,V2,..., got {item!r}")
        if name in grid:
            raise ConfigError(f"--set {name} is given twice; list all its values in one --set")
        texts = split_values(text)
        if any(not t for t in texts):
            raise ConfigError(f"--set {name} has an empty value in {text!r}")
        values = [parse_setting_value(t) for t in texts]
        for i, value in enumerate(values):
            if value in values[:i]:
                raise ConfigError(f"--set {name} repeats the value {value!r}")
        grid[name] = values
    return grid


def parse_fixed(items: list[str] | None) -> dict[str, Any]:
    """Read ``--fixed NAME=V`` options into ``{NAME: value}``."""
    return parse_settings(items, "--fixed")


@dataclass(frozen=True)
class SweepPlan:
    """A validated sweep: sessions × the settings of a grid.

    Build it with :func:`plan_sweep`, which checks every session and every
    setting before any replay runs.
    """

    sessions: tuple[str, ...]
    swept: dict[str, list]
    fixed: dict[str, Any] = field(default_factory=dict)

    @property
    def settings(self) -> list[dict[str, Any]]:
        """The product of the swept values, the last name varying fastest."""
        names = list(self.swept)
        return [dict(zip(names, combo)) for combo in itertools.product(*self.swept.values())]

    def overrides(self, setting: dict[str, Any]) -> dict[str, Any]:
        """Everything a replay of ``setting`` overrides in the recorded config."""
        return {**self.fixed, **setting}


def _session_dir(path: Path) -> Path:
    return path if path.is_dir() else path.parent


def plan_sweep(logs: list[str | os.PathLike], swept: dict[str, list],
               fixed: dict[str, Any] | None = None) -> SweepPlan:
    """Check the sessions and every setting for each of them; return the plan.

    Parameters
    ----------
    logs : list of path
        Session directories (or their ``session.plog``).
    swept : dict
        ``{NAME: [values]}``, e.g. ``{"decoder.step_s": [0.01, 0.02]}``.
    fixed : dict, optional
        ``{NAME: value}`` applied to every replay, e.g.
        ``{"session.arm_after_fit": True}``.

    Raises
    ------
    FileNotFoundError
        For a path that does not exist.
    LogFormatError
        For a path that holds no placeloop session log, or no recorded config.
    ConfigError
        For an unknown setting name or an impossible value, naming the
        setting and the session it fails for.
    """
    fixed = dict(fixed or {})
    if not logs:
        raise ConfigError("a sweep needs at least one session log")
    both = sorted(set(fixed) & set(swept))
    if both:
        raise ConfigError(f"{both} are both swept (--set) and fixed (--fixed); choose one")
    for name, values in swept.items():
        if not values:
            raise ConfigError(f"setting {name!r} has no values to sweep")
    sessions: list[str] = []
    for raw in logs:
        path = Path(raw).resolve()
        if not path.exists():
            raise FileNotFoundError(f"{raw} does not exist: give a session directory or its {LOG_NAME}")
        if path.is_dir() and not (path / LOG_NAME).exists():
            raise LogFormatError(f"{raw} is a directory without a {LOG_NAME}: not a placeloop session")
        iter_records(path)  # checks the magic, the format version and the header
        if str(path) in sessions:
            raise ConfigError(f"session {raw} is given twice")
        sessions.append(str(path))
    plan = SweepPlan(tuple(sessions), {k: list(v) for k, v in swept.items()}, fixed)
    for session in plan.sessions:
        recorded = session_config(_session_dir(Path(session)))
        for setting in plan.settings:
            try:
                with_overrides(recorded, plan.overrides(setting))
            except ConfigError as exc:
                raise ConfigError(f"session {session}, setting {setting or fixed}: {exc}") from None
    return plan


# --- one replay -----------------------------------------------------------------------------------

def run_task(log_path: str, overrides: dict[str, Any]) -> dict[str, Any]:
    """Replay one session with ``overrides`` and return its figures.

    A plain function of plain arguments, so that it pickles for a process
    pool or a Dask cluster. The figures are listed in the module docstring.
    """
    path = Path(log_path)
    config = with_overrides(session_config(_session_dir(path)), overrides)
    summary = replay_session(path, config=config).summary
    added = summary["latency_ms"]
    if not added.get("n"):
        added = summary["latency_stages_ms"]["decode_per_step"]
    behaviour = summary["behaviour"]
    return jsonable({
        "steps": summary["decode"]["steps"],
        "median_error_cm": summary["decode"]["median_error_cm"],
        "added_latency_p50_ms": added["p50"],
        "added_latency_p99_ms": added["p99"],
        "behaviour_latency_p50_ms": behaviour["latency_ms"]["p50"],
        "entries": behaviour["entries"],
        "hits": behaviour["hits"],
        "misses": behaviour["misses"],
        "false_events": behaviour["false_events"],
        "triggers": summary["triggers"]["count"],
        "digest": summary["decode"]["digest"],
        "damage": summary["replay"]["damage"],
        "wall_s": summary["replay"]["wall_s"],
        "x_realtime": summary["replay"]["x_realtime"],
    })


def _failed_task(log_path: str, overrides: dict[str, Any], exc: BaseException) -> dict[str, Any]:
    log.error("replay of %s with %s failed: %s", log_path, overrides, exc)
    return {"error": f"{type(exc).__name__}: {exc}"}


# --- the figures of a setting and the front -------------------------------------------------------

def _median(values: list) -> float | None:
    known = [v for v in values if v is not None]
    return float(np.median(known)) if known else None


def aggregate(per_session: list[dict[str, Any]]) -> dict[str, Any]:
    """The figures of one setting across its sessions (see the module docstring).

    Parameters
    ----------
    per_session : list of dict
        Figures of each replay of the setting, in session order, as
        returned by :func:`run_task` (a failed one holds only ``error``).
    """
    ran = [f for f in per_session if "error" not in f]
    p99 = [f["added_latency_p99_ms"] for f in ran if f["added_latency_p99_ms"] is not None]
    figures: dict[str, Any] = {
        key: sum(f[key] for f in ran)
        for key in ("steps", "entries", "hits", "misses", "false_events", "triggers")
    }
    figures.update({
        "median_error_cm": _median([f["median_error_cm"] for f in ran]),
        "added_latency_p50_ms": _median([f["added_latency_p50_ms"] for f in ran]),
        "added_latency_p99_ms": max(p99) if p99 else None,
        "behaviour_latency_p50_ms": _median([f["behaviour_latency_p50_ms"] for f in ran]),
        "wall_s": sum(f["wall_s"] for f in ran),
        "digests": [f.get("digest") for f in per_session],
        "sessions": len(ran),
        "failed": len(per_session) - len(ran),
        "damaged": sum(1 for f in ran if f["damage"]),
    })
    return figures


def trade_off_front(points: np.ndarray) -> np.ndarray:
    """Which points no other point dominates (all figures lower is better).

    Point ``j`` dominates point ``i`` when it is at least as good on every
    figure (``points[j] <= points[i]``) and strictly better on one. Equal
    points do not dominate each other; ``inf`` (a figure that could not be
    measured) is worse than any number and equal to itself.

    Parameters
    ----------
    points : (n_points, n_figures) array_like

    Returns
    -------
    (n_points,) bool
        True for the points on the front.

    References
    ----------
    Kung HT, Luccio F, Preparata FP (1975) On finding the maxima of a set of
    vectors. Journal of the ACM 22(4):469-476 (the maxima of a set of
    vectors; here with every figure negated, lower being better).
    """
    points = np.asarray(points, dtype=np.float64)
    if points.ndim != 2:
        raise ValueError(f"points must be a 2-D array (n_points, n_figures), got shape {points.shape}")
    if np.isnan(points).any():
        raise ValueError("points hold NaN; give an unmeasured figure as inf")
    on_front = np.ones(len(points), dtype=bool)
    for i, point in enumerate(points):
        at_least_as_good = np.all(points <= point, axis=1)
        better_somewhere = np.any(points < point, axis=1)
        on_front[i] = not np.any(at_least_as_good & better_somewhere)
    return on_front


def front_points(rows_figures: list[dict[str, Any]], latency_grain_ms: float = 0.0) -> np.ndarray:
    """The :data:`FRONT_FIGURES` of each row, (n_rows, n_figures); a missing figure is inf.

    Parameters
    ----------
    rows_figures : list of dict
        Figures of each setting, as from :func:`aggregate`.
    latency_grain_ms : float
        Wall-clock figures are rounded to multiples of this (ms) so that
        run-to-run jitter of a few microseconds does not decide the front;
        0 compares them exactly.
    """
    points = np.array([[math.inf if f.get(k) is None else float(f[k]) for k in FRONT_FIGURES]
                       for f in rows_figures], dtype=np.float64).reshape(len(rows_figures), len(FRONT_FIGURES))
    if latency_grain_ms > 0:
        timed = [i for i, k in enumerate(FRONT_FIGURES) if k in TIMING_FIGURES]
        points[:, timed] = np.round(points[:, timed] / latency_grain_ms) * latency_grain_ms
    return points


# --- running --------------------------------------------------------------------------------------

class _Progress:
    """One status line on a stream: done/total, elapsed and ETA."""

    def __init__(self, total: int, stream: TextIO | None) -> None:
        self.total = total
        self.stream = stream
        self.done = 0
        self.started = time.perf_counter()
        self._inline = bool(stream is not None and getattr(stream, "isatty", lambda: False)())

    def tick(self) -> None:
        self.done += 1
        if self.stream is None:
            return
        elapsed = time.perf_counter() - self.started
        eta = elapsed / self.done * (self.total - self.done)
        line = f"sweep: {self.done}/{self.total} replays done, {elapsed:.1f} s elapsed, ETA {eta:.1f} s"
        end = "" if self._inline and self.done < self.total else "\n"
        self.stream.write(("\r" if self._inline else "") + line + end)
        self.stream.flush()


def default_workers() -> int:
    """The cores this process may run on."""
    if hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1


def pool_context():
    """The multiprocessing context the local runner's worker processes come from."""
    # A fork server starts clean (no threads inherited from the caller, e.g. a
    # Dask client or a test runner) and forks each worker with placeloop
    # already imported and its kernels loaded (rig_adapters.offline.sweep_worker), so
    # workers start in milliseconds and their first replay runs warm.
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["rig_adapters.sessions.replay", "rig_adapters.offline.sweep_worker"])
        return ctx
    return multiprocessing.get_context("spawn")


def _run_local(jobs: list[tuple[str, dict]], workers: int, progress: _Progress) -> list[dict]:
    results: list[dict | None] = [None] * len(jobs)
    with concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=pool_context()) as pool:
        futures = {pool.submit(run_task, path, overrides): i for i, (path, overrides) in enumerate(jobs)}
        for future in concurrent.futures.as_completed(futures):
            i = futures[future]
            try:
                results[i] = future.result()
            except Exception as exc:  # one bad replay must not lose the others' results
                results[i] = _failed_task(*jobs[i], exc)
            progress.tick()
    return results


def _run_dask(jobs: list[tuple[str, dict]], scheduler: str, progress: _Progress) -> list[dict]:
    from dask.distributed import Client, as_completed

    results: list[dict | None] = [None] * len(jobs)
    with Client(scheduler) as client:
        # pure=False: every task is a replay to run, never a result to share.
        futures = [client.submit(run_task, path, overrides, pure=False) for path, overrides in jobs]
        index = {future.key: i for i, future in enumerate(futures)}
        for future in as_completed(futures):
            i = index[future.key]
            try:
                results[i] = future.result()
            except Exception as exc:  # one bad replay must not lose the others' results
                results[i] = _failed_task(*jobs[i], exc)
            progress.tick()
    return results


@dataclass
class SweepResult:
    """What a sweep found; :meth:`to_json` gives the documented JSON."""

    plan: SweepPlan
    #: ``task_figures[s][j]``: figures of setting ``s`` replayed on session ``j``.
    task_figures: list[list[dict]]
    rows: list[dict]
    runner: str
    workers: int | None
    wall_s: float
    latency_grain_ms: float = 0.0

    def to_json(self) -> dict[str, Any]:
        settings = self.plan.settings
        return jsonable({
            "settings": settings,
            "swept": self.plan.swept,
            "fixed": self.plan.fixed,
            "sessions": list(self.plan.sessions),
            "front_figures": list(FRONT_FIGURES),
            "latency_grain_ms": self.latency_grain_ms,
            "rows": self.rows,
            "tasks": [{"setting": s, "session": j, "figures": figures}
                      for s, per_session in enumerate(self.task_figures)
                      for j, figures in enumerate(per_session)],
            "runner": self.runner,
            "workers": self.workers,
            "wall_s": self.wall_s,
        })


def run_sweep(plan: SweepPlan, workers: int | None = None, scheduler: str | None = None,
              progress: TextIO | None = None, latency_grain_ms: float = DEFAULT_LATENCY_GRAIN_MS) -> SweepResult:
    """Replay every session with every setting of ``plan``.

    Parameters
    ----------
    plan : SweepPlan
        From :func:`plan_sweep`.
    workers : int, optional
        Local worker processes; the cores available by default, never more
        than the number of replays. Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a Dask scheduler, e.g. ``"tcp://10.0.0.5:8786"``; the
        replays then run on its workers.
    progress : text stream, optional
        Where to report done/total, elapsed and ETA (e.g. ``sys.stderr``).
    latency_grain_ms : float
        The front compares added latency in multiples of this (ms); see
        :func:`front_points`.

    Returns
    -------
    SweepResult
    """
    settings = plan.settings
    jobs = [(session, plan.overrides(setting)) for setting in settings for session in plan.sessions]
    if workers is not None and workers < 1:
        raise ValueError(f"workers must be at least 1, got {workers}")
    if not latency_grain_ms >= 0:
        raise ValueError(f"latency_grain_ms must be >= 0, got {latency_grain_ms}")
    started = time.perf_counter()
    ticker = _Progress(len(jobs), progress)
    if scheduler:
        runner, n_workers = "dask", None
        flat = _run_dask(jobs, scheduler, ticker)
    else:
        runner, n_workers = "local", min(workers or default_workers(), len(jobs))
        flat = _run_local(jobs, n_workers, ticker)
    n_sessions = len(plan.sessions)
    task_figures = [flat[s * n_sessions:(s + 1) * n_sessions] for s in range(len(settings))]
    figures = [aggregate(per_session) for per_session in task_figures]
    front = trade_off_front(front_points(figures, latency_grain_ms))
    rows = [{"setting": setting, "figures": f, "front": bool(on)}
            for setting, f, on in zip(settings, figures, front)]
    return SweepResult(plan, task_figures, rows, runner, n_workers, time.perf_counter() - started,
                       latency_grain_ms)


# --- output ---------------------------------------------------------------------------------------

_TABLE_COLUMNS = (
    ("median_error_cm", "error cm", "{:.2f}"),
    ("added_latency_p50_ms", "added p50 ms", "{:.3f}"),
    ("added_latency_p99_ms", "added p99 ms", "{:.3f}"),
    ("behaviour_latency_p50_ms", "behav p50 ms", "{:.0f}"),
    ("hits", "hits", "{}"),
    ("misses", "misses", "{}"),
    ("false_events", "false", "{}"),
    ("triggers", "events", "{}"),
    ("steps", "steps", "{}"),
)


def format_table(result: SweepResult) -> str:
    """A plain-text table, one line per setting; ``*`` marks the trade-off front."""
    names = list(result.plan.swept)
    header = ["front"] + names + [title for _, title, _ in _TABLE_COLUMNS] + ["failed"]
    lines = []
    for row in result.rows:
        f = row["figures"]
        cells = ["*" if row["front"] else ""]
        cells += [str(row["setting"][n]) for n in names]
        cells += ["-" if f[key] is None else fmt.format(f[key]) for key, _, fmt in _TABLE_COLUMNS]
        cells.append(str(f["failed"]))
        lines.append(cells)
    widths = [max(len(h), *(len(c[i]) for c in lines)) if lines else len(h) for i, h in enumerate(header)]
    out = ["  ".join(h.rjust(w) for h, w in zip(header, widths))]
    out += ["  ".join(c.rjust(w) for c, w in zip(cells, widths)) for cells in lines]
    n_front = sum(r["front"] for r in result.rows)
    out.append(f"{len(result.rows)} settings x {len(result.plan.sessions)} sessions, {result.runner} runner, "
               f"{result.wall_s:.1f} s; * = on the trade-off front ({n_front}): no other setting is at least "
               f"as good on {', '.join(FRONT_FIGURES)} and better on one")
    return "\n".join(out)


def write_csv(result: SweepResult, path: str | os.PathLike) -> None:
    """One line per setting: the swept values, the figures, the front flag."""
    names = list(result.plan.swept)
    keys = [k for k in result.rows[0]["figures"] if k != "digests"] if result.rows else []
    with open(path, "w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f)
        writer.writerow(names + keys + ["digests", "front"])
        for row in result.rows:
            fig = jsonable(row["figures"])
            writer.writerow([row["setting"][n] for n in names]
                            + ["" if fig[k] is None else fig[k] for k in keys]
                            + [";".join(d or "" for d in fig["digests"]), int(row["front"])])


# --- command line ---------------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop sweep",
        description="Replay recorded sessions over a grid of settings and mark the trade-off front.",
        epilog="examples:\n"
               "  placeloop sweep sessions/day3 --set decoder.step_s=0.01,0.02 --json sweep.json\n"
               "  placeloop sweep sessions/day3 sessions/day4 --set decoder.step_s=0.01,0.02 "
               "--set rules.reward.min_mass=0.5,0.7 --fixed session.arm_after_fit=true --csv sweep.csv\n\n"
               + CAUTION,
        formatter_class=HelpFormat,
    )
    parser.add_argument("logs", nargs="+", metavar="LOG", help="session directories (or their session.plog)")
    parser.add_argument("--set", dest="grid", action="append", metavar="NAME=V1,V2,...",
                        help="sweep a setting over these values, e.g. decoder.step_s=0.01,0.02 (repeatable; "
                             "the grid is the product of all)")
    parser.add_argument("--fixed", action="append", metavar="NAME=VALUE",
                        help="override a setting in every replay, e.g. session.arm_after_fit=true (repeatable)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="local worker processes (default: the cores available)")
    where.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                       help="run the replays on this Dask scheduler's workers instead")
    parser.add_argument("--latency-grain-ms", type=float, default=DEFAULT_LATENCY_GRAIN_MS, metavar="MS",
                        help="compare added latency on the front in multiples of this, since it jitters from "
                             "run to run (0 compares exactly)")
    parser.add_argument("--json", default=None, metavar="PATH", help="write the results as JSON here")
    parser.add_argument("--csv", default=None, metavar="PATH", help="write one line per setting here")
    parser.add_argument("-v", "--verbose", action="store_true", help="log more")
    return parser


def main(argv: list[str] | None = None) -> int:
    """``placeloop sweep``: returns 0 when every replay ran, 1 when some failed, 2 for bad input."""
    args = build_parser().parse_args(argv)
    setup_logging(args.verbose)
    try:
        if args.workers is not None and args.workers < 1:
            raise ConfigError(f"--workers must be at least 1, got {args.workers}")
        if not args.latency_grain_ms >= 0:
            raise ConfigError(f"--latency-grain-ms must be >= 0, got {args.latency_grain_ms}")
        plan = plan_sweep(args.logs, parse_grid(args.grid), parse_fixed(args.fixed))
    except (ConfigError, LogFormatError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    n_jobs = len(plan.settings) * len(plan.sessions)
    print(f"sweep: {len(plan.settings)} settings x {len(plan.sessions)} sessions = {n_jobs} replays",
          file=sys.stderr)
    try:
        result = run_sweep(plan, workers=args.workers, scheduler=args.scheduler, progress=sys.stderr,
                           latency_grain_ms=args.latency_grain_ms)
    except OSError as exc:
        print(f"error: cannot run the sweep: {exc}", file=sys.stderr)
        return 2
    print(format_table(result))
    if args.json:
        Path(args.json).write_text(json.dumps(result.to_json(), indent=2), encoding="utf-8")
    if args.csv:
        write_csv(result, args.csv)
    failed = sum(r["figures"]["failed"] for r in result.rows)
    if failed:
        print(f"error: {failed} replay(s) failed; their errors are in the log above and in the JSON tasks",
              file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
