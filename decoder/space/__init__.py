"""What is decoded over: environments (arenas, track graphs) with their metric and smoothing, and target zones."""
