"""What a sweep's worker processes start from: placeloop imported and its kernels ready.

The local sweep runner forks its workers from a fork server that imports this
module once. Importing it decodes a few seconds of a tiny simulated session
through the wire protocol and the pipeline, so that every numba kernel a
replay calls is loaded from numba's on-disk cache (or compiled) in the fork
server; each worker forked from it then starts its first replay warm instead
of paying that load itself. Nothing is written to disk and nothing is logged;
a failure here only means the workers warm up on their first task.
"""

from __future__ import annotations

import logging

from decoder.config import parse_config
from decoder.pipeline import Pipeline
from rig_adapters import protocol
from rig_adapters.simulation import SimulatedSession, SimulationSettings

#: An invented rig just large enough to learn, fit and decode with the state-space prior.
_WARM_RIG = """
[environment]
kind = "rectangle"
width_cm = 40.0
height_cm = 40.0
bin_cm = 2.0

[decoder]
prior = "state_space"

[sources]
truth = "truth"

[session]
learn_s = 4.0
arm_after_fit = true
cross_validate = false

[[zones]]
name = "corner"
kind = "circle"
center_cm = [10.0, 10.0]
radius_cm = 8.0

[[rules]]
name = "warm"
zone = "corner"
min_mass = 0.5

[simulation]
n_place_cells = 16
n_grid_cells = 2
n_nonspatial_cells = 2
"""


def warm_up(seconds: float = 8.0) -> int:
    """Run ``seconds`` of the tiny session through ``protocol`` and a pipeline; return the steps decoded."""
    config = parse_config(_WARM_RIG)
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=1)
    pipeline = Pipeline(config)
    steps = 0
    for chunk in session.chunks(until_s=seconds):
        for msg in chunk.messages:
            steps += len(pipeline.on_message(protocol.decode(protocol.encode(msg))))
    return steps


logging.disable(logging.CRITICAL)
try:
    warm_up()
except Exception:  # noqa: BLE001 - warming is an optimisation; the workers warm up on their own otherwise
    pass
finally:
    logging.disable(logging.NOTSET)
