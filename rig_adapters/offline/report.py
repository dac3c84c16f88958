"""The session report: one self-contained HTML file of figures about a recorded session.

``placeloop report LOG`` replays the session through the same pipeline as
``placeloop replay`` (one pass over the log, keeping only what the figures
need) and writes one HTML file with

- the session's figures (steps, decoding error, events, zone entries hit,
  missed and false, latency percentiles), and a banner when the log is
  damaged, saying where it stopped;
- tracked against decoded position over time (and the true one where the
  rig recorded it), and the decoding error over time;
- the posterior at each event, with the zone outlined;
- latency histograms per stage: the live run's own stamps where the log has
  them (receipt → decoded → sent), the decoding time per step measured in
  this replay, and the behavioural latency (zone entry → event);
- the rate maps of the units, best first by Skaggs information, with their
  figures;
- with ``--sweep``, the trade-off between decoding error and the other
  figures of a parameter sweep, the front highlighted.

Figures are PNG images drawn with matplotlib's Agg canvas and inlined as
base64 ``data:`` URIs; styles are inline. The file loads nothing from the
network and runs no script. Long sessions stay small: trajectories are
thinned to evenly spaced samples and posteriors are kept only at events.

The module holds the command and the HTML assembly; the data gathering is in
:mod:`rig_adapters.offline.report_data`, the figures in
:mod:`rig_adapters.offline.report_figures`.
"""

from __future__ import annotations

import argparse
import html
import json
import logging
import sys
from pathlib import Path

from decoder.config import (
    ConfigError,
    ExperimentConfig,
    load_config,
    parse_settings,
    with_overrides,
)
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.console import CAUTION, HelpFormat, setup_logging
from rig_adapters.offline.report_data import (
    SWEEP_LABELS,
    SWEEP_TABLE_EXTRAS,
    SWEEP_X_FIGURE,
    EventSnapshot,
    LiveStamps,
    SessionRecord,
    SessionTrace,
    content_event_rows,
    deciding_rule,
    event_sequences,
    finite_number,
    format_figure,
    gather_session,
    load_sweep,
    sweep_figures,
)
from rig_adapters.offline.report_figures import (
    MAX_RATE_MAPS,
    error_over_time,
    event_posteriors,
    event_sequences_figure,
    is_arena,
    latency_histograms,
    positions_over_time,
    rate_maps,
    trade_off,
    unit_order,
)
from rig_adapters.sessions.recorder import LogFormatError
from rig_adapters.sessions.replay import session_config
from rig_adapters.sessions.summary import LatencyLog, jsonable

log = logging.getLogger(__name__)

__all__ = [
    "build_parser",
    "main",
    "write_report",
    "render_report",
    "gather_session",
    "load_sweep",
    "SessionRecord",
    "SessionTrace",
    "EventSnapshot",
    "LiveStamps",
]

CAUTION_TEXT = (
    "A report describes what the decoder did or would have done; it is no hardware interlock. "
    "Before arming settings chosen here, stay inside the approved animal-use protocol and local rules, "
    "and dry-run them on recorded or simulated data before a live animal."
)

# ---------------------------------------------------------------------------
# HTML


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 1.5em auto; max-width: 72em;
       padding: 0 1em; color: #1a1a1a; line-height: 1.4; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.2em; border-bottom: 1px solid #bbb; padding-bottom: 0.2em; margin-top: 1.8em; }
.sub { color: #555; margin-top: 0; }
.damage { border: 2px solid #8a5a00; background: #fff4d6; padding: 0.6em 0.9em; margin: 1em 0; }
.damage strong { color: #6b4500; }
.caution { border-left: 4px solid #555; background: #f3f3f3; padding: 0.5em 0.9em; margin: 1em 0; font-size: 0.92em; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.2em 0.6em; text-align: left; vertical-align: top; }
th { background: #f0f0f0; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.figures { display: grid; grid-template-columns: repeat(auto-fill, minmax(20em, 1fr)); gap: 0 1.5em; }
img { max-width: 100%; height: auto; display: block; margin: 0.5em 0; }
.note { color: #444; font-size: 0.92em; }
.wide { overflow-x: auto; }
pre { background: #f6f6f6; padding: 0.6em; overflow-x: auto; font-size: 0.85em; }
"""


def _lookup(summary: dict, path: str):
    value = summary
    for part in path.split("."):
        if not isinstance(value, dict):
            return None
        value = value.get(part)
    return value


def _figure_cell(key: str, value, unit: str = "") -> str:
    raw = html.escape(json.dumps(jsonable(value)), quote=True)
    text = format_figure(value) + (f" {unit}" if unit and value is not None else "")
    return f'<td class="num" data-figure="{html.escape(key)}" data-value="{raw}">{html.escape(text)}</td>'


def _figure_table(title: str, entries: list[tuple[str, str, object, str]]) -> str:
    rows = "".join(f"<tr><th>{html.escape(label)}</th>{_figure_cell(key, value, unit)}</tr>"
                   for label, key, value, unit in entries)
    return f"<div><h3>{html.escape(title)}</h3><table>{rows}</table></div>"


def _stage_table(record: SessionRecord) -> str:
    """Percentiles of every latency stage drawn below, one row each."""
    stages = [
        ("live: receipt → decoded", "live.received_to_decoded_ms", record.live.received_to_decoded_ms),
        ("live: decoded → sent", "live.decoded_to_sent_ms", record.live.decoded_to_sent_ms),
        ("live: receipt → sent", "live.received_to_sent_ms", record.live.received_to_sent_ms),
        ("this replay: decoding per step", "replay.decode_per_step_ms", record.decode_ms),
        ("zone entry → event (data time)", "replay.entry_to_event_ms", record.behaviour_latency_ms.tolist()),
    ]
    rows = []
    for label, key, values in stages:
        if not len(values):
            continue
        p = LatencyLog.percentiles(values)
        rows.append(f"<tr><th>{html.escape(label)}</th>{_figure_cell(key + '.n', p['n'])}"
                    + "".join(_figure_cell(f"{key}.{q}", p[q], "ms") for q in ("p50", "p99", "max")) + "</tr>")
    if not rows:
        return ""
    return ("<table><tr><th>stage</th><th>samples</th><th>p50</th><th>p99</th><th>max</th></tr>"
            + "".join(rows) + "</table>")


def _header_section(record: SessionRecord) -> str:
    s = record.summary
    trace = record.trace

    def entry(label: str, path: str, unit: str = "") -> tuple[str, str, object, str]:
        return label, path, _lookup(s, path), unit

    covered = None
    if trace.first_step_s is not None:
        covered = trace.last_step_s - trace.first_step_s
    decoding = [
        entry("decoded steps", "decode.steps"),
        ("decoded data time", "report.decoded_s", covered, "s"),
        entry("median decoding error", "decode.median_error_cm", "cm"),
        entry("90th percentile error", "decode.p90_error_cm", "cm"),
        entry("coverage at fit (fraction of bins)", "session.readiness.coverage"),
        entry("spatially tuned units at fit", "session.readiness.n_tuned_units"),
        entry("cross-validated median error at fit", "session.readiness.median_cv_error_cm", "cm"),
        entry("filter's likelihood temperature", "session.readiness.filter.likelihood_temperature"),
    ]
    if "heading_median_error_deg" in s.get("decode", {}):
        # On a heading ring the errors above are degrees of heading (decoder.space.headings).
        decoding[2:4] = [
            entry("median heading error", "decode.heading_median_error_deg", "deg"),
            entry("90th percentile heading error", "decode.heading_p90_error_deg", "deg"),
        ]
        decoding.append(entry("frames without a heading", "input.frames_heading_unknown"))
    behaviour = [
        entry("events", "triggers.count"),
        entry("events with the animal far from the zone", "triggers.false_count"),
        entry("zone entries", "behaviour.entries"),
        entry("entries hit", "behaviour.hits"),
        entry("entries missed", "behaviour.misses"),
        entry("false events (no entry)", "behaviour.false_events"),
        entry("repeat events (same entry)", "behaviour.repeat_events"),
        entry("entry → event p50", "behaviour.latency_ms.p50", "ms"),
        entry("entry → event p90", "behaviour.latency_ms.p90", "ms"),
        entry("entry → event max", "behaviour.latency_ms.max", "ms"),
    ]
    live = LatencyLog.percentiles(record.live.received_to_sent_ms)
    timing = [
        ("events sent live (in the log)", "live.events", record.live.n, ""),
        ("live receipt → sent p50", "live.received_to_sent_ms.p50", live["p50"], "ms"),
        ("live receipt → sent p99", "live.received_to_sent_ms.p99", live["p99"], "ms"),
        entry("decoding per step p50 (this replay)", "latency_stages_ms.decode_per_step.p50", "ms"),
        entry("decoding per step p99 (this replay)", "latency_stages_ms.decode_per_step.p99", "ms"),
        entry("bad messages", "input.bad_messages"),
        entry("sequence gaps", "input.gaps"),
        entry("late spikes", "input.late_spikes"),
        ("records read", "report.records", record.records_read, ""),
    ]
    return ('<section id="summary"><h2>Session figures</h2><div class="figures">'
            + _figure_table("Decoding", decoding)
            + _figure_table("Events and zone entries", behaviour)
            + _figure_table("Timing and input", timing)
            + "</div>"
            + '<p class="note">“Far from the zone”: the animal was known to be farther than the false margin '
              f"({format_figure(record.config.session.false_margin_cm)} cm) from the zone when the event fired. "
              "“False events”: events that belong to no zone entry (entries are judged on the true position "
              "where the rig recorded one, else the tracked one). Behavioural latency is in data time.</p>"
            + "</section>")


def _content_section(record: SessionRecord) -> str:
    """The candidate ripple events and what their content was decided to be; nothing without replay content."""
    config = record.config
    rule = deciding_rule(config.rules, (), list(config.zone_names()))
    rows = content_event_rows(record.summary, None if rule is None else rule[1:])
    if not rows:
        return ""
    body = "".join("<tr>" + "".join(f'<td class="num">{html.escape(v)}</td>' if i != 2 else f"<td>{html.escape(v)}</td>"
                                    for i, v in enumerate(row)) + "</tr>" for row in rows)
    sequences = event_sequences(record.content_events, config.environment, config.zone_names(),
                                config.ripples.content_min_spikes)
    along = "" if is_arena(config.environment) else (
        " τ is Kendall's tau-b of the bins' times and their decoded positions along the track, over the bins "
        "with enough spikes; it is descriptive, no rule judges it.")
    odds_head, odds_note = "", ""
    if rule is not None:
        odds_head = f"<th>log odds ({html.escape(rule[0])})</th>"
        odds_note = (f" The log odds are the posterior log odds (natural log, even prior odds) that the replay "
                     f"moves as the sequence rule {html.escape(rule[0])!s} asks, what that rule judges: at the "
                     "decision, or at the last bin when none was made.")
    return ('<section id="replay-content"><h2>Ripple events and their content</h2>'
            f'<p class="note">The newest {len(rows)} candidate events. Duration runs from the LFP onset to its '
            "offset; the decided content names the content rules that fired (none: no rule was satisfied); the "
            f"decision time is from the onset, in data time.{odds_note}</p>"
            "<table><tr><th>onset (s)</th><th>duration (ms)</th><th>decided content</th><th>decision (ms)</th>"
            f"{odds_head}</tr>"
            f"{body}</table>"
            f'<h3>Decoded sequences</h3><p class="note">The first {len(sequences)} candidate events of the replay '
            "with a decoded bin: each content bin's most probable position against its end, in ms after the "
            "onset, coloured by the event's decided content; small hollow marks are bins with too few spikes "
            "for the content measures ([ripples] content_min_spikes); “ln odds” is the log odds of the sequence "
            f"rule that decided the event (else of the first sequence rule) at the decision or the last bin.{along}</p>"
            + _image(event_sequences_figure(sequences, config), "decoded sequence of each candidate event",
                     "No candidate event has a decoded bin.")
            + "</section>")


def _damage_banner(record: SessionRecord) -> str:
    if record.damage is None:
        return ""
    reached = record.trace.last_step_s
    where = f"data time {reached:.3f} s" if reached is not None else "before any decoded step"
    return ('<div class="damage" id="damage"><strong>Incomplete or damaged log — this report stops where the log does.</strong> '
            f"{html.escape(record.damage)}. The replay read {record.records_read} records and decoded up to "
            f"{html.escape(where)}; everything below covers the session only up to there.</div>")


def _decoder_line(d) -> str:
    """Which method decoded, with the settings it uses."""
    lateness = f"allowed lateness {format_figure(d.allowed_lateness_s)} s"
    if d.method == "filter":
        temperature = ("fitted at fit time" if d.likelihood_temperature is None
                       else f"set to {format_figure(d.likelihood_temperature)}")
        return (f"method filter: bins of {format_figure(d.step_s)} s, each spike counted once, the movement learned "
                f"from the session's tracking, likelihood temperature {temperature}; {lateness}")
    return (f"method sliding_window: window {format_figure(d.window_s)} s moved by {format_figure(d.step_s)} s, prior "
            f"{d.prior}, random walk s.d. {format_figure(d.random_walk_sd_cm)} cm; {lateness}")


def _settings_section(record: SessionRecord) -> str:
    c = record.config
    env = c.environment
    items = [
        ("environment", f"{type(env).__name__}, {env.n_bins} bins of {format_figure(env.bin_cm)} cm"),
        ("decoder", _decoder_line(c.decoder)),
        ("zones", ", ".join(f"{z.name} ({z.kind})" for z in c.zones) or "none"),
        ("rules", ", ".join(f"{r.name} → {r.zone}" for r in c.rules) or "none"),
        ("model", record.model_source),
    ]
    if record.overrides:
        items.append(("changed with --set",
                      ", ".join(f"{k} = {v!r}" for k, v in record.overrides.items())))
    rows = "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in items)
    notices = "".join(
        f'<tr><td class="num">{html.escape(format_figure(t))}</td><td>{html.escape(kind)}</td><td>{html.escape(text)}</td></tr>'
        for t, kind, text in record.trace.notices
    )
    more = (f'<p class="note">{record.trace.notices_dropped} later notices are not listed.</p>'
            if record.trace.notices_dropped else "")
    return ('<section id="settings"><h2>Settings and session timeline</h2>'
            f"<table>{rows}</table>"
            "<h3>Notices (data time)</h3>"
            + (f"<table><tr><th>t (s)</th><th>notice</th><th>detail</th></tr>{notices}</table>{more}"
               if notices else '<p class="note">No notices.</p>')
            + "<details><summary>Config text</summary><pre>"
            + html.escape(c.source_text)
            + "</pre></details></section>")


def _image(uri: str | None, alt: str, missing: str) -> str:
    if uri is None:
        return f'<p class="note">{html.escape(missing)}</p>'
    return f'<img alt="{html.escape(alt, quote=True)}" src="{uri}">'


def _rate_map_section(record: SessionRecord) -> str:
    model = record.model
    if model is None:
        return ('<section id="rate-maps"><h2>Rate maps</h2>'
                f'<p class="note">{html.escape(record.model_source)}.</p></section>')
    order = unit_order(model)
    unit = "cm²" if is_arena(model.environment) else "cm"
    rows = "".join(
        f"<tr><td>{int(model.unit_ids_[i])}</td>"
        f'<td class="num" data-unit="{int(model.unit_ids_[i])}" data-bits="{float(model.info_bits_per_spike_[i])!r}">'
        f"{format_figure(model.info_bits_per_spike_[i])}</td>"
        f'<td class="num">{format_figure(model.info_bits_per_s_[i])}</td>'
        f'<td class="num">{format_figure(model.peak_rate_hz_[i])}</td>'
        f'<td class="num">{format_figure(model.sparsity_[i])}</td>'
        f'<td class="num">{format_figure(model.field_size_[i])}</td></tr>'
        for i in order
    )
    shown = min(MAX_RATE_MAPS, order.size)
    return ('<section id="rate-maps"><h2>Rate maps</h2>'
            f'<p class="note">Model: {html.escape(record.model_source)}. {order.size} units; the {shown} with the '
            "most spatial information (Skaggs et al. 1993) are drawn, best first; each map is scaled to its own "
            "peak rate, given in its title; grey bins were not visited long enough to map.</p>"
            + _image(rate_maps(model, order), "rate maps of the best units", "No units to draw.")
            + "<details><summary>Every unit's figures</summary><table><tr><th>unit</th><th>information "
              "(bits/spike)</th><th>information (bits/s)</th><th>peak rate (Hz)</th><th>sparsity</th>"
              f"<th>field size ({unit})</th></tr>{rows}</table></details>"
            + _heading_table(model, order) + "</section>")


def _heading_table(model, order) -> str:
    """Head-direction figures of every unit on a heading ring (``PlaceModel.heading_tuning_``); empty elsewhere."""
    tuning = getattr(model, "heading_tuning_", None)
    if tuning is None:
        return ""
    rows = "".join(
        f"<tr><td>{int(model.unit_ids_[i])}</td>"
        f'<td class="num">{format_figure(tuning.preferred_direction_deg[i])}</td>'
        f'<td class="num">{format_figure(tuning.mean_vector_length[i])}</td>'
        f'<td class="num">{format_figure(tuning.tuning_width_deg[i])}</td>'
        f'<td class="num">{format_figure(tuning.rayleigh_p[i])}</td></tr>'
        for i in order
    )
    return ("<details open><summary>Head-direction figures</summary><p class=\"note\">Preferred direction and "
            "mean vector length of each tuning curve (Fisher 1993), width at half the peak, and the Rayleigh "
            "test's p for the unit's spikes (Zar 1999).</p><table><tr><th>unit</th><th>preferred direction "
            "(deg)</th><th>mean vector length</th><th>tuning width (deg)</th><th>Rayleigh p</th></tr>"
            f"{rows}</table></details>")


def _sweep_section(sweep: dict, path: Path) -> str:
    rows = sweep["rows"]
    names = sorted({k for r in rows for k in r.get("setting", {})})
    numeric = {k for r in rows for k, v in r["figures"].items() if finite_number(v) is not None}
    preferred = [SWEEP_X_FIGURE, *sweep_figures(sweep), *SWEEP_TABLE_EXTRAS]
    figure_names = list(dict.fromkeys(f for f in preferred if f in numeric)) or sorted(numeric)
    head = "".join(f"<th>{html.escape(n)}</th>"
                   for n in ["#", "front", *names, *(SWEEP_LABELS.get(f, f) for f in figure_names)])
    body = "".join(
        "<tr>" + f'<td class="num">{i}</td><td>{"front" if r.get("front") else ""}</td>'
        + "".join(f"<td>{html.escape(format_figure(r.get('setting', {}).get(n)))}</td>" for n in names)
        + "".join(f'<td class="num">{html.escape(format_figure(finite_number(r["figures"].get(n))))}</td>' for n in figure_names)
        + "</tr>"
        for i, r in enumerate(rows)
    )
    n_front = sum(bool(r.get("front")) for r in rows)
    return ('<section id="trade-off"><h2>Sweep trade-off</h2>'
            f'<p class="note">From {html.escape(path.name)}: {len(rows)} settings, {n_front} on the trade-off '
            "front (no other setting is at least as good on every figure the front compares and better on one). "
            "Each panel sets the median decoding error against one of those figures; numbers label the "
            "front's rows in the table.</p>"
            + _image(trade_off(sweep), "trade-off between decoding error and the other figures",
                     "The sweep has no rows with a median error and another figure to draw.")
            + f'<div class="wide"><table><tr>{head}</tr>{body}</table></div></section>')


def render_report(record: SessionRecord, sweep: dict | None = None, sweep_path: Path | None = None) -> str:
    """The report as one HTML document.

    Parameters
    ----------
    record : SessionRecord
        From :func:`gather_session`.
    sweep : dict, optional
        From :func:`load_sweep`; adds the trade-off section.
    sweep_path : Path, optional
        Where the sweep was read, named in its section.

    Returns
    -------
    str
    """
    config = record.config
    has_truth = bool(config.sources.truth)
    created = record.header.get("created_utc", "unknown time")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>placeloop report: {html.escape(record.log_dir.name)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Session report: {html.escape(record.log_dir.name)}</h1>",
        f'<p class="sub">Log created {html.escape(str(created))}; '
        + ("closed cleanly" if record.clean_close else "not closed cleanly")
        + (f"; inputs received over {record.wall_span_s:.1f} s of wall time" if record.wall_span_s else "")
        + ". Figures come from replaying the log through the same pipeline as the live run.</p>",
        _damage_banner(record),
        _header_section(record),
        '<section id="trajectory"><h2>Tracked and decoded position</h2>'
        + _image(positions_over_time(record.trace, config.environment, has_truth),
                 "tracked, decoded and true position over time",
                 "No decoded steps: the session never decoded before the log ends.")
        + f'<p class="note">{len(record.trace.steps.items)} of {record.trace.steps.seen} decoded steps drawn, '
          "evenly spaced.</p></section>",
        '<section id="error"><h2>Decoding error over time</h2>'
        + _image(error_over_time(record.trace), "decoding error over time",
                 "No decoding error: no decoded step had a known position.")
        + '<p class="note">Distance from the decoded (MAP) position to the '
        + ("true position recorded by the rig" if has_truth else "tracked position")
        + ".</p></section>",
        '<section id="events"><h2>Posterior at each event</h2>'
        + f'<p class="note">{len(record.trace.events.items)} of {len(record.trace.event_times_s)} events shown, '
          "evenly spread; each posterior is scaled to its own peak.</p>"
        + _image(event_posteriors(record.trace, config), "posterior at each event", "No events.")
        + "</section>",
        '<section id="latency"><h2>Latency per stage</h2>'
        + ('<p class="note">Live stages from the wall-clock stamps of the events the live run sent.</p>'
           if record.live.n else
           '<p class="note">The log holds no events sent live (a simulated or replay-only log), so no live '
           "stage is drawn; the decoding stage is measured in this replay, on this machine.</p>")
        + (f'<p class="note">{record.live.unreadable} event records could not be read.</p>'
           if record.live.unreadable else "")
        + _stage_table(record)
        + _image(latency_histograms(record), "latency histograms per stage", "No latency samples.")
        + "</section>",
        _rate_map_section(record),
        _content_section(record),
    ]
    if sweep is not None:
        parts.append(_sweep_section(sweep, sweep_path or Path("sweep")))
    parts += [
        _settings_section(record),
        f'<div class="caution">{html.escape(CAUTION_TEXT)}</div>',
        "</body></html>",
    ]
    return "\n".join(parts)


def write_report(log_dir: str | Path, out_path: str | Path, config: ExperimentConfig | None = None,
                 overrides: dict | None = None, model: PlaceModel | None = None,
                 sweep_path: str | Path | None = None) -> SessionRecord:
    """Replay a session and write its HTML report.

    Parameters
    ----------
    log_dir : path
    out_path : path
        The HTML file to write.
    config : ExperimentConfig, optional
        The recorded config by default.
    overrides : dict, optional
        ``"table.key"`` → value, applied to ``config`` (or the recorded one)
        with :func:`decoder.config.with_overrides` and listed in the report.
    model : PlaceModel, optional
        Decode with this model from the start instead of learning.
    sweep_path : path, optional
        A sweep's JSON result for the trade-off section.

    Returns
    -------
    SessionRecord
        What the report was drawn from (``damage`` says where a damaged log stopped).

    Raises
    ------
    LogFormatError, ConfigError, ValueError, OSError
        With a sentence naming the bad file or value.
    """
    log_dir = Path(log_dir)
    if not log_dir.exists():
        raise FileNotFoundError(f"no session log at {log_dir}; pass a session directory or its session.plog")
    sweep = load_sweep(sweep_path) if sweep_path is not None else None
    if config is None:
        config = session_config(log_dir if log_dir.is_dir() else log_dir.parent)
    if overrides:
        config = with_overrides(config, overrides)
    record = gather_session(log_dir, config=config, model=model, overrides=overrides)
    text = render_report(record, sweep, Path(sweep_path) if sweep_path is not None else None)
    out_path = Path(out_path)
    out_path.write_text(text, encoding="utf-8")
    log.info("wrote %s (%.1f kB)", out_path, out_path.stat().st_size / 1e3)
    return record


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="placeloop report",
        description="Replay a recorded session and write one self-contained HTML report (opens with no network).",
        epilog="examples:\n"
               "  placeloop report sessions/day3\n"
               "  placeloop report sessions/day3 --sweep sweep.json --out day3.html\n"
               "  placeloop report sessions/day3 --set decoder.step_s=0.01 --out day3_10ms.html\n\n"
               + CAUTION,
        formatter_class=HelpFormat,
    )
    parser.add_argument("log", help="session directory (or its session.plog)")
    parser.add_argument("--sweep", default=None, metavar="SWEEP.json",
                        help="add the trade-off plot of this sweep result (from placeloop sweep)")
    parser.add_argument("--out", default=None, metavar="PATH.html",
                        help="where to write the report (default: report_<session>.html in the current directory)")
    parser.add_argument("--config", default=None, metavar="FILE|SCENARIO",
                        help="replay with this config (default: the one recorded with the session)")
    parser.add_argument("--model", default=None, metavar="MODEL",
                        help="decode with this model file from the start (default: learn it from the session)")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="override one setting, e.g. decoder.step_s=0.01 (repeatable)")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-v info, -vv debug)")
    return parser


def main(argv: list[str] | None = None) -> int:
    """``placeloop report LOG [--sweep SWEEP.json] [--out PATH.html] [--config C] [--model M] [--set NAME=V ...]``."""
    args = build_parser().parse_args(argv)
    setup_logging(args.verbose)
    log_path = Path(args.log)
    session_dir = log_path if log_path.is_dir() else log_path.parent
    out = Path(args.out) if args.out else Path(f"report_{session_dir.resolve().name}.html")
    try:
        config = load_config(args.config) if args.config else None
        model = PlaceModel.load(args.model) if args.model else None
        record = write_report(log_path, out, config=config, overrides=parse_settings(args.set), model=model,
                              sweep_path=args.sweep)
    except (LogFormatError, ConfigError, ModelFileError, ValueError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    if record.damage:
        print(f"warning: the log is incomplete or damaged; the report covers it up to there: {record.damage}",
              file=sys.stderr)
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
