"""What people read: the run report, the comparison report and the calibration page (HTML), and
the terminal views of runs and results. Read-only: nothing here writes to the store.

May import results/, store/, catalog/ and analysis/; never instruments or a run.
"""
