"""The run list and the run detail only read: a run whose process is gone is shown as stored,
and nothing in the store changes (closing such runs is the command's job, before the view)."""

from __future__ import annotations

import platform
import shutil
import sqlite3
import subprocess
import sys

from conftest import PROJECT_ROOT
from rich.console import Console

from tonebench.report.run_views import describe_run, list_runs
from tonebench.store.database import upgrade_database

FIXTURE_DB = PROJECT_ROOT / "tests" / "data" / "pre_layout" / "tonebench.db"


def _dead_owner() -> str:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return f"{platform.node()}:{child.pid}"


def test_views_leave_a_dead_running_run_as_stored(tmp_path):
    path = tmp_path / "tonebench.db"
    shutil.copy(FIXTURE_DB, path)
    upgrade_database(f"sqlite:///{path}")  # written at an older schema revision
    with sqlite3.connect(path) as connection:
        connection.execute("UPDATE runs SET status = 'running', end_reason = NULL, owner = ?", (_dead_owner(),))
        guid = connection.execute("SELECT guid FROM runs").fetchone()[0]
    connection.close()
    stored = _stored(path)

    listed = list_runs(f"sqlite:///{path}", 10)
    console = Console(record=True, width=200)
    describe_run(f"sqlite:///{path}", guid[:8], console)

    assert [row[2] for row in listed] == ["running"]
    assert "status:  running" in console.export_text()
    assert _stored(path) == stored  # read back with the WAL: nothing was written


def _stored(path) -> tuple:
    connection = sqlite3.connect(path)
    try:
        return (connection.execute("SELECT status, end_reason, ended_at FROM runs").fetchall(),
                connection.execute("SELECT count(*) FROM events").fetchone())
    finally:
        connection.close()


def test_the_commands_close_a_dead_run_before_showing_it(tmp_path):
    from typer.testing import CliRunner

    from tonebench.cli import app

    path = tmp_path / "tonebench.db"
    shutil.copy(FIXTURE_DB, path)
    upgrade_database(f"sqlite:///{path}")  # written at an older schema revision
    with sqlite3.connect(path) as connection:
        connection.execute("UPDATE runs SET status = 'running', end_reason = NULL, owner = ?", (_dead_owner(),))
    connection.close()

    listed = CliRunner(env={"COLUMNS": "200"}).invoke(app, ["runs", "--db", f"sqlite:///{path}"])

    assert listed.exit_code == 0, listed.output
    assert "aborted" in listed.output and "running" not in listed.output
    assert _stored(path)[0][0][0] == "aborted"
