"""Per-source sequence numbers and message counts (gaps, rejected, duplicates, restarts), and the spike stream's watermark."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

#: Sources tracked one by one; messages from further new names share one entry
#: (:data:`OTHER_SOURCES`) and are dropped. A rig has a handful of sources (spikes,
#: tracker, sync box, a few more), so this is far above any real one, and it
#: keeps a flood of invented names from growing the session's tables without bound.
MAX_SOURCES = 256

#: The stream the shell numbers operator commands on (rig_adapters.wire.ingest): no
#: rig source may use the name, or its numbers could make a command look stale.
CONTROL_STREAM = "control"

#: The summary's name for every source beyond :data:`MAX_SOURCES`.
OTHER_SOURCES = "(other sources)"

#: Numbers in a row, each one above the last and all below half the source's
#: count, after which the source is taken to have restarted: a publisher that
#: came back numbering from 0 while its first messages were lost on the way (a
#: subscriber reconnects some 100 ms after a publisher binds again). Recent
#: messages sent again lie above half the count: they stay duplicates.
RESTART_AFTER_MESSAGES = 3


@dataclass
class SourceHealth:
    """What one source has sent so far.

    ``gaps`` counts sequence numbers never seen: messages sent and not
    received. ``rejected`` counts frames that arrived but broke the protocol;
    they took a number, so they are no gap.
    """

    messages: int = 0
    last_seq: int = -1
    gaps: int = 0
    rejected: int = 0
    stale: int = 0
    restarts: int = 0
    resyncs: int = 0
    last_data_t_s: float = float("-inf")
    #: The last number before an unconfirmed jump forward (-1: the jump was the
    #: first number seen); None once the source has continued after the jump.
    jumped_from: int | None = None
    #: Gaps the unconfirmed jump added, taken back if the source resynchronises.
    jump_gaps: int = 0
    #: The newest number of a run of numbers below the count (-1: no run), and its length.
    back_seq: int = -1
    back_run: int = 0


@dataclass
class StreamHealth:
    """Sequence-number bookkeeping for every source.

    A source numbers its messages 0, 1, 2, ... A jump forward is a gap (the
    missing numbers are counted); a return to 0 is a restarted publisher; a
    number not above the last one is a duplicate or out-of-order message and
    is dropped, except right after a jump: a number that carries on from
    before the jump says the jump was one corrupt number, and the count
    resynchronises to it, so one bad number can never silence a stream.
    Likewise :data:`RESTART_AFTER_MESSAGES` numbers in a row below half the
    count, with no message in line between them, are a publisher that
    restarted and lost its first messages: a restart, not a stream dropped for
    good (numbers above half the count are recent messages sent again).

    Parameters
    ----------
    reserved : collection of str
        Source names always tracked, however many others came first (the
        session's own streams).
    max_sources : int
        Sources tracked one by one; messages from further names are counted
        together under :data:`OTHER_SOURCES` and dropped (verdict ``"overflow"``).
    """

    reserved: frozenset[str] = frozenset()
    max_sources: int = MAX_SOURCES
    sources: dict[str, SourceHealth] = field(default_factory=dict)
    #: What every source beyond ``max_sources`` sent, together.
    others: SourceHealth = field(default_factory=SourceHealth)

    def accept(self, source: str, seq: int) -> str:
        """Classify a message: ``"ok"``, ``"gap"``, ``"resync"``, ``"restart"``, ``"stale"`` or ``"overflow"`` (drop those two)."""
        health = self.sources.get(source)
        if health is not None and seq == health.last_seq + 1 and seq > 0:
            # The next number in line: by far the usual case.
            health.last_seq = seq
            health.messages += 1
            health.jumped_from = None
            health.back_run = 0
            return "ok"
        verdict = self._classify(source, seq)
        if verdict == "overflow":
            self.others.messages += 1
        elif verdict == "stale":
            self.sources[source].stale += 1
        else:
            self.sources[source].messages += 1
        return verdict

    def note_rejected(self, source: str, seq: int) -> str:
        """A frame from ``source`` numbered ``seq`` was rejected: it took its number, so it is no gap.

        Returns the same verdict as :meth:`accept`; a ``"restart"`` still means
        the source restarted (the caller acts on it), whatever else the frame
        held. A rejected frame is counted as rejected only, never as stale.
        """
        verdict = self._classify(source, seq)
        (self.others if verdict == "overflow" else self.sources[source]).rejected += 1
        return verdict

    def _classify(self, source: str, seq: int) -> str:
        health = self.sources.get(source)
        if health is None:
            if len(self.sources) >= self.max_sources and source not in self.reserved:
                return "overflow"
            # The first number seen sets the baseline, unconfirmed until the next one follows it.
            self.sources[source] = SourceHealth(last_seq=seq, jumped_from=-1)
            return "ok"
        last = health.last_seq
        if seq == last + 1:
            health.last_seq = seq
            health.jumped_from = None
            health.back_run = 0
            return "ok"
        if seq > last + 1:
            health.back_run = 0
            health.jumped_from = last
            health.jump_gaps = seq - last - 1
            health.gaps += health.jump_gaps
            health.last_seq = seq
            return "gap"
        if seq == 0 and last > 0:
            return self._restart(health, 0)
        before = health.jumped_from
        if before is not None and before < seq < last:
            # The number carries on from before the jump: the jump was one bad number,
            # on a message that took one of the numbers between (the likelier single fault).
            health.gaps += (max(seq - before - 2, 0) if before >= 0 else 0) - health.jump_gaps
            health.resyncs += 1
            health.last_seq = seq
            health.jumped_from = None
            health.jump_gaps = 0
            health.back_run = 0
            return "resync"
        if 2 * seq >= last:
            health.back_run = 0
            return "stale"
        health.back_run = health.back_run + 1 if health.back_run and seq == health.back_seq + 1 else 1
        health.back_seq = seq
        if health.back_run >= RESTART_AFTER_MESSAGES:
            return self._restart(health, seq)
        return "stale"

    @staticmethod
    def _restart(health: SourceHealth, seq: int) -> str:
        health.restarts += 1
        health.last_seq = seq
        health.jumped_from = None
        health.back_run = 0
        return "restart"

    @property
    def total_gaps(self) -> int:
        return sum(h.gaps for h in self.sources.values())

    @property
    def total_stale(self) -> int:
        return sum(h.stale for h in self.sources.values())

    @property
    def total_rejected(self) -> int:
        return sum(h.rejected for h in self.sources.values()) + self.others.rejected

    def summary(self) -> dict[str, dict]:
        """Per source: ``messages``, ``last_seq``, ``gaps``, ``rejected``, ``stale``, ``restarts``, ``resyncs``.

        Sources beyond ``max_sources`` appear together as :data:`OTHER_SOURCES`
        (``messages`` and ``rejected`` only count there), once there are any.
        """
        keep = ("messages", "last_seq", "gaps", "rejected", "stale", "restarts", "resyncs", "last_data_t_s")
        out = {name: {k: getattr(h, k) for k in keep} for name, h in self.sources.items()}
        if self.others.messages or self.others.rejected:
            out[OTHER_SOURCES] = {k: getattr(self.others, k) for k in keep}
        return out


#: Refused messages in a row, each within the limit of the one before, after
#: which the stream has truly moved on: the watermark follows it (resync).
RESYNC_AFTER_MESSAGES = 10


class SpikeWatermark:
    """The session's data time: the newest timestamp or heartbeat of the spike stream.

    Parameters
    ----------
    max_jump_s : float
        A time further than this from a known watermark, ahead or behind, is
        refused (``[session] max_time_jump_s``), unless
        :data:`RESYNC_AFTER_MESSAGES` such times in a row agree with each other:
        then the clock truly jumped (a clock set back, without a restart of
        the sequence numbers, counts as much as one set forward) and the
        watermark follows it.

    Attributes
    ----------
    t_s : float
        The watermark (s); ``-inf`` before the first data.
    """

    def __init__(self, max_jump_s: float) -> None:
        self.max_jump_s = float(max_jump_s)
        self.t_s = -math.inf
        self._run_t_s = -math.inf   # newest time of the current run of refused times
        self._run_n = 0

    def advance(self, newest_s: float) -> str:
        """Move to ``newest_s`` if later: ``"ok"``, ``"refused"`` (too far ahead or behind, unchanged) or ``"resync"`` (moved after a run of refusals).

        ``newest_s`` may be ``-inf`` (a message without a time): always ``"ok"``, no move.
        """
        t = self.t_s
        # Behind by less than the limit is a late message, as usual; further behind, a clock set back.
        if t - self.max_jump_s <= newest_s <= t + self.max_jump_s or t == -math.inf or newest_s == -math.inf:
            if newest_s > t:
                self.t_s = newest_s
            self._run_n = 0
            return "ok"
        run_t = self._run_t_s
        self._run_n = self._run_n + 1 if self._run_n and run_t <= newest_s <= run_t + self.max_jump_s else 1
        self._run_t_s = newest_s
        if self._run_n < RESYNC_AFTER_MESSAGES:
            return "refused"
        self.t_s = newest_s
        self._run_n = 0
        return "resync"

    def latest_s(self) -> float:
        """The latest time another stream's data may carry (s): ``inf`` before the first spike-stream data."""
        return self.t_s + self.max_jump_s if self.t_s != -math.inf else math.inf

    def reset(self) -> None:
        """Forget the watermark (a restarted source may restart its clock)."""
        self.t_s = -math.inf
        self._run_n = 0
