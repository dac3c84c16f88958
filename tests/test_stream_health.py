"""Sequence-number bookkeeping (decoder.session.streams)."""

from decoder.session.streams import StreamHealth


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
