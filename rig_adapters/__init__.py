"""placeloop's shell: wire protocol, ZeroMQ ingest and publish, recorder, simulated rig, CLI."""
