"""The wire: MessagePack bytes to typed messages and back, and ingest into the pipeline (PROTOCOL.md)."""
