"""Sequence-number bookkeeping and the spike watermark (decoder.session.streams)."""

import math

from decoder.session.streams import SpikeWatermark, StreamHealth


def test_gaps_duplicates_and_restarts_are_told_apart():
    health = StreamHealth()
    verdicts = [health.accept("ephys", s) for s in (0, 1, 2, 5, 5, 4, 6, 0, 1)]
    assert verdicts == ["ok", "ok", "ok", "gap", "stale", "stale", "ok", "restart", "ok"]
    h = health.sources["ephys"]
    assert (h.gaps, h.stale, h.restarts, h.messages) == (2, 2, 1, 7)
    assert health.total_gaps == 2 and health.total_stale == 2


def test_sources_are_independent():
    health = StreamHealth()
    assert health.accept("a", 3) == "ok"      # the first number seen starts the count
    assert health.accept("b", 0) == "ok"
    assert health.accept("a", 4) == "ok"
    assert set(health.summary()) == {"a", "b"}


def test_watermark_moves_forward_only_and_refuses_jumps():
    mark = SpikeWatermark(max_jump_s=30.0)
    assert mark.t_s == -math.inf
    assert mark.advance(1000.0) and mark.t_s == 1000.0   # the first time may be anything
    assert mark.advance(999.0) and mark.t_s == 1000.0    # older data leaves it where it is
    assert not mark.advance(1030.5) and mark.t_s == 1000.0
    assert mark.advance(1029.0) and mark.t_s == 1029.0
    mark.reset()
    assert mark.t_s == -math.inf and mark.advance(2.0)
