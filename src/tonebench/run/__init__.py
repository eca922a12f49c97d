"""One run on an open bench: starting and resuming it, the sequencer that measures each point,
the point guard that retries a faulted point, the watchdog, drift watch and the run's event log.

May import every layer below it (config, plan, planes, instruments, sim, store, calibration,
results, report); never queue/ or cli/.
"""
