"""Calibration: path-loss sets in the database (imported or measured), closed-loop leveling, and the
test system's own residual IM3.

sets.py stores and loads sets; importers.py reads CSV and Touchstone files; measure.py measures on
an open bench; residual.py fits and splits the system residual; leveling.py levels tones with the
power meter; referral.py turns raw readings into DUT-referred values; workflow.py runs one job
from files to a stored set; page.py draws a set as HTML.
"""
