"""The session pipeline and its parts: streams, positions, steps, judgement, triggers, scoring, digest and outputs."""
