"""What every subcommand shows the operator: the caution, the help and log formats, exit codes, scenarios."""

import argparse
import importlib.resources
import logging
import sys
from pathlib import Path

from decoder.config import ConfigError

CAUTION = """\
CAUTION: placeloop drives reward and stimulation hardware that acts on a living animal.
  - Software is no hardware interlock: keep hardware limits (current, duration, pump volume) and a
    physical cut-off on the stimulator or reward line itself.
  - Stay inside your approved animal-use protocol and your local rules for every setting you arm.
  - Dry-run every configuration on recorded or simulated data (placeloop demo, placeloop run --dry-run)
    before a live animal is connected."""

#: The exit status of every placeloop command, for shell scripts: status -> what it means.
EXIT_CODES = {
    0: "done",
    1: "the command ran and failed: the loop refused a control command, or a demo process exited with an error",
    2: "wrong usage or a wrong config: an unknown option, a config or --set value that cannot be used",
    3: "a file could not be read or written: a model file, a session log, a summary",
    4: "a socket or device could not be opened: an endpoint already taken, a missing TTL device",
    5: "no reply: the loop did not answer a control command in time (is placeloop run up?)",
}
EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_FILE, EXIT_OPEN, EXIT_NO_REPLY = range(6)


def exit_codes_text() -> str:
    """The exit statuses as help text."""
    return "exit status:\n" + "\n".join(f"  {code}  {meaning}" for code, meaning in EXIT_CODES.items())


class HelpFormat(argparse.RawDescriptionHelpFormatter):
    """The help format of every placeloop command: descriptions as written, every option's default shown.

    An option whose help says its default in its own words (``(default: the
    config's learn_s)``) keeps them; every other option gets ``(default: X)``,
    with ``off`` for a flag and ``none`` for an unset value.
    """

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        if "(default" in text or not action.option_strings or action.required or action.default is argparse.SUPPRESS:
            return text
        if action.nargs == 0 and action.default is False:
            return text + " (default: off)"
        return text + (" (default: none)" if action.default is None else " (default: %(default)s)")


def setup_logging(verbose: int) -> None:
    """The log format of every subcommand; -v info, -vv debug (no-op if logging is set up already)."""
    level = logging.WARNING if verbose == 0 else logging.INFO if verbose == 1 else logging.DEBUG
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s", stream=sys.stderr)


def scenarios() -> dict[str, Path]:
    """The example configs installed with placeloop (the repository's configs/), by name."""
    folder = importlib.resources.files("rig_adapters") / "scenarios"
    return {Path(str(f)).stem: Path(str(f)) for f in sorted(folder.iterdir(), key=str) if str(f).endswith(".toml")}


def config_path(value: str) -> Path:
    """A ``--config`` value: a TOML file, or the name of a scenario installed with placeloop.

    Raises
    ------
    ConfigError
        Naming the installed scenarios, when ``value`` is neither.
    """
    path = Path(value)
    if path.is_file():
        return path
    found = scenarios().get(path.stem if path.suffix == ".toml" and path.parent == Path(".") else value)
    if found is not None:
        return found
    raise ConfigError(f"no config file {value!r}, and no installed scenario of that name; the scenarios "
                            f"are {', '.join(scenarios())} (placeloop config --scenarios)")
