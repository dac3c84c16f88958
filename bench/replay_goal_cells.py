"""How well each simulated session's place cells cover the goal well: a screen for replay-content seeds.

    python bench/replay_goal_cells.py [--seeds 1,2,3,4,5,6] [--json out/replay_goal_cells.json]

The towards-the-goal content rule (``bench/ripples.py``) reads a replay's
last bins at the well. How many spikes those bins hold depends on how many
place fields the simulator drew near the well, which varies from seed to
seed: a session with few fields there gives bins with fewer spikes than the
rule's ``[ripples] content_min_spikes``, or bins the resting animal's own
firing outnumbers, whatever the model learned. For each seed, from the
simulator's own cells (no decoding, no learning; seconds to run), with the
session of ``bench/ripples.py``'s content run (``configs/w_maze_ripples.toml``,
its goal at the left well, ``--place-cells`` as there):

* ``peaks_within_15_cm`` / ``peaks_within_30_cm``: place cells whose rate
  peaks within that distance of the goal along the track (the rule's metric,
  ``decoder.session.replay_content.zone_distances_cm``);
* ``expected_spikes_0_6_cm``, ``_6_15_cm``, ``_15_40_cm``, ``_track_median``:
  the replay spikes a content bin expects while the replayed place is that far
  from the goal, ``rate_gain * content_bin_s * sum_i r_i(x)`` over the place
  cells (the simulator's replay rate, ``rig_adapters.sim.replay_content``),
  averaged over the bins at that distance; the resting animal's own firing
  comes on top of it.

A seed far below the others near the well measures the session, not the
decoder: compare it with the rest before reading its content accuracy.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.ripples import GOAL_CM  # noqa: E402
from decoder.config import load_config  # noqa: E402
from decoder.session.replay_content import zone_distances_cm  # noqa: E402
from decoder.space.zones import CircleZone, zone_masks  # noqa: E402
from rig_adapters.sim.cells import rate_of_pairs  # noqa: E402
from rig_adapters.sim.settings import SimulationSettings  # noqa: E402
from rig_adapters.sim.simulation import SimulatedSession  # noqa: E402

#: Distance bands from the goal along the track (cm).
BANDS_CM = ((0.0, 6.0), (6.0, 15.0), (15.0, 40.0))


def goal_cover(seed: int, place_cells: int = 150) -> dict:
    """One seed's place-field cover of the goal (see the module's docstring)."""
    config = load_config(ROOT / "configs" / "w_maze_ripples.toml")
    env = config.environment
    settings = SimulationSettings.from_dict(dict(config.simulation, n_place_cells=place_cells,
                                                 replay={"goal_cm": list(GOAL_CM)}))
    truth = SimulatedSession(env, settings, seed)._truth
    valid = env.valid_mask
    distance = zone_distances_cm(env, zone_masks([CircleZone("goal", GOAL_CM, env.bin_cm)], env))[0]
    place = np.flatnonzero([kind == "place" for kind in truth.cell_type])
    n_bins = env.n_bins
    rates = np.array([rate_of_pairs(truth, np.full(n_bins, row), env.bin_centers_cm) for row in place])
    rates[:, ~valid] = 0.0
    peak_cm = distance[np.argmax(rates, axis=1)]
    expected = settings.replay.rate_gain * config.ripples.content_bin_s * rates.sum(axis=0)
    out = {"seed": seed, "place_cells": int(place.size),
           "peaks_within_15_cm": int(np.sum(peak_cm <= 15.0)), "peaks_within_30_cm": int(np.sum(peak_cm <= 30.0))}
    for lo, hi in BANDS_CM:
        band = valid & (distance >= lo) & (distance < hi)
        out[f"expected_spikes_{lo:.0f}_{hi:.0f}_cm"] = round(float(expected[band].mean()), 2)
    out["expected_spikes_track_median"] = round(float(np.median(expected[valid])), 2)
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--seeds", default="1,2,3,4,5,6", help="comma-separated simulator seeds")
    parser.add_argument("--place-cells", type=int, default=150, help="place cells (bench/ripples.py's default)")
    parser.add_argument("--json", default=None, help="write the rows here")
    args = parser.parse_args(argv)
    rows = [goal_cover(int(s), args.place_cells) for s in args.seeds.split(",")]
    text = json.dumps(rows, indent=1)
    if args.json:
        out = Path(args.json)
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text)
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
