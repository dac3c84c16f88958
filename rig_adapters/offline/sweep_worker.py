"""What a sweep's worker processes start from: placeloop imported and its kernels ready.

The local sweep runner forks its workers from a fork server that imports this
module once. Importing it runs :func:`rig_adapters.live.warm_up.warm_up`, so that
every numba kernel a replay calls is loaded from numba's on-disk cache (or
compiled) in the fork server; each worker forked from it then starts its
first replay warm instead of paying that load itself. A failure here only
means the workers warm up on their first task.
"""

from __future__ import annotations

from rig_adapters.live.warm_up import warm_up

try:
    warm_up()
except Exception:  # noqa: BLE001 - warming is an optimisation; the workers warm up on their own otherwise
    pass
