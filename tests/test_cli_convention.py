"""Every placeloop subcommand follows one convention (rig_adapters/cli.py's docstring; issue 18).

The walk covers the subcommands placeloop parses itself and the delegated
ones (their modules' ``build_parser()``), so a subcommand added later is held
to the same rules: a description, examples, help and a shown default for every
option, durations named by their clock, the caution where hardware can be
driven, and exit statuses that a shell script can tell apart.
"""

import argparse
import re
import subprocess
import sys
from pathlib import Path

import pytest

from rig_adapters import cli
from rig_adapters.console import CAUTION, EXIT_CODES

ROOT = Path(__file__).resolve().parent.parent

#: Commands that can drive reward or stimulation hardware, directly or by arming the triggers.
DRIVES_HARDWARE = {"run", "demo", "control"}

def _subparsers() -> dict[str, argparse.ArgumentParser]:
    top = cli.build_parser()
    action = next(a for a in top._actions if isinstance(a, argparse._SubParsersAction))
    parsers = dict(action.choices)
    for name in cli.DELEGATED:
        main = cli._delegated_main(name)
        parsers[name] = sys.modules[main.__module__].build_parser()
    return parsers


SUBPARSERS = _subparsers()


def _options(parser):
    for action in parser._actions:
        if action.help is argparse.SUPPRESS or isinstance(action, (argparse._HelpAction,
                                                                    argparse._SubParsersAction)):
            continue
        yield action


def _check(name, ok, message):
    assert ok, f"placeloop {name}: {message}"


def test_the_walk_reaches_every_subcommand():
    assert {"demo", "run", "replay", "sim", "control", "config"} | set(cli.DELEGATED) <= set(SUBPARSERS)


@pytest.mark.parametrize("name", sorted(SUBPARSERS))
def test_every_subcommand_has_a_description_and_an_example(name):
    parser = SUBPARSERS[name]
    assert (parser.description or "").strip(), f"placeloop {name} has no description"
    _check(name, "placeloop " in (parser.epilog or "") + (parser.description or "")
           and "example" in ((parser.epilog or "") + (parser.description or "")).lower(),
           "its help shows no example (an 'examples:' block in the epilog)")


@pytest.mark.parametrize("name", sorted(SUBPARSERS))
def test_every_option_has_help_and_shows_its_default(name):
    parser = SUBPARSERS[name]
    formatter = parser._get_formatter()
    for action in _options(parser):
        _check(name, bool((action.help or "").strip()), f"{action.dest} has no help")
        if not action.option_strings or action.required or action.default is argparse.SUPPRESS:
            continue
        text = formatter._expand_help(action) if action.help else ""
        _check(name, "default" in text, f"{'/'.join(action.option_strings)} does not show its default")


@pytest.mark.parametrize("name", sorted(SUBPARSERS))
def test_durations_are_named_by_their_clock(name):
    # A duration option ends in _s; its name or its help says which clock: data or wall.
    for action in _options(SUBPARSERS[name]):
        for option in action.option_strings:
            if option.endswith("-s"):
                help_text = (action.help or "").lower()
                assert re.search(r"(data|wall)-s$", option) or "wall" in help_text or "data" in help_text, (
                    f"placeloop {name} {option}: name the clock (--data-s, --wall-s) or say it in the help")


@pytest.mark.parametrize("name", sorted(DRIVES_HARDWARE))
def test_the_caution_is_in_the_help_of_every_command_that_can_drive_hardware(name):
    assert CAUTION in SUBPARSERS[name].format_help()


def test_the_top_level_help_lists_every_exit_status():
    text = cli.build_parser().format_help()
    for code, meaning in EXIT_CODES.items():
        assert f"{code}  {meaning}" in text


def _placeloop(*args, timeout=60):
    return subprocess.run([sys.executable, "-m", "rig_adapters.cli", *args], cwd=ROOT, capture_output=True,
                          text=True, timeout=timeout)


def test_failures_have_their_own_exit_status(tmp_path):
    assert _placeloop("run", "--no-such-option").returncode == 2
    bad = tmp_path / "bad.toml"
    bad.write_text("[environment]\nkind = 'hexagon'\n")
    wrong = _placeloop("config", "--check", str(bad))
    assert wrong.returncode == 2 and "kind must be one of" in wrong.stderr
    missing = _placeloop("replay", str(tmp_path / "no-session"))
    assert missing.returncode == 3, missing.stderr
    silent = _placeloop("control", "status", "--endpoint", "tcp://127.0.0.1:9", "--timeout-wall-s", "0.2")
    assert silent.returncode == 5 and "no reply" in silent.stderr


def test_control_reads_its_endpoint_from_the_config(tmp_path):
    config = tmp_path / "rig.toml"
    config.write_text(Path(ROOT / "configs" / "round_arena_goal.toml").read_text()
                      + '\n[endpoints]\ncontrol = "tcp://127.0.0.1:9"\n')
    out = _placeloop("control", "status", "--config", str(config), "--timeout-wall-s", "0.2")
    assert out.returncode == 5 and "tcp://127.0.0.1:9" in out.stderr


def test_an_old_option_spelling_still_works_and_says_its_new_name():
    out = _placeloop("control", "status", "--endpoint", "tcp://127.0.0.1:9", "--timeout-s", "0.2")
    assert out.returncode == 5 and "--timeout-s is deprecated" in out.stderr and "--timeout-wall-s" in out.stderr
