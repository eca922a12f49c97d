"""`tonebench` commands run in this process through typer's test runner."""

from typer.testing import CliRunner

from tonebench.cli import app

runner = CliRunner(env={"COLUMNS": "220"})  # wide enough for the results table


def invoke(*args):
    return runner.invoke(app, [str(a) for a in args])
