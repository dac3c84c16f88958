"""Recorded sessions: the crash-safe log (LOG_FORMAT.md), replay and session summaries."""
