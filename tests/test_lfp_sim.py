"""The simulated LFP has the properties it claims, measured with scipy.signal.welch.

Facts of the trade checked (common practice): a background whose power falls
about as 1/f at low frequencies, theta (about 8 Hz) while the animal runs and
not at rest, sharp-wave ripples (150-250 Hz, 30-100 ms) only at rest.
"""

import numpy as np
from scipy import signal

from rig_adapters.sim.lfp import LfpSettings, LfpSynth

RATE_HZ = 1500.0


def test_background_falls_as_one_over_f_and_theta_follows_running():
    s = LfpSettings(rate_hz=RATE_HZ, n_channels=2, ripple_rate_hz=1e-9)
    still = LfpSynth(s, 1).block(np.zeros(int(RATE_HZ * 120)))
    running = LfpSynth(s, 2).block(np.full(int(RATE_HZ * 120), 20.0))
    f, p_still = signal.welch(still[:, 0], fs=RATE_HZ, nperseg=8192)
    _, p_run = signal.welch(running[:, 0], fs=RATE_HZ, nperseg=8192)
    band = (f >= 1.0) & (f <= 10.0)
    slope = np.polyfit(np.log(f[band]), np.log(p_still[band]), 1)[0]
    assert -1.5 < slope < -0.5  # 1/f: a log-log slope of -1
    theta = np.argmin(np.abs(f - 8.0))
    assert p_run[theta] > 5 * p_still[theta]  # theta stands well above the background while running


def test_ripples_come_only_at_rest_with_their_frequency_and_duration():
    s = LfpSettings(rate_hz=RATE_HZ, n_channels=2)
    synth = LfpSynth(s, 3)
    speed = np.zeros(int(RATE_HZ * 60))
    speed[int(RATE_HZ * 20):int(RATE_HZ * 40)] = 20.0
    for i in range(0, speed.size, 300):  # in blocks, as the simulated rig makes it
        synth.block(speed[i:i + 300])
    assert len(synth.ripples) > 10
    for r in synth.ripples:
        assert not 20.0 <= r.start_s < 40.0 + s.rest_settle_s
        assert 150.0 <= r.freq_hz <= 250.0 and 0.03 <= r.end_s - r.start_s <= 0.1


def test_brief_excursions_above_the_rest_speed_neither_end_a_rest_nor_start_a_ripple():
    # Immobility is speed below a few cm/s for some hundreds of ms, brief movements merged (common
    # practice): 0.1 s at 3 cm/s every 2 s (tracker jitter, a head movement) keeps one rest going, so
    # its ripple train is never restarted (restarting waits rest_settle_s again); 1 s of running ends it.
    s = LfpSettings(rate_hz=RATE_HZ, n_channels=2, ripple_rate_hz=2.0)
    t = np.arange(int(RATE_HZ * 60)) / RATE_HZ
    speed = np.where((t % 2.0) < 0.1, 3.0, 0.0)
    speed[(t >= 30.0) & (t < 31.0)] = 20.0
    for brk, rests in ((s.rest_break_s, 2), (0.0, 30)):
        synth = LfpSynth(LfpSettings(rate_hz=RATE_HZ, n_channels=2, ripple_rate_hz=2.0, rest_break_s=brk), 5)
        began = set()
        for i in range(0, speed.size, 300):
            synth.block(speed[i:i + 300])
            began.add(synth._rest_since_s)
        assert len(began - {np.inf}) == rests  # the start of every rest the blocks ended in
        starts = np.array([r.start_s for r in synth.ripples])
        assert starts.size > 40
        assert not np.any((starts % 2.0) < 0.1)  # none begins during an excursion
        assert not np.any((starts >= 30.0) & (starts < 31.0 + s.rest_settle_s))
