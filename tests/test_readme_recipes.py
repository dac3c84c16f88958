"""The README's recipes: each command line parses with the real CLI, and the cheap ones run for real.

The reference is the README itself (its fenced code blocks) and ``.ci/run``,
which must run exactly the README's test command. Commands that drive a
simulated session end to end are run elsewhere: ``placeloop demo`` by
``.ci/run`` (from a wheel) and by tests/test_monitor.py (``run_demo``); here
every ``placeloop`` line is parsed by the parser of its own subcommand, and the
config and offline-tuning recipes run as subprocesses on the recorded
fixture (tests/fixtures/demo_session, a real ``placeloop demo`` run).
"""

from __future__ import annotations

import importlib
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from rig_adapters import cli

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text()
FIXTURE = REPO / "tests" / "fixtures" / "demo_session"

#: The module whose ``build_parser`` parses each delegated subcommand (rig_adapters/cli.py, _delegated_main);
#: ``bridge`` takes its kind (``lsl``) before the options its parser reads.
DELEGATED_PARSERS = {
    "monitor": "rig_adapters.monitor.server",
    "sweep": "rig_adapters.offline.sweep",
    "report": "rig_adapters.offline.report",
    "import": "rig_adapters.exchange.import_command",
    "export": "rig_adapters.exchange.export_command",
    "bridge": "rig_adapters.lsl.command",
}


def _blocks() -> list[list[str]]:
    """The lines of each fenced code block, comments and a trailing ``&`` removed."""
    out = []
    for block in re.findall(r"```\n(.*?)```", README, flags=re.DOTALL):
        lines = []
        for line in block.splitlines():
            line = re.sub(r"\s+#\s.*$", "", line).strip()
            line = re.sub(r"\s*&$", "", line)
            if line:
                lines.append(line)
        out.append(lines)
    return out


def _placeloop_lines() -> list[str]:
    return [line for block in _blocks() for line in block if line.startswith("placeloop ")]


def _argv(line: str) -> tuple[list[str], str | None]:
    """The arguments after ``placeloop`` and the file a ``>`` redirect names, if any."""
    words = shlex.split(line)
    redirect = None
    if ">" in words:
        i = words.index(">")
        redirect = words[i + 1]
        words = words[:i]
    return words[1:], redirect


def _run(line: str, cwd: Path, timeout_s: float) -> subprocess.CompletedProcess:
    argv, redirect = _argv(line)
    done = subprocess.run([sys.executable, "-m", "rig_adapters.cli", *argv], check=False, cwd=cwd,
                          capture_output=True, text=True, timeout=timeout_s, env=_env())
    assert done.returncode == 0, f"{line!r} failed ({done.returncode}):\n{done.stderr[-2000:]}"
    if redirect:
        (cwd / redirect).write_text(done.stdout)
    return done


def _env() -> dict:
    import os

    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def test_the_readme_test_command_is_what_ci_runs():
    commands = [line for block in _blocks() for line in block if line.startswith("python3 -m venv")]
    assert len(commands) == 2, commands  # the two commands: the demo, the tests
    demo, tests = commands
    assert demo.endswith(".venv/bin/placeloop demo")
    ci = (REPO / ".ci" / "run").read_text()
    assert tests in ci, f"CI does not run the README's test command {tests!r}"


@pytest.mark.parametrize("line", _placeloop_lines())
def test_every_placeloop_line_of_the_readme_parses(line):
    argv, _ = _argv(line)
    try:
        if argv[0] in DELEGATED_PARSERS:
            options = argv[2:] if argv[0] == "bridge" else argv[1:]
            assert argv[0] != "bridge" or argv[1] == "lsl", line
            importlib.import_module(DELEGATED_PARSERS[argv[0]]).build_parser().parse_args(options)
        else:
            cli.build_parser().parse_args(argv)
    except SystemExit as exc:
        pytest.fail(f"the README's {line!r} does not parse (exit {exc.code})")
    # A scenario a recipe names is one placeloop installs (configs/ here).
    for flag in ("--config", "--show"):
        if flag in argv:
            name = argv[argv.index(flag) + 1]
            if not name.startswith("my_rig") and not name.startswith("rig.toml"):
                assert (REPO / "configs" / (Path(name).stem + ".toml")).exists(), name


def test_the_readme_bench_scripts_exist_and_take_json():
    lines = [line for block in _blocks() for line in block if line.startswith("python bench/")]
    assert lines
    for line in lines:
        words = shlex.split(line)
        script = REPO / words[1]
        assert script.exists(), line
        assert "--json" not in words or '"--json"' in script.read_text(), line


@pytest.mark.timeout(300)
def test_the_config_from_scratch_recipe_runs(tmp_path):
    block = next(b for b in _blocks() if any("config --show" in line for line in b))
    for line in block:
        _run(line, tmp_path, 120)
    assert "[environment]" in (tmp_path / "my_rig.toml").read_text()


@pytest.mark.timeout(600)
def test_the_offline_tuning_recipes_run_on_a_recorded_session(tmp_path):
    block = next(b for b in _blocks() if any(line.startswith("placeloop sweep") for line in b))
    shutil.copytree(FIXTURE, tmp_path / "sessions" / "m17")
    for line in block:
        done = _run(line, tmp_path, 400)
        if line.startswith("placeloop replay"):
            assert "digest" in done.stdout + done.stderr
    assert (tmp_path / "sweep.json").stat().st_size > 0
    assert (tmp_path / "m17.html").read_text().lstrip().lower().startswith("<!doctype html")
