"""Simulated bench: physics-based instruments served as raw-SCPI sockets on loopback. physics
(the DUT and analyzer models), signal_chain (state, virtual clock, the chain from sources to
analyzer), scpi_parser/scpi_headers/scpi_errors (generic SCPI), instruments (front panels), server,
faults, scenario (the [simulation] table), launch (in-process start).

A leaf: imports only the top-level units and errors (and numpy); nothing of tonebench's own layers.
"""
