"""The configuration reference cannot drift from the config it describes (issue 18, item 2).

docs/CONFIG.md must be exactly what ``placeloop config --reference`` prints
(regenerate: ``placeloop config --reference > docs/CONFIG.md``), every field
of every config dataclass must carry its ``#:`` documentation and appear in
it, and the example configs in configs/ must between them show every zone
kind, rule mode and condition, both TTL set-ups and remote endpoints.
"""

import dataclasses
import tomllib
import typing
from pathlib import Path

import pytest

from decoder.config import ENVIRONMENT_KINDS, ExperimentConfig, load_config
from decoder.space.zones import Zone
from rig_adapters.offline.config_reference import field_docs, reference
from rig_adapters.sim.settings import SimulationSettings

ROOT = Path(__file__).resolve().parent.parent
CONFIGS = sorted((ROOT / "configs").glob("*.toml"))


def _config_dataclasses():
    """Every dataclass a config file is read into, nested ones included."""
    found, todo = [], [ExperimentConfig, SimulationSettings]
    while todo:
        cls = todo.pop()
        if cls in found:
            continue
        found.append(cls)
        for hint in typing.get_type_hints(cls, vars(__import__(cls.__module__, fromlist=["_"]))).values():
            for candidate in (hint, *typing.get_args(hint)):
                if dataclasses.is_dataclass(candidate):
                    todo.append(candidate)
    return found


def test_docs_config_md_is_the_current_reference():
    written = (ROOT / "docs" / "CONFIG.md").read_text(encoding="utf-8")
    assert written == reference(), ("docs/CONFIG.md is behind the config dataclasses; regenerate it with "
                                    "`placeloop config --reference > docs/CONFIG.md`")


@pytest.mark.parametrize("cls", [c for c in _config_dataclasses() if c is not ExperimentConfig],
                         ids=lambda c: c.__name__)
def test_every_field_is_documented_beside_it_and_named_in_the_reference(cls):
    docs, text = field_docs(cls), reference()
    for f in dataclasses.fields(cls):
        assert docs.get(f.name), f"{cls.__name__}.{f.name} has no #: comment above it"
        assert f"| `{f.name}` |" in text, f"{cls.__name__}.{f.name} is missing from the reference"


def test_every_environment_and_zone_kind_is_in_the_reference():
    text = reference()
    for kind in [*ENVIRONMENT_KINDS, *(cls.kind for cls in Zone.__subclasses__())]:
        assert f'`kind = "{kind}"`' in text


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_every_example_config_loads(path):
    load_config(path)


def test_the_example_configs_show_every_kind_mode_condition_and_set_up():
    docs = [tomllib.loads(p.read_text()) for p in CONFIGS]
    seen = {
        "environment": {d["environment"]["kind"] for d in docs},
        "zone": {z["kind"] for d in docs for z in d.get("zones", [])},
        "mode": {r.get("mode", "mass") for d in docs for r in d.get("rules", [])},
        "tracked": {r.get("tracked", "any") for d in docs for r in d.get("rules", [])},
        "speed": {k for d in docs for r in d.get("rules", []) for k in ("min_speed_cm_s", "max_speed_cm_s") if k in r},
        "ttl": {d["ttl"].get("drive", "byte") for d in docs if "ttl" in d and d["ttl"].get("outputs")},
        "remote": {d["endpoints"].get("allow_remote", False) for d in docs if "endpoints" in d},
    }
    assert seen["environment"] == set(ENVIRONMENT_KINDS)
    assert seen["zone"] == {cls.kind for cls in Zone.__subclasses__()}
    assert seen["mode"] == {"mass", "map"}
    assert seen["tracked"] == {"any", "inside", "outside"}
    assert seen["speed"] == {"min_speed_cm_s", "max_speed_cm_s"}
    assert seen["ttl"] == {"byte", "line"}
    assert True in seen["remote"]
