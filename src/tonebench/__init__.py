"""tonebench: two-tone intercept measurements on real or simulated benches.

For notebooks and scripts (the stable API; README, "Python API"):

    import tonebench
    db = tonebench.open("runs/lab.db")      # read-only; a path or URL, default as the CLI's
    db.runs(); run = db.run("62e9"); run.points(); run.results(); run.figure(center_hz=2.45e9)
    db.find(part="KLN-2417A", freq_hz=(2.4e9, 2.5e9)); db.compare(lot="TB24-031")
    tonebench.analysis.fit(df); tonebench.plan.load("plan.toml").points()
"""

from tonebench.version import __version__

__all__ = ["Database", "RunView", "analysis", "open", "plan", "__version__"]


def __getattr__(name: str):
    # Lazily: the CLI imports this package for its version and must not pay for pandas.
    if name in ("open", "Database"):
        from tonebench.api import database

        return getattr(database, name)
    if name == "RunView":
        from tonebench.api.run_view import RunView

        return RunView
    if name in ("analysis", "plan"):
        import importlib

        return importlib.import_module(f"tonebench.{name}")
    raise AttributeError(f"module 'tonebench' has no attribute {name!r}")
