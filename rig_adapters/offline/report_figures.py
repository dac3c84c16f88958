"""The report's figures: PNG images drawn with matplotlib's Agg canvas, returned as ``data:`` URIs.

Each function takes what :mod:`rig_adapters.offline.report_data` gathered and
returns one image (or None when there is nothing to draw): positions and
decoding error over time, the posterior at each event, latency histograms per
stage, the rate maps of the best units and a sweep's trade-off. The colour map
and the marks are the live monitor's (:mod:`rig_adapters.monitor.marks`), so a
figure here reads like the rig's screen; lines are told apart by style too.
"""

from __future__ import annotations

import base64
import io
import math

import contourpy
import numpy as np
from matplotlib import colormaps
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from decoder.config import ExperimentConfig
from decoder.encoding.place_model import PlaceModel
from decoder.space.environments import Environment, HeadingRing
from rig_adapters.monitor.marks import COLOUR_MAP, INK, MARKS, OUTSIDE_MAP, UNDECIDED_COLOUR, content_colours
from rig_adapters.offline.report_data import (
    EventSequence,
    SWEEP_LABELS,
    SWEEP_X_FIGURE,
    SessionRecord,
    SessionTrace,
    deciding_rule,
    finite_number,
    format_figure,
    sweep_figures,
)

#: Rate maps drawn at most (the best units by bits/spike); the table lists every unit.
MAX_RATE_MAPS = 48

#: Resolution of the inlined figures (dots per inch).
FIGURE_DPI = 100

#: Line colours of the monitor's marks; the tracked position, white on the monitor's map, is its ink here.
TRACKED_COLOUR, DECODED_COLOUR, TRUE_COLOUR = INK, MARKS["decoded"]["colour"], MARKS["true"]["colour"]


def _png(fig: Figure) -> str:
    """The figure as a ``data:`` URI of a PNG image."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=FIGURE_DPI, bbox_inches="tight", metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def is_arena(env: Environment) -> bool:
    return env.grid_shape is not None


def _linear_label(env: Environment) -> str:
    """The axis label of linear position: degrees of heading on a heading ring, cm along a track."""
    return "heading (deg)" if isinstance(env, HeadingRing) else "linear position (cm)"


def _unwrapped_lines(env: Environment):
    """Linear position of positions (n, 2); on a heading ring NaN where a line would cross 0/360 deg."""
    if not isinstance(env, HeadingRing):
        return env.linearize

    def heading_deg(xy: np.ndarray) -> np.ndarray:
        deg = env.linearize(xy)
        # A turn through 0/360 would draw a line across the whole axis: leave that segment out.
        deg[1:][np.abs(np.diff(deg)) > 180.0] = np.nan
        return deg

    return heading_deg


def _linear_bin_centres_cm(env: Environment) -> np.ndarray:
    edges = env.linear_edges_cm
    return 0.5 * (edges[:-1] + edges[1:])


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Start and stop (exclusive) of each run of True."""
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    change = np.flatnonzero(np.diff(padded))
    return list(zip(change[::2], change[1::2]))


def positions_over_time(trace: SessionTrace, env: Environment, has_truth: bool) -> str | None:
    """Tracked, decoded and true position against time: the whole session, and its start in detail when long."""
    if not trace.steps.items:
        return None
    if is_arena(env):
        coords = [("x (cm)", lambda xy: xy[:, 0]), ("y (cm)", lambda xy: xy[:, 1])]
    else:
        coords = [(_linear_label(env), _unwrapped_lines(env))]
    views = [(trace.step_arrays(), "")]
    # Minutes of data squeeze single crossings into a few pixels; the start shows them step by step.
    if trace.last_step_s - trace.first_step_s > 2 * trace.excerpt_s:
        views.append((trace.step_arrays(excerpt=True), f"first {trace.excerpt_s:g} s of decoding, every step: "))
    fig = Figure(figsize=(10, (2.3 * len(coords) + 0.6) * len(views)))
    axes = fig.subplots(len(coords) * len(views), 1, squeeze=False, gridspec_kw={"hspace": 0.45})[:, 0]
    for v, (s, prefix) in enumerate(views):
        view_axes = axes[v * len(coords):(v + 1) * len(coords)]
        for ax, (label, coord) in zip(view_axes, coords):
            if has_truth:
                ax.plot(s["t_s"], coord(s["true"]), color=TRUE_COLOUR, lw=2.2, ls="-", label="true")
            ax.plot(s["t_s"], coord(s["tracked"]), color=TRACKED_COLOUR, lw=1.0, ls="-", label="tracked")
            ax.plot(s["t_s"], coord(s["decoded"]), color=DECODED_COLOUR, lw=0, marker=".", ms=2.5,
                    label="decoded (MAP)")
            ax.vlines(trace.event_times_s, 0, 1, transform=ax.get_xaxis_transform(), color="0.35", lw=0.6,
                      ls=":")
            ax.set_xlim(s["t_s"][0], s["t_s"][-1])
            ax.set_ylabel(label)
        view_axes[-1].set_xlabel(prefix + "data time (s); dotted lines: events")
    axes[0].legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=8, ncol=3, frameon=False)
    return _png(fig)


def error_over_time(trace: SessionTrace) -> str | None:
    if not trace.steps.items:
        return None
    s = trace.step_arrays()
    ok = np.isfinite(s["error_cm"])
    if not np.any(ok):
        return None
    t, err = s["t_s"][ok], s["error_cm"][ok]
    fig = Figure(figsize=(10, 2.8))
    ax = fig.subplots()
    ax.plot(t, err, color=DECODED_COLOUR, lw=0, marker=".", ms=2, alpha=0.5, label="step")
    width = max(5, err.size // 100) | 1
    if err.size >= width:
        rolling = np.median(np.lib.stride_tricks.sliding_window_view(err, width), axis=1)
        ax.plot(t[width // 2: width // 2 + rolling.size], rolling, color=TRACKED_COLOUR, lw=1.6,
                label=f"running median of {width} kept steps")
    ax.axhline(np.median(err), color="0.3", lw=0.8, ls="--", label="median of kept steps")
    ax.set_xlabel("data time (s)")
    ax.set_ylabel("decoding error (cm)")
    ax.set_ylim(bottom=0)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=8, ncol=3, frameon=False)
    return _png(fig)


def _arena_image_kwargs(env: Environment) -> dict:
    return {
        "origin": "lower",
        "extent": (env.x_edges_cm[0], env.x_edges_cm[-1], env.y_edges_cm[0], env.y_edges_cm[-1]),
        "interpolation": "nearest",
        "vmin": 0.0,
        "vmax": 1.0,
    }


def _zone_outlines(config: ExperimentConfig, env: Environment, n: int = 240) -> dict[str, list[np.ndarray]]:
    """Each 2-D zone's boundary as lines of shape (m, 2) in cm, traced on a fine grid over the arena."""
    xs = np.linspace(env.x_edges_cm[0], env.x_edges_cm[-1], n)
    ys = np.linspace(env.y_edges_cm[0], env.y_edges_cm[-1], n)
    gx, gy = np.meshgrid(xs, ys)
    points = np.column_stack([gx.ravel(), gy.ravel()])
    outlines = {}
    for zone in config.zones:
        inside = zone.contains(points, env).reshape(gx.shape).astype(np.float64)
        outlines[zone.name] = contourpy.contour_generator(gx, gy, inside).lines(0.5)
    return outlines


def _masked_grid(values: np.ndarray, mask: np.ndarray, shape: tuple[int, int]) -> np.ma.MaskedArray:
    return np.ma.masked_array(values.reshape(shape), ~mask.reshape(shape))


def _colour_map_with_grey():
    """The monitor's colour map, with its light grey for bins left out of the map."""
    return colormaps[COLOUR_MAP].with_extremes(bad=OUTSIDE_MAP)


def _mark(ax, kind: str, xy, size: float = 6.0) -> None:
    """One of the monitor's marks (``tracked``, ``decoded``, ``true``) at ``xy``, outlined in ink."""
    m = MARKS[kind]
    ax.plot(*xy, ls="", marker=m["matplotlib"], mfc=m["colour"], mec=INK, ms=size, mew=0.9)


def _mark_handle(kind: str) -> Line2D:
    m = MARKS[kind]
    return Line2D([], [], ls="", marker=m["matplotlib"], mfc=m["colour"], mec=INK, mew=0.9, label=m["label"])


def _grid_of_axes(fig: Figure, n: int, ncols: int, hspace: float | None = None) -> np.ndarray:
    """An ``(nrows, ncols)`` grid of axes; those past the ``n``-th are hidden."""
    axes = fig.subplots(math.ceil(n / ncols), ncols, squeeze=False, gridspec_kw={"hspace": hspace})
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    return axes


def _small_multiples(fig: Figure, n: int, ncols: int, xlim: tuple[float, float], ylim: tuple[float, float],
                     xlabel: str, ylabel: str, yticks: tuple[float, ...] | None = None,
                     hspace: float = 0.35) -> list:
    """``n`` panels on one scale; only the outer ones carry ticks (at the limits) and the axis labels.

    ``hspace`` is the gap between rows as a fraction of a panel's height: line
    panels fill their box, so they need more room for the two-line titles.

    Fixed ticks keep dozens of panels cheap to draw; automatic tick placement
    would dominate the time of a report.
    """
    axes = _grid_of_axes(fig, n, ncols, hspace=hspace)
    nrows = axes.shape[0]
    panels = []
    for i, ax in enumerate(axes.ravel()[:n]):
        row, col = divmod(i, ncols)
        bottom = row == nrows - 1 or i + ncols >= n
        ax.set_xlim(*xlim)
        ax.set_ylim(*ylim)
        ax.set_xticks([xlim[0], xlim[1]] if bottom else [])
        ax.set_yticks((yticks if yticks is not None else [ylim[0], ylim[1]]) if col == 0 else [])
        ax.xaxis.set_major_formatter("{x:g}")
        ax.yaxis.set_major_formatter("{x:g}")
        ax.tick_params(labelsize=6, length=2, pad=1)
        if bottom:
            ax.set_xlabel(xlabel, fontsize=6.5, labelpad=1)
        if col == 0:
            ax.set_ylabel(ylabel, fontsize=6.5, labelpad=1)
        panels.append(ax)
    return panels


def _panel_limits(env: Environment) -> tuple[tuple[float, float], tuple[float, float] | None]:
    """x and y limits of a map panel (cm): the grid for an arena, the linear length for a track."""
    if is_arena(env):
        return ((float(env.x_edges_cm[0]), float(env.x_edges_cm[-1])),
                (float(env.y_edges_cm[0]), float(env.y_edges_cm[-1])))
    edges = env.linear_edges_cm
    return (float(edges[0]), float(edges[-1])), None


def event_posteriors(trace: SessionTrace, config: ExperimentConfig) -> str | None:
    events = trace.events.items
    if not events:
        return None
    env = config.environment
    ncols = min(6, len(events))
    nrows = math.ceil(len(events) / ncols)
    arena = is_arena(env)
    fig = Figure(figsize=(1.9 * ncols + 1.0, (1.9 if arena else 1.5) * nrows + 0.8))
    xlim, ylim = _panel_limits(env)
    panels = _small_multiples(fig, len(events), ncols, xlim, ylim or (0.0, 1.05),
                              "x (cm)" if arena else _linear_label(env),
                              "y (cm)" if arena else "posterior / its peak", None if arena else (0.0, 1.0),
                              hspace=0.35 if arena else 0.9)
    cmap = _colour_map_with_grey()
    outlines = _zone_outlines(config, env) if arena else {}
    image = None
    for ax, ev in zip(panels, events):
        title = f"#{ev.event_id} {ev.zone}\nt={ev.t_s:.1f} s, mass {ev.zone_mass:.2f}"
        if ev.far_from_zone:
            title += " (far)"
        ax.set_title(title, fontsize=7)
        peak = float(ev.posterior.max()) or 1.0
        if arena:
            image = ax.imshow(_masked_grid(ev.posterior / peak, env.valid_mask, env.grid_shape), cmap=cmap,
                              **_arena_image_kwargs(env))
            ring = env.outline_cm()
            ax.plot(ring[:, 0], ring[:, 1], color="0.2", lw=0.6)
            for line in outlines[ev.zone]:
                ax.plot(line[:, 0], line[:, 1], color="white", lw=1.2)
            _mark(ax, "decoded", ev.map_xy_cm)
            _mark(ax, "tracked", ev.tracked_xy_cm, 5.0)
            if np.all(np.isfinite(ev.true_xy_cm)):
                _mark(ax, "true", ev.true_xy_cm, 6.5)
            ax.set_aspect("equal")
        else:
            centres = _linear_bin_centres_cm(env)
            ax.plot(centres, ev.posterior / peak, color=DECODED_COLOUR, lw=1.0)
            zone = config.zones[config.zone_names().index(ev.zone)]
            edges = env.linear_edges_cm
            for a, b in _runs(zone.bin_mask(env)):
                ax.axvspan(edges[a], edges[b], color="0.85", zorder=0)
            lin = env.linearize(np.vstack([ev.map_xy_cm, ev.tracked_xy_cm, ev.true_xy_cm]))
            ax.axvline(lin[1], color=TRACKED_COLOUR, lw=1.0, ls="--")
            if np.isfinite(lin[2]):
                ax.axvline(lin[2], color="0.3", lw=1.0, ls=":")
    if arena:
        cbar = fig.colorbar(image, ax=panels, shrink=0.6, pad=0.02)
        cbar.set_label("posterior / its peak (probability ratio)", fontsize=7)
        cbar.ax.tick_params(labelsize=6)
        handles = [
            _mark_handle("decoded"),
            _mark_handle("tracked"),
            _mark_handle("true"),
            Line2D([], [], color="0.2", lw=1.2, label="zone outline (white)"),
        ]
    else:
        handles = [
            Line2D([], [], color=DECODED_COLOUR, label="posterior"),
            Line2D([], [], color=TRACKED_COLOUR, ls="--", label="tracked"),
            Line2D([], [], color="0.3", ls=":", label="true"),
            Line2D([], [], color="0.85", lw=6, label="zone"),
        ]
    # The legend sits just above the top row's titles, whatever the number of rows.
    fig.subplots_adjust(top=1.0 - 0.45 / fig.get_figheight())
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=7, bbox_to_anchor=(0.5, 1.0))
    return _png(fig)


def event_sequences_figure(sequences: list[EventSequence], config: ExperimentConfig) -> str | None:
    """Decoded position against time within each candidate event, coloured by its decided content.

    One panel per event on one scale: ms after the onset against the MAP
    position of each content bin (along the track, or x filled and y open
    in an arena); bins with too few spikes for the content measures drawn
    small and hollow; a dotted line at the decision. Colours are the
    monitor's (:func:`rig_adapters.monitor.marks.content_colours`).
    """
    if not sequences:
        return None
    env = config.environment
    arena = is_arena(env)
    rules = [r.name for r in config.rules if r.kind.startswith("replay_")]
    zone_names = list(config.zone_names())
    colours = content_colours(rules)
    ncols = min(6, len(sequences))
    nrows = math.ceil(len(sequences) / ncols)
    fig = Figure(figsize=(1.9 * ncols + 1.0, 1.7 * nrows + 0.8))
    lo, hi = _panel_limits(env)[0] if not arena else (
        min(float(env.x_edges_cm[0]), float(env.y_edges_cm[0])), max(float(env.x_edges_cm[-1]), float(env.y_edges_cm[-1])))
    t_hi = max([60.0] + [float(np.nanmax(q.bin_ms)) for q in sequences]
               + [q.duration_ms for q in sequences if math.isfinite(q.duration_ms)])
    t_lo = min(0.0, min(float(np.nanmin(q.bin_ms)) for q in sequences) - 5.0)
    panels = _small_multiples(fig, len(sequences), ncols, (math.floor(t_lo), math.ceil(t_hi)), (lo, hi),
                              "ms after the onset", "x, y (cm)" if arena else _linear_label(env), hspace=0.9)
    for ax, q in zip(panels, sequences):
        first = next((name for name in q.decided if name in colours), None)
        colour = colours[first] if first else UNDECIDED_COLOUR
        for k, series in enumerate(q.positions):
            filled = first is not None and k == 0
            for used, size in ((q.used, 16), (~q.used, 6)):
                ax.scatter(q.bin_ms[used], series[used], s=size, linewidths=0.8,
                           facecolors=colour if filled and size > 6 else "none",
                           edgecolors=INK if filled and size > 6 else colour)
        if math.isfinite(q.decision_ms):
            ax.axvline(q.decision_ms, color=INK, lw=0.8, ls=":")
        content = ", ".join(q.decided) if q.decided else "none decided"
        tau = "" if arena else f" · τ {format_figure(q.tau_linear, 2)}"
        rule = deciding_rule(config.rules, q.decided, zone_names)
        odds = q.log_odds_zones.get(zone_names[rule[2]]) if rule else None
        lo = "" if odds is None else f" · ln odds {format_figure(odds[rule[1]], 2)}"
        ax.set_title(f"t={q.onset_s:.2f} s · {len(q.bin_ms)} bins\n{content}{lo}{tau}", fontsize=7)
    handles = [Line2D([], [], ls="", marker="o", markerfacecolor=colours[name], markeredgecolor=INK,
                      label=f"decided: {name}") for name in rules]
    handles.append(Line2D([], [], ls="", marker="o", markerfacecolor="none", markeredgecolor=UNDECIDED_COLOUR,
                          label="no content rule fired"))
    handles.append(Line2D([], [], ls="", marker="o", markersize=3, markerfacecolor="none", markeredgecolor=INK,
                          label="bin with too few spikes"))
    handles.append(Line2D([], [], color=INK, ls=":", lw=0.8, label="decision"))
    fig.subplots_adjust(top=1.0 - 0.45 / fig.get_figheight())
    fig.legend(handles=handles, loc="lower center", ncol=min(5, len(handles)), fontsize=7,
               bbox_to_anchor=(0.5, 1.0))
    return _png(fig)


def latency_histograms(record: SessionRecord) -> str | None:
    panels: list[tuple[str, np.ndarray, str]] = []
    live = record.live
    if live.n:
        panels += [
            ("live: receipt → decoded", np.asarray(live.received_to_decoded_ms), "events"),
            ("live: decoded → sent", np.asarray(live.decoded_to_sent_ms), "events"),
            ("live: receipt → sent", np.asarray(live.received_to_sent_ms), "events"),
        ]
    if len(record.decode_ms):
        panels.append(("this replay: decoding per step", np.asarray(record.decode_ms.values), "steps"))
    if record.behaviour_latency_ms.size:
        panels.append(("zone entry → event (data time)", record.behaviour_latency_ms, "zone entries"))
    if not panels:
        return None
    ncols = min(3, len(panels))
    fig = Figure(figsize=(3.4 * ncols, 2.6 * math.ceil(len(panels) / ncols) + 0.3))
    axes = _grid_of_axes(fig, len(panels), ncols)
    for ax, (title, values, what) in zip(axes.ravel(), panels):
        values = values[np.isfinite(values)]
        # A few outliers would squash the histogram of thousands of samples into one bar.
        hi = np.percentile(values, 99.5) if values.size >= 200 else values.max()
        clipped = int(np.count_nonzero(values > hi))
        ax.hist(np.minimum(values, hi), bins=40, color=DECODED_COLOUR, edgecolor="white", linewidth=0.3)
        for q, ls in ((50, "--"), (99, ":")):
            ax.axvline(np.percentile(values, q), color=TRACKED_COLOUR, lw=1.0, ls=ls)
        ax.set_title(title + (f"\n({clipped} above {hi:.3g} ms drawn at it)" if clipped else ""), fontsize=8)
        ax.set_xlabel("latency (ms); dashed p50, dotted p99", fontsize=7)
        ax.set_ylabel(f"count ({what})", fontsize=7)
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    return _png(fig)


def unit_order(model: PlaceModel) -> np.ndarray:
    """Rows best first: most spatial information in bits per spike, NaN (silent units) last.

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993).
    An information-theoretic approach to deciphering the hippocampal code.
    Advances in Neural Information Processing Systems 5, 1030-1037.
    """
    bits = np.nan_to_num(np.asarray(model.info_bits_per_spike_, float), nan=-np.inf)
    return np.argsort(-bits, kind="stable")


def rate_maps(model: PlaceModel, order: np.ndarray) -> str | None:
    rows = order[:MAX_RATE_MAPS]
    if rows.size == 0:
        return None
    env = model.environment
    arena = is_arena(env)
    ncols = min(8, rows.size)
    nrows = math.ceil(rows.size / ncols)
    fig = Figure(figsize=(1.55 * ncols + 1.0, (1.65 if arena else 1.3) * nrows + 0.4))
    xlim, ylim = _panel_limits(env)
    panels = _small_multiples(fig, rows.size, ncols, xlim, ylim or (0.0, 1.05),
                              "x (cm)" if arena else _linear_label(env),
                              "y (cm)" if arena else "rate / peak (Hz/Hz)", None if arena else (0.0, 1.0),
                              hspace=0.35 if arena else 0.9)
    cmap = _colour_map_with_grey()
    image = None
    for ax, row in zip(panels, rows):
        rate = model.rate_maps_hz_[row]
        peak = float(model.peak_rate_hz_[row]) or 1.0
        ax.set_title(f"unit {model.unit_ids_[row]}\n{format_figure(model.info_bits_per_spike_[row])} b/spk, "
                     f"{peak:.1f} Hz", fontsize=6.5)
        if arena:
            image = ax.imshow(_masked_grid(rate / peak, model.visited_mask_, env.grid_shape), cmap=cmap,
                              **_arena_image_kwargs(env))
            ax.set_aspect("equal")
        else:
            ax.plot(_linear_bin_centres_cm(env), rate / peak, color=DECODED_COLOUR, lw=1.0)
    if arena:
        cbar = fig.colorbar(image, ax=panels, shrink=0.5, pad=0.02)
        cbar.set_label("rate / the unit's peak rate (Hz/Hz)", fontsize=7)
        cbar.ax.tick_params(labelsize=6)
    return _png(fig)


def trade_off(sweep: dict) -> str | None:
    rows = sweep["rows"]
    x_key = SWEEP_X_FIGURE
    panels = [(key, SWEEP_LABELS.get(key, key)) for key in sweep_figures(sweep)]
    if not panels or not any(finite_number(r["figures"].get(x_key)) is not None for r in rows):
        return None
    x_label = SWEEP_LABELS[x_key]
    ncols = min(2, len(panels))
    fig = Figure(figsize=(4.6 * ncols, 3.6 * math.ceil(len(panels) / ncols)))
    axes = _grid_of_axes(fig, len(panels), ncols)
    for ax, (key, label) in zip(axes.ravel(), panels):
        for front in (False, True):
            pts = [(i, finite_number(r["figures"].get(x_key)), finite_number(r["figures"].get(key)))
                   for i, r in enumerate(rows) if bool(r.get("front")) == front]
            pts = [p for p in pts if p[1] is not None and p[2] is not None]
            if not pts:
                continue
            idx, xs, ys = zip(*pts)
            if front:
                ax.scatter(xs, ys, s=46, marker="D", color=DECODED_COLOUR, edgecolor=INK, linewidth=0.8,
                           label="on the front", zorder=3)
                for i, x, y in pts:
                    ax.annotate(str(i), (x, y), xytext=(4, 4), textcoords="offset points", fontsize=7)
            else:
                ax.scatter(xs, ys, s=22, marker="o", facecolor="none", edgecolor=INK, linewidth=0.9,
                           label="other settings", zorder=2)
        ax.set_xlabel(x_label)
        ax.set_ylabel(label)
        ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return _png(fig)

