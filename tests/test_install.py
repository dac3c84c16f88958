"""placeloop installs and runs as a package (issue 18, item 1).

A wheel is built from the source tree and unpacked (a pure-Python wheel's
install is its unpacking); run from another directory with only the unpacked
wheel on the path, the scenarios load through importlib.resources and a
config names them. The full check, a clean venv with the wheel and its
dependencies running a short demo, is in .ci/run (it compiles every kernel
afresh, minutes that every test run should not pay).
"""

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    # The build backend pyproject.toml names comes from the package index (or pip's cache), as for any user.
    build = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(ROOT)],
                           capture_output=True, text=True, timeout=300, cwd=out)
    assert build.returncode == 0, build.stderr[-3000:]
    (path,) = out.glob("placeloop-*.whl")
    return path


def test_the_wheel_ships_every_scenario_and_page(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    for config in (ROOT / "configs").glob("*.toml"):
        assert f"rig_adapters/scenarios/{config.name}" in names, f"{config.name} is not shipped"
    for data in ("rig_adapters/wire/PROTOCOL.md", "rig_adapters/monitor/static/index.html"):
        assert data in names


def test_the_installed_package_finds_its_scenarios_from_any_directory(wheel, tmp_path):
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    probe = ("import rig_adapters, decoder.config as c; from rig_adapters.console import config_path, scenarios; "
             "from rig_adapters.offline.config_reference import reference; "
             "print(rig_adapters.__file__); print(len(scenarios())); "
             "print(c.load_config(config_path('round_arena_goal')).rules[0].name); "
             "open('CONFIG.md', 'w').write(reference())")
    out = subprocess.run([sys.executable, "-c", probe], cwd=elsewhere, capture_output=True, text=True, timeout=120,
                         env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"})
    assert out.returncode == 0, out.stderr
    # The reference reads the installed sources: the same text as from the checkout.
    assert (elsewhere / "CONFIG.md").read_text() == (ROOT / "docs" / "CONFIG.md").read_text()
    where, count, rule = out.stdout.split()
    assert where.startswith(str(site)), f"imported {where}, not the unpacked wheel"
    assert int(count) == len(list((ROOT / "configs").glob("*.toml")))
    assert rule == "goal_reward"
