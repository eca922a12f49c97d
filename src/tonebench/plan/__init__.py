"""The plan as points: a plan file expanded over its axes into points with stable keys, and the
limits every point is checked against before RF goes on.

May import config/, planes/ and the top-level errors and units; never instruments, the store or a run.
"""
