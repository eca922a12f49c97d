"""A database and plans written before the package layout changed read, analyze and export as
they did then (tests/data/pre_layout/README.md says how the expected files were made)."""

import csv
import gzip
import io
import json
import re
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from conftest import PROJECT_ROOT
from tonebench.cli import app
from tonebench.config.plan_file import load_plan
from tonebench.plan.points import expand
from tonebench.store.database import schema_head

FIXTURE = PROJECT_ROOT / "tests" / "data" / "pre_layout"
RUN = "c5af811f"
SCHEMA_NOW = schema_head()
runner = CliRunner(env={"COLUMNS": "200"})


@pytest.fixture
def old_db(tmp_path):
    path = tmp_path / "tonebench.db"
    shutil.copy(FIXTURE / "tonebench.db", path)
    url = f"sqlite:///{path}"
    invoke("db", "upgrade", "--db", url)  # written at an older schema revision; upgraded as a user would
    return url


def invoke(*args) -> str:
    result = runner.invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return result.output


def exported(db_url: str, tmp_path: Path) -> str:
    invoke("export", tmp_path / "out.jsonl.gz", "--db", db_url)
    with gzip.open(tmp_path / "out.jsonl.gz", "rt", encoding="utf-8", newline="") as handle:
        return handle.read()


def without_result_times(text: str) -> str:
    # An analysis stores its results anew, with the time it ran (and the trailer's digest changes).
    text = re.sub(r'"created_at":"[^"]*"', '"created_at":"-"', text)
    return re.sub(r'"sha256":"[0-9a-f]{64}"}\n$', '"sha256":"-"}\n', text)


def at_schema_now(text: str) -> str:
    """The export as the upgraded database writes it: its header names today's schema revision,
    its points carry the columns added since (empty for these points: written as null), its results
    the intercept convention (null as stored before it, "mean" once analyzed again: what they were),
    and the trailer's digest (of everything above it) changes with them."""
    text = text.replace('"schema":"0002"', f'"schema":"{SCHEMA_NOW}"', 1)
    text = re.sub(r'"(gate_read_v|gate_current_a|drain_read_v|drain_current_a|temperature_c|chamber_read_c)":null,', "", text)
    text = re.sub(r'"intercept_convention":(null|"mean"),', "", text)
    return re.sub(r'"sha256":"[0-9a-f]{64}"}\n$', '"sha256":"-"}\n', text)


def test_export_is_byte_identical_but_for_the_schema_revision(old_db, tmp_path):
    assert at_schema_now(exported(old_db, tmp_path)) == at_schema_now((FIXTURE / "export.jsonl").read_text(encoding="utf-8"))


def test_analyze_prints_and_stores_the_same(old_db, tmp_path):
    assert numbers(invoke("analyze", RUN, "--db", old_db)) == numbers((FIXTURE / "analyze.out").read_text())
    expected = (FIXTURE / "export.jsonl").read_text(encoding="utf-8")
    after = exported(old_db, tmp_path)
    assert after != expected  # the results were written again, with new times
    # Notes name frequencies with SI prefixes since (issue 12); the analysis is otherwise the same.
    expected = expected.replace("residual at 1e+06 Hz spacing", "residual at 1 MHz spacing")
    # Recomputed floats may differ in the last bit between numpy builds (summation order): 12 digits.
    assert records(without_result_times(at_schema_now(after))) == records(without_result_times(at_schema_now(expected)))


def records(text: str) -> list:
    return [_rounded(json.loads(line)) for line in text.splitlines()]


def _rounded(value):
    if isinstance(value, float):
        return float(f"{value:.12g}")
    if isinstance(value, dict):
        return {key: _rounded(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_rounded(item) for item in value]
    return value


def numbers(text: str) -> list[float]:
    """Every number a view prints, in order, GUIDs left out: the terminal tables changed their
    format since (issue 12: SI frequencies, short run ids, verdict colours, fitted widths), the
    values they show must not have."""
    text = re.sub(r"\b[0-9a-f]{8}(-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12})?\b", "", text)
    # Then as now, centres print in GHz and spacings in MHz (then in a GHz column, now as "2.4 GHz").
    return [float(token.replace("±", "")) for token in re.findall(r"[-+±]?\d+(?:\.\d+)?", text)]


@pytest.mark.parametrize("command, expected", [(("show", RUN), "show.out"), (("runs",), "runs.out"), (("find",), "find.out")])
def test_views_print_the_same_values(old_db, command, expected):
    now, then = numbers(invoke(*command, "--db", old_db)), numbers((FIXTURE / expected).read_text())
    assert len(now) > 5 and now == then


def test_find_csv_is_the_same_but_for_the_temperature_column(old_db):
    now = list(csv.reader(io.StringIO(invoke("find", "--csv", "--db", old_db))))
    column = now[0].index("temperature_c")
    assert all(row[column] == "" for row in now[1:])  # measured without a chamber
    then = list(csv.reader(io.StringIO((FIXTURE / "find.csv").read_text())))
    assert [row[:column] + row[column + 1:] for row in now] == then


def test_plans_expand_to_the_same_keys():
    expected = json.loads((FIXTURE / "plan_keys.json").read_text())
    plans = sorted((FIXTURE / "plans").glob("*.toml"))
    assert [p.name for p in plans] == sorted(expected)
    for plan in plans:
        assert [point.key for point in expand(load_plan(plan).settings)] == expected[plan.name], plan.name
