"""What people read: the run report, the comparison report and the calibration page (HTML, all
made and written by report/html.py: one stylesheet, one checked atomic write), and the terminal
views of runs and results. Read-only: nothing here writes to the store; the run report is built
from the stored results (report/stored_sweeps.py), assessed again only when there are none current.

May import results/, store/, catalog/, calibration/ and analysis/; never instruments or a run.
"""
