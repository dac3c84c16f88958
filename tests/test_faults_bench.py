"""The fault probe runs end to end: ``python bench/faults.py --quick`` against the real loop.

A real ``placeloop run`` process, real ZeroMQ sockets on 127.0.0.1 and a
simulated session (invented data). This checks the probe's counts, not its
timings: those are the bench's figures (bench/faults.py) on a shared, noisy
machine, never a timed test. The bars are issue 17's: no crash, no false
event and no uncounted frame under fuzz; every control case answered; a log
left by kill -9 read back and replayed; decoding again after a restart; a
stall disarms; nothing actionable from a dry run. That every frame sent is
either accepted or counted as rejected is common practice for a loop fed by
a network (a frame is received or it is counted lost).
"""

import json
import math
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

#: Fields the issue asks the JSON to hold (issue 17, item 7).
FIELDS = ("fuzz_frames", "fuzz_crashes", "fuzz_false_events", "fuzz_uncounted", "control_cases", "control_crashes",
          "kill9_runs", "kill9_unrecoverable", "kill9_lost_s_max", "restart_recovery_s_max", "stall_disarm_s",
          "soak_hours_simulated", "soak_rss_growth_pct", "dry_run_actionable_events")


def test_the_quick_fault_probe_finds_nothing(tmp_path):
    out = tmp_path / "faults.json"
    run = subprocess.run([sys.executable, "bench/faults.py", "--quick", "--json", str(out)], cwd=ROOT,
                         capture_output=True, text=True, timeout=600, check=False)
    assert run.returncode == 0, run.stderr[-3000:]
    result = json.loads(out.read_text())
    assert set(FIELDS) <= set(result)
    assert result["fuzz_frames"] >= 2000
    assert (result["fuzz_crashes"], result["fuzz_false_events"], result["fuzz_uncounted"]) == (0, 0, 0)
    # The fuzz's session did decode and fire, and every event the in-process reference fires (the same
    # valid session through the same Ingest and Pipeline) reached the bench's subscriber: the hostile
    # frames cost no reward. (The bench's consumers join before the session starts: bench/fault_loop.py.)
    assert result["fuzz_reference_events"] >= 1 and result["fuzz_events"] >= 1, result
    assert result["fuzz_missed"] == [], (result["fuzz_missed"], result["fuzz_reference"])
    assert result["control_cases"] >= 200 and result["control_crashes"] == 0 and result["control_unanswered"] == 0
    assert result["control_bad_cases_accepted"] == [] and result["control_still_decoding"]
    assert result["kill9_runs"] == 1 and result["kill9_unrecoverable"] == 0
    assert math.isfinite(result["kill9_lost_s_max"])
    assert math.isfinite(result["restart_recovery_s_max"])     # decoding again on the restarted rig's clock
    assert result["stall_disarm_s"] < 10 * 1.0                 # disarmed (the bench waits ten stall limits)
    assert result["flood_drained"] and result["flood_uncounted"] == 0 and result["soak_uncounted"] == 0
    assert result["soak_hours_simulated"] > 0
    assert result["dry_run_actionable_events"] == 0 and result["dry_run_events_withheld"] >= 1
    assert result["shared_loop_ran_well"]
