"""The plan as points: a plan file expanded over its axes into points with stable keys, and the
limits every point is checked against before RF goes on.

axes.py declares each axis once (unit, plan field, key part, how it is set on the bench) and the
sweep key; points.py expands a plan over them; limits.py holds the power limits, the one
prediction of the analyzer input, and the frequency needs of a plan.
view.py is `tonebench.plan.load(path)`, the plan as data for notebooks (pandas imported there only).
May import config/, planes/ and the top-level errors and units; never instruments, the store or a run.
"""


def load(path):
    """Read and check a plan file; its settings and points() (tonebench.plan.view.PlanView)."""
    from tonebench.plan.view import load as load_view

    return load_view(path)


__all__ = ["load"]
