"""placeloop's shell: the wire, the live loop, recorded sessions, offline tools, the simulated rig, the monitor, the command."""
