"""What every subcommand shows the operator: the caution banner and the log format."""

import logging
import sys

CAUTION = """\
CAUTION: placeloop drives reward and stimulation hardware that acts on a living animal.
  - Software is no hardware interlock: keep hardware limits (current, duration, pump volume) and a
    physical cut-off on the stimulator or reward line itself.
  - Stay inside your approved animal-use protocol and your local rules for every setting you arm.
  - Dry-run every configuration on recorded or simulated data (placeloop demo, placeloop run --dry-run)
    before a live animal is connected."""


def setup_logging(verbose: int) -> None:
    """The log format of every subcommand; -v info, -vv debug (no-op if logging is set up already)."""
    level = logging.WARNING if verbose == 0 else logging.INFO if verbose == 1 else logging.DEBUG
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s", stream=sys.stderr)
