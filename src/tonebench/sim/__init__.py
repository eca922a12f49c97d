"""Simulated bench: physics-based instruments served as raw-SCPI sockets on loopback."""
