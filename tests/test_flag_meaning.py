"""Flags that mean what they say (issue 9, item 9): a result is flagged only where the test system
may have limited it; points left out keep their reasons as point flags. Measured on the simulated
bench (demo over TCP, or simsweep straight on SimBench) and the real store.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from sqlalchemy import create_engine, func, select
from sqlalchemy.orm import Session
from typer.testing import CliRunner

from tonebench.cli import app
from tonebench.store.models import PointFlag, Result, ResultFlag

runner = CliRunner(env={"COLUMNS": "220"})


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo run once: (CLI output, database URL, database path)."""
    out_dir = tmp_path_factory.mktemp("demo")
    result = runner.invoke(app, ["demo", "--out", str(out_dir)])
    assert result.exit_code == 0, result.output
    db_path = Path(re.search(r"database:\s+(\S+)", result.output).group(1))
    return result.output, f"sqlite:///{db_path}", db_path


def test_point_flags_do_not_make_a_clean_result_flagged(demo, tmp_path):
    output, db, db_path = demo
    session = Session(create_engine(db))
    # The noisy low end and the compressed top are left out and say why (point flags) ...
    assert session.scalar(select(func.count()).select_from(PointFlag)) > 0
    # ... but nothing of the test system limited the fitted region: no result flag.
    assert session.scalar(select(func.count()).select_from(ResultFlag)) == 0
    n_results = session.scalar(select(func.count()).select_from(Result))
    assert n_results == 3
    before = db_path.read_bytes()

    flagged = runner.invoke(app, ["find", "--db", db, "--flagged"])
    assert flagged.exit_code == 0 and flagged.output.splitlines()[0] == "0 results (dB, dBm)", flagged.output
    unflagged = runner.invoke(app, ["find", "--db", db, "--unflagged"])
    assert unflagged.exit_code == 0 and unflagged.output.splitlines()[0] == "3 results (dB, dBm)", unflagged.output
    noisy = runner.invoke(app, ["find", "--db", db, "--flag", "analyzer-limited"])
    assert noisy.exit_code == 0 and noisy.output.splitlines()[0] == "0 results (dB, dBm)", noisy.output

    page_path = tmp_path / "compare.html"
    compared = runner.invoke(app, ["compare", "--db", db, "--out", str(page_path)])
    assert compared.exit_code == 0 and "(3 results)" in compared.output, compared.output
    page = page_path.read_text(encoding="utf-8")
    assert "No result in this selection is flagged." in page
    assert "flagged (test-system limited)" not in page  # no grey trace

    shown = runner.invoke(app, ["show", re.search(r"run (\S+):", output).group(1)[:8],
                                "--db", db])
    assert shown.exit_code == 0 and "flags: none" in shown.output
    assert "flagged points: analyzer-limited (noise)" in shown.output  # the reasons stay visible
    assert db_path.read_bytes() == before  # the queries wrote nothing
