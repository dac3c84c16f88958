"""The digest of decoded steps and events (decoder.session.digest)."""

import hashlib
import struct

import numpy as np

from decoder.inference.decoding import DecodedStep
from decoder.session.digest import StepDigest
from decoder.session.triggers import TriggerEvent


def _step(map_bin, zone_mass):
    fields = dict.fromkeys(DecodedStep._fields)
    fields.update(map_bin=map_bin, peak_prob=0.5, hpd95_size=12, zone_mass=np.array(zone_mass, np.float64))
    return DecodedStep(**fields)


def test_digest_is_sha256_over_the_documented_layout():
    digest = StepDigest()
    event = TriggerEvent(3, "reward", "goal", 1.25, 0.9, (1.0, 2.0), True)
    digest.add(7, _step(42, [0.9, 0.1]), (event,))
    # Source: hashlib.sha256 (FIPS 180-4) over the byte layout the class documents, built independently.
    reference = hashlib.sha256()
    reference.update(struct.pack("<qqdd", 7, 42, 0.5, 12.0))
    reference.update(np.array([0.9, 0.1]).tobytes())
    reference.update(b"3|reward|goal|1.25")
    assert digest.hex == reference.hexdigest()


def test_digest_tells_steps_apart():
    a, b = StepDigest(), StepDigest()
    a.add(1, _step(5, [0.2]), ())
    b.add(1, _step(6, [0.2]), ())
    assert a.hex != b.hex and StepDigest().hex == hashlib.sha256().hexdigest()
