"""Loading the kernels before any data arrives (rig_adapters.live.warm_up)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_warm_up_leaves_every_per_step_kernel_ready_in_a_fresh_process():
    # Common practice for numba code on a latency budget: compile (or load) before the first real call.
    # A fresh process, so that no earlier test has loaded the kernels already.
    code = (
        "from rig_adapters.live.warm_up import warm_up\n"
        "from decoder import messages\n"
        "from decoder.inference import _kernels, binning\n"
        # decode_held_out: the fit's held-out pass, which a live session runs at its fit, mid-stream.
        "kernels = (_kernels.decode_window_step, binning.append_known_spikes, messages.finite_non_decreasing,\n"
        "           _kernels.decode_held_out)\n"
        "assert not any(k.signatures for k in kernels)\n"
        "steps = warm_up()\n"
        "print(steps, [len(k.signatures) for k in kernels])\n"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    steps, loaded = done.stdout.split(" ", 1)
    assert int(steps) > 0
    assert loaded.strip() == "[1, 1, 1, 1]"


def test_the_sweep_fork_server_module_warms_up_on_import():
    done = subprocess.run(
        [sys.executable, "-c", "import rig_adapters.offline.sweep_worker; from decoder.inference import _kernels; "
                               "print(len(_kernels.decode_window_step.signatures))"],
        cwd=ROOT, capture_output=True, text=True, timeout=600,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.strip() == "1"
