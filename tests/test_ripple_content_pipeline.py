"""Replay content reaches the session: ripples detected in the pipeline are decoded and judged by content rules.

The W-maze ripple scenario (invented, simulated: replays at 10-20x running
speed during ripples at rest, common practice) is fed message by message
through the same ``Pipeline`` a live run and a replay drive; the content
rules judge them beneath the bank's caps. (That a replay of a recorded ripple
session reproduces its digests is checked in ``test_lfp_wire.py``.)
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest
import tomli_w

from decoder.config import ConfigError, parse_config, with_overrides
from decoder.session.pipeline import Pipeline
from decoder.session.ripples import ContentOutput
from rig_adapters.offline.report_data import content_event_rows, format_figure
from rig_adapters.sessions.summary import jsonable
from rig_adapters.sim.settings import SimulationSettings
from rig_adapters.sim.simulation import SimulatedSession

CONFIG = Path(__file__).resolve().parent.parent / "configs" / "w_maze_ripples.toml"


def _config():
    doc = tomllib.loads(CONFIG.read_text())
    doc["zones"] = [{"kind": "circle", "name": "left_well", "center_cm": [0.0, 80.0], "radius_cm": 20.0}]
    doc["rules"] = [{"name": "disrupt", "kind": "ripple"},
                    {"name": "towards_left_odds", "kind": "replay_towards", "zone": "left_well", "min_bins": 2,
                     "min_log_odds": 0.0},
                    {"name": "away_from_left_odds", "kind": "replay_away", "zone": "left_well", "min_bins": 2,
                     "min_log_odds": 1.0}]
    doc["ripples"].update(content_speed_cm_s=[150.0, 1000.0], content_slack_cm=3.0, content_stray_p=0.1)
    doc["simulation"]["n_place_cells"] = 120
    return parse_config(tomli_w.dumps(doc))


def _run(config, until_s: float):
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=3)
    pipeline = Pipeline(config)
    content = []
    for msg in session.messages(until_s=until_s):
        content.extend(o for o in pipeline.on_message(msg) if isinstance(o, ContentOutput))
    return pipeline, content


def test_the_pipeline_decodes_each_ripples_content_and_judges_it_by_the_content_rules():
    config = _config()
    pipeline, content = _run(config, 150.0)
    assert pipeline.state == "decoding"
    assert content, "no ripple's content was decoded in the session"
    events = [e for c in content for e in c.events]
    # Whether a replay moved towards the well depends on the draw; every event is a content rule's.
    rules = {"towards_left_odds", "away_from_left_odds"}
    assert {e.rule for e in events} <= rules
    # A log-odds rule fires only on a bin whose filter gives the sequence odds above its threshold
    # after its bins with spikes.
    for c in content:
        for e in c.events:
            b = c.content
            if e.rule == "towards_left_odds":
                assert b.log_odds[0, 0] > 0.0 and b.n_used >= 2
            else:
                assert b.log_odds[1, 0] > 1.0 and b.n_used >= 2
    assert pipeline.counters["events"] >= len(events)
    assert pipeline.ripples.status()["counters"]["content_bins"] == len(content)

    # Each candidate event is listed for the summary and the report: onset, duration to its LFP
    # offset, the content rules that fired, and when.
    status = jsonable(pipeline.ripples.status())
    listed = status["events"]
    assert listed and len(listed) == len({c.content.onset_s for c in content})
    assert sum(len(e["decided"]) for e in listed) == len(events)
    for e in listed:
        assert e["duration_ms"] is None or e["duration_ms"] > 0
        assert (e["decision_ms"] is None) == (not e["decided"])
    rows = content_event_rows({"ripples": status})
    assert len(rows) == len(listed) and all(len(r) == 4 for r in rows)
    # With the first sequence rule's row and zone, each row shows the event's log odds there (as of its decision).
    odds = content_event_rows({"ripples": status}, (0, 0))
    assert [r[:4] for r in odds] == rows
    for r, e in zip(odds, listed):
        assert e["log_odds"] and len(e["log_odds"]) == 2
        assert r[4] == format_figure(e["log_odds"][0][0])
    assert {d for r in rows for d in r[2].split(", ")} <= rules | {"none"}


def test_a_config_that_sets_min_correlation_is_refused_with_a_sentence_naming_min_log_odds():
    # Sequence rules judge the log odds alone: the key they once took is refused by name, in the file
    # and as a sweep's setting, never silently ignored (a config meant for tau-b would otherwise run).
    doc = tomllib.loads(CONFIG.read_text())
    doc["zones"] = [{"kind": "circle", "name": "left_well", "center_cm": [0.0, 80.0], "radius_cm": 20.0}]
    doc["rules"] = [{"name": "towards_left", "kind": "replay_towards", "zone": "left_well", "min_correlation": 0.3}]
    with pytest.raises(ConfigError, match=r"min_correlation, which is no longer a key: .*set min_log_odds"):
        parse_config(tomli_w.dumps(doc))
    del doc["rules"][0]["min_correlation"]
    config = parse_config(tomli_w.dumps(doc))
    assert config.rules[0].min_log_odds == 0.0  # the default: more likely than not
    for name in ("rules.min_correlation", "rules.towards_left.min_correlation"):
        with pytest.raises(ConfigError, match="no longer a key: .*min_log_odds"):
            with_overrides(config, {name: 0.3})
    assert with_overrides(config, {"rules.min_log_odds": 2.0}).rules[0].min_log_odds == 2.0
