"""Per-source sequence numbers and message counts (gaps, duplicates, restarts), and the spike stream's watermark."""

from __future__ import annotations

import math
from dataclasses import dataclass, field


@dataclass
class SourceHealth:
    """What one source has sent so far."""

    messages: int = 0
    last_seq: int = -1
    gaps: int = 0
    stale: int = 0
    restarts: int = 0
    last_data_t_s: float = float("-inf")


@dataclass
class StreamHealth:
    """Sequence-number bookkeeping for every source.

    A source numbers its messages 0, 1, 2, ... A jump forward is a gap (the
    missing messages are counted); a number not above the last one is a
    duplicate or out-of-order message and is dropped; a return to 0 is a
    restarted publisher.
    """

    sources: dict[str, SourceHealth] = field(default_factory=dict)

    def accept(self, source: str, seq: int) -> str:
        """Classify a message: ``"ok"``, ``"gap"``, ``"restart"`` or ``"stale"`` (drop it)."""
        health = self.sources.get(source)
        if health is None:
            health = self.sources[source] = SourceHealth()
        elif seq == health.last_seq + 1 and seq > 0:
            # The next number in line: by far the usual case.
            health.last_seq = seq
            health.messages += 1
            return "ok"
        verdict = "ok"
        if health.last_seq >= 0:
            if seq == 0 and health.last_seq > 0:
                health.restarts += 1
                verdict = "restart"
            elif seq <= health.last_seq:
                health.stale += 1
                return "stale"
            elif seq > health.last_seq + 1:
                health.gaps += seq - health.last_seq - 1
                verdict = "gap"
        health.last_seq = seq
        health.messages += 1
        return verdict

    @property
    def total_gaps(self) -> int:
        return sum(h.gaps for h in self.sources.values())

    @property
    def total_stale(self) -> int:
        return sum(h.stale for h in self.sources.values())

    def summary(self) -> dict[str, dict]:
        return {name: vars(h).copy() for name, h in self.sources.items()}


#: A message whose timestamps run further ahead of the spike stream's
#: watermark than this (s) is refused: a corrupt clock would otherwise close
#: thousands of steps at once and leave every later spike "late".
MAX_TIME_JUMP_S = 30.0


class SpikeWatermark:
    """The session's data time: the newest timestamp or heartbeat of the spike stream.

    Parameters
    ----------
    max_jump_s : float
        A time further than this past a known watermark is refused.

    Attributes
    ----------
    t_s : float
        The watermark (s); ``-inf`` before the first data.
    """

    def __init__(self, max_jump_s: float = MAX_TIME_JUMP_S) -> None:
        self.max_jump_s = float(max_jump_s)
        self.t_s = -math.inf

    def advance(self, newest_s: float) -> bool:
        """Move to ``newest_s`` if it is later; False, unchanged, when it jumps too far ahead."""
        t = self.t_s
        if newest_s > t:
            if newest_s > t + self.max_jump_s and t != -math.inf:
                return False
            self.t_s = newest_s
        return True

    def reset(self) -> None:
        """Forget the watermark (a restarted source may restart its clock)."""
        self.t_s = -math.inf
