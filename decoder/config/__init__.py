"""Experiment configuration: TOML read into frozen dataclasses.

The tables live in ``rules.py`` (trigger rules and caps), ``tables.py`` (the
pure core's settings) and ``shell.py`` (endpoints, TTL); this module reads a
file into them and re-exports them all.

Every option is documented once, in the ``#:`` comment above its field, with
its unit (docs/CONFIG.md is generated from them). Defaults and validation
live here and nowhere else; a bad value raises :class:`ConfigError` naming
the table, the key and what was expected.

A config file has these tables (all optional but ``[environment]``)::

    [environment]   geometry and bin size          -> build_environment()
    [model]         place-model learning settings  -> ModelSettings
    [decoder]       window, step, prior            -> DecoderSettings
    [sources]       which stream is which          -> SourceSettings
    [session]       the automatic session plan     -> SessionSettings
    [safety]        caps beneath every rule        -> SafetyCaps
    [[zones]]       target zones                   -> decoder.space.zones
    [[rules]]       trigger rules                  -> TriggerRule
    [ripples]       online ripple detection        -> RippleSettings
    [endpoints]     ZeroMQ endpoints (shell only)  -> EndpointSettings
    [ttl]           serial TTL output (shell only) -> TtlSettings; [[ttl.outputs]] per rule -> TtlOutput
    [simulation]    the simulated rig (shell only), read by rig_adapters.sim.simulation
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import tomli_w

from decoder.config.checks import ConfigError, _from_table, retired_key
from decoder.config.rules import SafetyCaps, TriggerRule
from decoder.config.shell import (
    EndpointSettings,
    TtlOutput,
    TtlSettings,
    is_loopback_endpoint,
    is_loopback_host,
)
from decoder.config.tables import (
    DecoderSettings,
    MarkSettings,
    ModelSettings,
    RippleSettings,
    SessionSettings,
    SourceSettings,
)
from decoder.space.environments import (
    Arena,
    Environment,
    HeadingRing,
    LinearTrack,
    TrackGraph,
)
from decoder.space.zones import zone_from_dict

__all__ = [
    "ENVIRONMENT_KINDS",
    "ConfigError",
    "DecoderSettings",
    "EndpointSettings",
    "ExperimentConfig",
    "MarkSettings",
    "ModelSettings",
    "RippleSettings",
    "SafetyCaps",
    "SessionSettings",
    "SourceSettings",
    "TriggerRule",
    "TtlOutput",
    "TtlSettings",
    "build_environment",
    "is_loopback_endpoint",
    "is_loopback_host",
    "load_config",
    "parse_config",
    "parse_setting_value",
    "parse_settings",
    "with_overrides",
]


@dataclass(frozen=True)
class ExperimentConfig:
    """One experiment: the whole TOML file, validated."""

    environment: Environment
    model: ModelSettings = field(default_factory=ModelSettings)
    decoder: DecoderSettings = field(default_factory=DecoderSettings)
    sources: SourceSettings = field(default_factory=SourceSettings)
    session: SessionSettings = field(default_factory=SessionSettings)
    safety: SafetyCaps = field(default_factory=SafetyCaps)
    zones: tuple = ()
    rules: tuple[TriggerRule, ...] = ()
    endpoints: EndpointSettings = field(default_factory=EndpointSettings)
    ttl: TtlSettings = field(default_factory=TtlSettings)
    ripples: RippleSettings = field(default_factory=RippleSettings)
    marks: MarkSettings = field(default_factory=MarkSettings)
    #: The raw ``[simulation]`` table, read by the simulated rig.
    simulation: dict = field(default_factory=dict)
    #: The raw TOML text, stored beside a session log.
    source_text: str = ""

    def zone_names(self) -> tuple[str, ...]:
        return tuple(z.name for z in self.zones)


#: Each ``[environment] kind`` and what builds it; the other keys of the table are its arguments.
ENVIRONMENT_KINDS = {
    "rectangle": Arena.rectangle,
    "circle": Arena.circle,
    "polygon": Arena.polygon,
    "linear_track": LinearTrack,
    "graph": TrackGraph,
    "heading_ring": HeadingRing,
}


def build_environment(table: dict) -> Environment:
    """Build the environment described by an ``[environment]`` table.

    ``kind`` is one of ``rectangle`` (width_cm, height_cm, origin_cm),
    ``circle`` (center_cm, radius_cm), ``polygon`` (vertices_cm),
    ``linear_track`` (start_cm, end_cm, max_distance_cm) or ``graph``
    (nodes_cm, edges, max_distance_cm), which take ``bin_cm``; or
    ``heading_ring`` (``bin_deg``, default 6), head direction decoded over
    a ring where every length in cm of the other tables (``smooth_cm``,
    ``random_walk_sd_cm``, ``false_margin_cm``, speeds in cm/s) reads as
    degrees of heading (deg/s for speeds).
    """
    table = dict(table or {})
    kind = table.pop("kind", None)
    if kind not in ENVIRONMENT_KINDS:
        raise ConfigError(f"[environment] kind must be one of {sorted(ENVIRONMENT_KINDS)}, got {kind!r}")
    if kind == "graph":
        table["edges"] = [tuple(e) for e in table.get("edges", [])]
    try:
        return ENVIRONMENT_KINDS[kind](**table)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"[environment] ({kind}): {exc}") from None


def parse_config(text: str, where: str = "<config>") -> ExperimentConfig:
    """Parse and validate the TOML text of an experiment config."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where} is not valid TOML: {exc}") from None
    known = {"environment", "model", "decoder", "sources", "session", "safety", "zones",
             "rules", "endpoints", "ttl", "simulation", "ripples", "marks"}
    unknown = sorted(set(doc) - known)
    if unknown:
        raise ConfigError(f"{where} has unknown table(s) {unknown}; known tables are {sorted(known)}")
    if "environment" not in doc:
        raise ConfigError(f"{where} has no [environment] table")
    environment = build_environment(doc["environment"])
    zones = []
    for i, zone_table in enumerate(doc.get("zones", [])):
        try:
            zone = zone_from_dict(dict(zone_table))
            zone.bin_mask(environment)
        except (TypeError, ValueError, KeyError) as exc:
            raise ConfigError(f"[[zones]] #{i + 1}: {exc}") from None
        zones.append(zone)
    names = [z.name for z in zones]
    if len(set(names)) != len(names):
        raise ConfigError(f"[[zones]] names must be unique, got {names}")
    rules = []
    for i, rule_table in enumerate(doc.get("rules", [])):
        rule = _from_table(TriggerRule, rule_table, f"[rules] #{i + 1}")
        if rule.kind == "zone" and rule.zone not in names:
            raise ConfigError(f"[[rules]] {rule.name!r} names zone {rule.zone!r}, which is not among {names}")
        rules.append(rule)
    sources = _from_table(SourceSettings, doc.get("sources"), "sources")
    tracked_value = "heading" if isinstance(environment, HeadingRing) else "position"
    if "tracked_value" in doc.get("sources", {}) and sources.tracked_value != tracked_value:
        raise ConfigError(f"[sources] tracked_value = {sources.tracked_value!r} contradicts [environment]: "
                          f"this environment decodes the {tracked_value}; remove the key")
    ttl = _from_table(TtlSettings, doc.get("ttl"), "ttl")
    rule_names = [r.name for r in rules]
    for output in ttl.outputs:
        if output.rule not in rule_names:
            raise ConfigError(f"[[ttl.outputs]] names rule {output.rule!r}, which is not among {rule_names}")
    return ExperimentConfig(
        environment=environment,
        model=_from_table(ModelSettings, doc.get("model"), "model"),
        decoder=_from_table(DecoderSettings, doc.get("decoder"), "decoder"),
        sources=dataclasses.replace(sources, tracked_value=tracked_value),
        session=_from_table(SessionSettings, doc.get("session"), "session"),
        safety=_from_table(SafetyCaps, doc.get("safety"), "safety"),
        zones=tuple(zones),
        rules=tuple(rules),
        endpoints=_from_table(EndpointSettings, doc.get("endpoints"), "endpoints"),
        ttl=ttl,
        ripples=_from_table(RippleSettings, doc.get("ripples"), "ripples"),
        marks=_from_table(MarkSettings, doc.get("marks"), "marks"),
        simulation=dict(doc.get("simulation", {})),
        source_text=text,
    )


def load_config(path: str | Path) -> ExperimentConfig:
    """Read and validate an experiment config file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read config {path}: {exc.strerror}") from None
    return parse_config(text, str(path))


def parse_setting_value(text: str):
    """Read a value written on the command line as TOML (``0.02``, ``true``, ``"uniform"``, ``uniform``)."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_settings(items: list[str] | None, option: str = "--set") -> dict[str, Any]:
    """Read ``NAME=VALUE`` command-line items into ``{NAME: value}`` (values as TOML).

    Raises
    ------
    ConfigError
        For an item without ``=``, an empty name or value, or a name given twice.
    """
    settings: dict[str, Any] = {}
    for item in items or []:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise ConfigError(f"{option} takes NAME=VALUE, e.g. decoder.step_s=0.01; got {item!r}")
        if name in settings:
            raise ConfigError(f"{option} {name} is given twice")
        settings[name] = parse_setting_value(text.strip())
    return settings


def with_overrides(config: ExperimentConfig, overrides: dict[str, Any]) -> ExperimentConfig:
    """A copy of ``config`` with settings replaced, validated as a whole.

    Parameters
    ----------
    config : ExperimentConfig
    overrides : dict
        ``"table.key"`` → value, e.g. ``{"decoder.step_s": 0.01,
        "environment.bin_cm": 2.5}``. ``"rules.key"`` sets the key on every
        rule, ``"rules.NAME.key"`` on the rule named NAME; ``"zones.NAME.key"``
        likewise for a zone.

    Raises
    ------
    ConfigError
        For an unknown table, key, rule or zone, naming it, or an impossible value.
    """
    doc = tomllib.loads(config.source_text)
    for name, value in overrides.items():
        parts = name.split(".")
        if len(parts) == 2 and parts[0] in ("rules", "zones"):
            items = doc.get(parts[0], [])
            if not items:
                raise ConfigError(f"setting {name!r}: the config has no [[{parts[0]}]]")
            for item in items:
                _set_known(item, parts[1], value, name, f"[[{parts[0]}]]")
        elif len(parts) == 3 and parts[0] in ("rules", "zones"):
            matches = [item for item in doc.get(parts[0], []) if item.get("name") == parts[1]]
            if not matches:
                raise ConfigError(f"setting {name!r}: no {parts[0][:-1]} is named {parts[1]!r}")
            _set_known(matches[0], parts[2], value, name, f"[[{parts[0]}]] {parts[1]!r}")
        elif len(parts) == 2:
            table, key = parts
            if table not in _SETTING_TABLES:
                raise ConfigError(f"setting {name!r}: unknown table {table!r}; settable tables are "
                                  f"{sorted(_SETTING_TABLES)} and rules, zones")
            known = _SETTING_TABLES[table]
            if known is not None and key not in known:
                raise ConfigError(f"setting {name!r}: [{table}] has no key {key!r}; known keys are {sorted(known)}")
            doc.setdefault(table, {})[key] = value
        else:
            raise ConfigError(f"setting {name!r} must read TABLE.KEY, rules.KEY or rules.NAME.KEY")
    return parse_config(tomli_w.dumps(doc), "<config with overrides>")


def _set_known(item: dict, key: str, value: Any, name: str, where: str) -> None:
    if key == "name":
        raise ConfigError(f"setting {name!r}: names cannot be swept")
    allowed = {f.name for f in dataclasses.fields(TriggerRule)} if where.startswith("[[rules") else None
    if allowed is not None:
        retired_key(TriggerRule, key, f"setting {name!r}: {where}")
    if allowed is not None and key not in allowed:
        raise ConfigError(f"setting {name!r}: {where} has no key {key!r}; known keys are {sorted(allowed)}")
    if allowed is None and key not in item:
        raise ConfigError(f"setting {name!r}: {where} has no key {key!r}; it has {sorted(item)}")
    item[key] = value


_SETTING_TABLES: dict[str, set | None] = {
    "model": {f.name for f in dataclasses.fields(ModelSettings)},
    "decoder": {f.name for f in dataclasses.fields(DecoderSettings)},
    "sources": {f.name for f in dataclasses.fields(SourceSettings)},
    "session": {f.name for f in dataclasses.fields(SessionSettings)},
    "safety": {f.name for f in dataclasses.fields(SafetyCaps)},
    "ripples": {f.name for f in dataclasses.fields(RippleSettings)},
    "marks": {f.name for f in dataclasses.fields(MarkSettings)},
    # Geometry keys depend on the kind; build_environment names a wrong one.
    "environment": None,
}
