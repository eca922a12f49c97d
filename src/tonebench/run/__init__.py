"""One run on an open bench: starting it (start) and resuming it (resume), with the calibration
choice, bench connection, leveler set-up and event relay they share; driving it (drive) and
storing how it ended (ending); the sequencer that measures each point, the point guard that
retries a faulted point, the watchdog, drift watch and the run's event log.

May import every layer below it (config, plan, planes, instruments, sim, store, calibration,
results, report); never queue/ or cli/: a caller stops a run by raising RunCancelled from its
progress callback.
"""
