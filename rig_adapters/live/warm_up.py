"""Loading every numba kernel the pipeline calls before any data arrives.

numba compiles a kernel at its first call, or loads it from its on-disk cache
if an earlier run compiled it. On a machine that has never run placeloop,
the first decoded step would otherwise wait seconds for that compilation,
with a live animal on the rig and the trigger bank possibly armed. Running a
few seconds of a tiny invented session through the wire protocol and a
pipeline of its own makes every kernel ready (and cached for the next run),
so ``placeloop run`` does it before it opens its sockets, and the sweep's
fork server does it before it forks its workers. The kernels' argument
types do not depend on the arena, the prior or the model's size, so this one
session covers them all; its spike source sends sorted units and marked
spikes both, so the clusterless kernels are ready too.
"""

from __future__ import annotations

import logging

import numpy as np

from decoder.config import parse_config
from decoder.session.pipeline import Pipeline
from rig_adapters.wire import protocol
from rig_adapters.sim.simulation import SimulatedSession, SimulationSettings

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

[marks]
enabled = true

[simulation]
n_place_cells = 16
n_grid_cells = 2
n_nonspatial_cells = 2

[simulation.marks]
send = "both"
"""


def warm_up(seconds: float = 8.0) -> int:
    """Run ``seconds`` of the tiny session through ``protocol`` and a pipeline; return the steps decoded.

    Nothing is written but numba's cache, and nothing is logged.
    """
    config = parse_config(_WARM_RIG)
    session = SimulatedSession(config.environment, SimulationSettings.from_dict(config.simulation), seed=1)
    pipeline = Pipeline(config)
    steps = 0
    logging.disable(logging.CRITICAL)
    try:
        for chunk in session.chunks(until_s=seconds):
            for msg in chunk.messages:
                steps += len(pipeline.on_message(protocol.decode(protocol.encode(msg))))
        if pipeline.steps is not None:
            # The fit's held-out pass (decoder.encoding.calibration), which a session this short cannot run:
            # a live session runs it at its fit, with data streaming in. One window of the fitted decoder
            # compiles it (argument types do not depend on the sizes).
            pipeline.steps.decoder.decode_held_out(np.zeros(0, np.int64), np.zeros(0), np.zeros(2, np.int64),
                                                   np.zeros(1, np.int64), np.ones(1, bool))
    finally:
        logging.disable(logging.NOTSET)
    return steps

