"""Calibration: path-loss sets in the database (imported or measured), closed-loop leveling, and the
test system's own residual IM3.

sets.py stores and loads sets; importers.py reads CSV and Touchstone files; measure.py measures on
an open bench; residual.py fits and splits the system residual; leveling.py levels tones with the
power meter; bench_session.py opens a bench for one job (RF off on every way out); workflow.py runs
one job from files to a stored set. The plane arithmetic is planes/, the limits plan/limits.py.
"""
