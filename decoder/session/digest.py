"""A digest over every decoded step and event: the fingerprint that a replay must reproduce."""

from __future__ import annotations

import hashlib
import struct

from decoder.inference.decoding import DecodedStep
from decoder.session.triggers import TriggerEvent


class StepDigest:
    """SHA-256 over the decoded steps and their events, in step order.

    Each step adds its number, MAP bin, peak probability, 95% HPD size and
    zone masses (little-endian binary), then each event's id, rule, zone and
    time (text). Two runs with the same digest decoded and triggered the same,
    bit for bit. The posterior itself is left out: hashing every bin every
    few ms would cost more than decoding the step.
    """

    def __init__(self) -> None:
        self._hash = hashlib.sha256()

    def add(self, k: int, step: DecodedStep, events: tuple[TriggerEvent, ...]) -> None:
        """Fold in decoded step ``k`` and the events it triggered."""
        h = self._hash
        h.update(struct.pack("<qqdd", k, int(step.map_bin), float(step.peak_prob), float(step.hpd95_size)))
        # A contiguous float64 view of the decoder's buffer: hashed in place, no copy.
        h.update(step.zone_mass)
        for ev in events:
            h.update(f"{ev.event_id}|{ev.rule}|{ev.zone}|{ev.t_s!r}".encode())

    @property
    def hex(self) -> str:
        """Hex digest of everything added so far."""
        return self._hash.hexdigest()
