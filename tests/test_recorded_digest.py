"""A session recorded before the layout work replays to the digest it had then.

The fixture `fixtures/demo_session` is a real `placeloop demo` run (simulated
rig, decoder and stand-in over loopback ZeroMQ; invented data), recorded with
the code as it stood before the packages were split into subpackages. Its
digest covers every decoded step and every event, so any change of behaviour
on the shared live/replay path shows here. The check is the project's own
promise (a replay reproduces the live run), not a figure of merit.

The fixture was decoded with the sliding window, the default then; the
replay asks for that method, since its config names none and the default
is now the filter.
"""

import dataclasses
from pathlib import Path

from decoder.config import load_config
from rig_adapters.sessions.replay import replay_session

FIXTURE = Path(__file__).resolve().parent / "fixtures" / "demo_session"
# Printed by the live run that recorded the fixture (its summary's decode.digest).
RECORDED_DIGEST = "29f985d4b7cde6a23588eb2c6e5045cc55d769b2534d09949882076bd40c5e6a"


def test_the_recorded_demo_session_replays_to_its_live_digest():
    recorded = load_config(FIXTURE / "config.toml")
    config = dataclasses.replace(recorded, decoder=dataclasses.replace(recorded.decoder, method="sliding_window"))
    summary = replay_session(FIXTURE, config).summary
    assert summary["decode"]["steps"] == 998
    assert summary["decode"]["digest"] == RECORDED_DIGEST
    assert summary["triggers"]["count"] == 1
