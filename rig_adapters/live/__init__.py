"""The live loop: sockets, the poller, the watchdog, the TTL line and the kernels' warm-up."""
