"""Sequence-number bookkeeping and the spike watermark (decoder.session.streams).

The rules checked are those of PROTOCOL.md, section 7 (our own protocol): a
gap is a number never seen, i.e. a message sent and not received (common
practice for sequence-numbered streams, as in the sequence numbers of RTP,
RFC 3550, section 5.1).
"""

import math

from decoder.session.streams import (
    OTHER_SOURCES,
    RESTART_AFTER_MESSAGES,
    RESYNC_AFTER_MESSAGES,
    SpikeWatermark,
    StreamHealth,
)


def test_gaps_duplicates_and_restarts_are_told_apart():
    health = StreamHealth()
    verdicts = [health.accept("ephys", s) for s in (0, 1, 2, 5, 6, 6, 4, 7, 0, 1)]
    assert verdicts == ["ok", "ok", "ok", "gap", "ok", "stale", "stale", "ok", "restart", "ok"]
    h = health.sources["ephys"]
    assert (h.gaps, h.stale, h.restarts, h.messages, h.rejected) == (2, 2, 1, 8, 0)
    assert health.total_gaps == 2 and health.total_stale == 2


def test_sources_are_independent():
    health = StreamHealth()
    assert health.accept("a", 3) == "ok"      # the first number seen starts the count
    assert health.accept("b", 0) == "ok"
    assert health.accept("a", 4) == "ok"
    assert set(health.summary()) == {"a", "b"}


def test_a_rejected_frame_takes_its_number_and_is_no_gap():
    health = StreamHealth()
    for seq in (0, 1, 2):
        health.accept("tracker", seq)
    assert health.note_rejected("tracker", 3) == "ok"
    assert health.accept("tracker", 4) == "ok"
    h = health.sources["tracker"]
    assert (h.gaps, h.rejected, h.messages, h.stale) == (0, 1, 4, 0)
    # A message genuinely lost (5 never arrives) is one gap.
    assert health.accept("tracker", 6) == "gap"
    assert (h.gaps, h.rejected) == (1, 1)
    # A rejected frame that repeats a number already seen is rejected, not also stale.
    health.note_rejected("tracker", 6)
    assert (h.rejected, h.stale) == (2, 0)
    assert health.summary()["tracker"]["rejected"] == 2 and health.total_rejected == 2


def test_a_rejected_frame_numbered_0_is_a_restart():
    health = StreamHealth()
    for seq in (0, 1, 2):
        health.accept("ephys", seq)
    assert health.note_rejected("ephys", 0) == "restart"
    assert health.accept("ephys", 1) == "ok"


def test_one_number_jumping_by_a_million_resynchronises():
    health = StreamHealth()
    for seq in range(10):
        health.accept("ephys", seq)
    assert health.accept("ephys", 10 + 10**6) == "gap"
    # The source carries on from before the jump: the jump was one bad number.
    assert [health.accept("ephys", s) for s in (10, 11, 12)] == ["resync", "ok", "ok"]
    h = health.sources["ephys"]
    assert (h.gaps, h.resyncs, h.stale, h.messages) == (0, 1, 0, 14)
    # A jump the source then follows is a gap of the numbers skipped, and stays one.
    assert [health.accept("ephys", s) for s in (20, 21, 13)] == ["gap", "ok", "stale"]
    assert (h.gaps, h.resyncs) == (7, 1)


def test_a_resync_after_a_jump_counts_the_numbers_truly_missing():
    health = StreamHealth()
    for seq in (0, 1, 2):
        health.accept("ephys", seq)
    health.accept("ephys", 10**6)
    # 3 and 4 never came under their numbers; the message with the bad number was one of them.
    assert health.accept("ephys", 5) == "resync"
    assert health.sources["ephys"].gaps == 1


def test_a_first_number_that_is_corrupt_does_not_silence_the_source():
    health = StreamHealth()
    assert health.accept("ephys", 10**6) == "ok"
    assert [health.accept("ephys", s) for s in (1, 2)] == ["resync", "ok"]
    assert health.sources["ephys"].gaps == 0


def test_a_rejected_frame_with_a_corrupt_number_does_not_silence_the_source():
    health = StreamHealth()
    for seq in (0, 1, 2):
        health.accept("ephys", seq)
    health.note_rejected("ephys", 10**6)
    assert health.accept("ephys", 4) == "resync"
    h = health.sources["ephys"]
    assert (h.gaps, h.rejected) == (0, 1)                 # the rejected frame was number 3


def test_watermark_moves_forward_only_and_refuses_jumps():
    mark = SpikeWatermark(max_jump_s=30.0)
    assert mark.t_s == -math.inf and mark.latest_s() == math.inf
    assert mark.advance(1000.0) == "ok" and mark.t_s == 1000.0   # the first time may be anything
    assert mark.advance(999.0) == "ok" and mark.t_s == 1000.0    # older data leaves it where it is
    assert mark.advance(1030.5) == "refused" and mark.t_s == 1000.0
    assert mark.advance(1029.0) == "ok" and mark.t_s == 1029.0
    assert mark.latest_s() == 1059.0
    mark.reset()
    assert mark.t_s == -math.inf and mark.advance(2.0) == "ok"


def test_watermark_follows_a_clock_that_stays_ahead():
    mark = SpikeWatermark(max_jump_s=5.0)
    mark.advance(10.0)
    verdicts = [mark.advance(100.0 + 0.01 * i) for i in range(RESYNC_AFTER_MESSAGES)]
    assert verdicts == ["refused"] * (RESYNC_AFTER_MESSAGES - 1) + ["resync"]
    assert mark.t_s == 100.0 + 0.01 * (RESYNC_AFTER_MESSAGES - 1)


def test_watermark_never_follows_times_that_disagree_or_are_interrupted():
    mark = SpikeWatermark(max_jump_s=5.0)
    mark.advance(10.0)
    # Corrupt stamps scattered far apart never agree with each other.
    assert all(mark.advance(1000.0 + 1000.0 * (i % 2) + i) == "refused" for i in range(50))
    # A run that good data interrupts starts again.
    for _ in range(3):
        for i in range(RESYNC_AFTER_MESSAGES - 1):
            assert mark.advance(500.0 + i) == "refused"
        assert mark.advance(10.5) == "ok"
    assert mark.t_s == 10.5


def test_a_restarted_publisher_whose_first_messages_were_lost_is_a_restart():
    # A subscriber reconnects some 100 ms after its publisher binds again; a PUB socket
    # drops what it sends before then (ZeroMQ guide, "slow joiner"; from memory).
    # Issue 17's probe: every later message was dropped as stale, decoding silently stopped.
    health = StreamHealth()
    for seq in range(500):
        health.accept("ephys", seq)
    verdicts = [health.accept("ephys", s) for s in range(7, 7 + RESTART_AFTER_MESSAGES + 2)]
    assert verdicts == ["stale"] * (RESTART_AFTER_MESSAGES - 1) + ["restart", "ok", "ok"]
    h = health.sources["ephys"]
    assert (h.restarts, h.stale, h.gaps) == (1, RESTART_AFTER_MESSAGES - 1, 0)


def test_repeated_old_numbers_between_numbers_in_line_are_no_restart():
    # A second publisher under the same name (a misconfiguration) interleaves old numbers:
    # each message in line breaks their run, so they stay stale and counted.
    health = StreamHealth()
    for seq in range(100):
        health.accept("ephys", seq)
    verdicts = []
    for i in range(20):
        verdicts.append(health.accept("ephys", 100 + i))
        verdicts.append(health.accept("ephys", 5 + i))
    assert verdicts == ["ok", "stale"] * 20
    assert health.sources["ephys"].restarts == 0 and health.sources["ephys"].stale == 20


def test_recent_messages_sent_again_stay_duplicates():
    # A sender that repeats its last messages (a resent buffer, a test that sends a stretch twice):
    # their numbers lie above half the count, so however many in a row, they are no restart.
    health = StreamHealth()
    for seq in range(200):
        health.accept("tracker", seq)
    assert [health.accept("tracker", s) for s in range(150, 200)] == ["stale"] * 50
    assert health.accept("tracker", 200) == "ok" and health.sources["tracker"].restarts == 0


def test_sources_beyond_the_cap_share_one_entry_and_the_session_streams_always_get_in():
    health = StreamHealth(reserved=frozenset({"ephys", "control"}), max_sources=8)
    verdicts = [health.accept(f"bogus{i}", 0) for i in range(10_000)]
    assert verdicts == ["ok"] * 8 + ["overflow"] * (10_000 - 8)
    assert health.note_rejected("bogus99999", 3) == "overflow"
    assert len(health.sources) == 8
    assert health.accept("ephys", 0) == "ok" and health.accept("control", 1) == "ok"
    summary = health.summary()
    assert summary[OTHER_SOURCES]["messages"] == 10_000 - 8 and summary[OTHER_SOURCES]["rejected"] == 1
    assert health.total_rejected == 1
    # Every frame is counted once: a source's own messages, or the others'.
    assert sum(h["messages"] + h["stale"] + h["rejected"] for h in summary.values()) == 10_000 + 1 + 2


def test_watermark_refuses_a_clock_set_back_and_follows_it_only_if_it_stays():
    mark = SpikeWatermark(max_jump_s=5.0)
    mark.advance(1000.0)
    assert mark.advance(996.0) == "ok" and mark.t_s == 1000.0    # late within the limit, as before
    assert mark.advance(2.0) == "refused" and mark.t_s == 1000.0
    assert mark.advance(999.0) == "ok"                           # one bad stamp, then the stream goes on
    verdicts = [mark.advance(3.0 + 0.01 * i) for i in range(RESYNC_AFTER_MESSAGES)]
    assert verdicts == ["refused"] * (RESYNC_AFTER_MESSAGES - 1) + ["resync"]
    assert mark.t_s == 3.0 + 0.01 * (RESYNC_AFTER_MESSAGES - 1)
    assert mark.advance(-math.inf) == "ok" and mark.t_s == 3.0 + 0.01 * (RESYNC_AFTER_MESSAGES - 1)
