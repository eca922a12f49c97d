"""Results at stated drive levels, end to end: sample_runs/single_level_plan.toml measured by
`tonebench run` on the simulated bench, judged against an IMD limit, and found by
`tonebench find --json`; the worse-of-two convention through the store.

Truth from the simulator's device model (sim/physics.py dut_nonlinearity, no p1db_dbm: the pure
cubic y = a1 x + a3 x^3, IIP3 = iip3_dbm + iip3_slope_db_per_ghz (f - ref) at the DUT input).
With r = (A / A_IIP3)^2 = 10^((Pin - IIP3)/10) each product has amplitude (3/4)|a3| A^3 = r a1 A
and each tone a1 A (1 - 3 r) (its (9/4) a3 A^3 term), so IM3 re one tone is
20 log10(r / (1 - 3 r)) dBc: 2 (Pin - IIP3) for small r (textbook two-tone relation, from memory).
"""

from __future__ import annotations

import gzip
import hashlib
import json
import math

import pytest
import sqlalchemy as sa
from cli_invoke import invoke
from conftest import SAMPLE_RUNS

from tonebench.catalog.transfer_format import canonical
from tonebench.results.stored_results import analyze_run
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import LevelResult, Point, Result, ResultFlag, Run

PLAN = SAMPLE_RUNS / "single_level_plan.toml"
BENCH_TEXT = (SAMPLE_RUNS / "sim_bench.toml").read_text()
DUT = {"ref_freq_hz": 2.45e9, "iip3_dbm": -2.0, "iip3_slope_db_per_ghz": 1.0}  # sim_bench.toml [simulation.dut]
DBC_TOLERANCE_DB = 0.2  # issue 15 acceptance
PEP_OVER_TONE_DB = 20 * math.log10(2)  # two equal tones: PEP = 4x one tone


def truth_dbc(center_hz: float, tone_dbm: float) -> float:
    iip3_dbm = DUT["iip3_dbm"] + DUT["iip3_slope_db_per_ghz"] * (center_hz - DUT["ref_freq_hz"]) / 1e9
    r = 10 ** ((tone_dbm - iip3_dbm) / 10)
    return 20 * math.log10(r / (1 - 3 * r))


def cubic_bench(folder) -> str:
    assert "\np1db_dbm = -12.0\n" in BENCH_TEXT
    path = folder / "cubic_bench.toml"
    path.write_text(BENCH_TEXT.replace("\np1db_dbm = -12.0\n", "\n"))  # the pure cubic
    return path


def find_json(db) -> list[dict]:
    result = invoke("find", "--part", "QLN-0731B", "--json", "--db", db)
    assert result.exit_code == 0, result.output
    return json.loads(result.output)


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    folder = tmp_path_factory.mktemp("single-level")
    db = folder / "t.db"
    result = invoke("run", PLAN, "--bench", cubic_bench(folder), "--db", db)
    assert result.exit_code == 0, result.output
    return db


def test_single_level_plan_gives_imd3_dbc_within_0p2_db_of_the_truth(measured):
    rows = find_json(measured)
    assert [r["center_hz"] for r in rows] == [2.40e9, 2.48e9]
    for row in rows:
        assert [level["tone_dbm"] for level in row["levels"]] == [-30.0, -25.0]
        for level in row["levels"]:
            truth = truth_dbc(row["center_hz"], level["tone_dbm"])
            for side in ("lower", "upper"):
                dbc = level[f"im3_{side}_dbc"]
                assert abs(dbc - truth) < DBC_TOLERANCE_DB, (row["center_hz"], level["tone_dbm"], side, dbc, truth)
                # The same product re the PEP of two (nearly) equal tones.
                assert level[f"im3_{side}_dbc_pep"] == pytest.approx(dbc - PEP_OVER_TONE_DB, abs=0.01)
                # The single-point intercept: IIP3 = Pin + delta/2.
                assert level[f"iip3_{side}_dbm"] == pytest.approx(level["tone_dbm"] - dbc / 2, abs=0.01)
            assert level["iip3_bound_db"] is not None and level["im3_bound_db"] >= 2 * level["iip3_bound_db"] - 1e-9


def test_only_the_fitted_intercept_is_refused_with_its_reason(measured):
    for row in find_json(measured):
        assert row["iip3_dbm"] is None and row["n_valid"] == row["n_points"] == 2
        assert "need 3" in row["reason"] and "per level" in row["reason"]
        assert row["intercept_convention"] == "worse"
        for level in row["levels"]:  # the plan reports the worse of the two
            assert level["iip3_dbm"] == min(level["iip3_lower_dbm"], level["iip3_upper_dbm"])


def test_a_dbc_limit_at_the_stated_level_gives_a_verdict(measured):
    add = ("limit", "add", "QLN-0731B", "im3_dbc", "--tone-dbm", "-25", "--db", measured)
    # Every truth at -25 dBm lies between -46.0 and -45.7 dBc: -44 holds, -47 (at 2.40 GHz only) does not.
    assert invoke(*add, "--max", "-44", "--freq-min-hz", "2.3e9", "--freq-max-hz", "2.5e9").exit_code == 0
    verdicts = {r["center_hz"]: r for r in find_json(measured)}
    assert all(r["verdict"] == "pass" and "im3_dbc at -25.00 dBm per tone" in r["verdict_detail"]
               for r in verdicts.values())
    assert invoke(*add, "--max", "-47", "--freq-min-hz", "2.39e9", "--freq-max-hz", "2.41e9").exit_code == 0
    verdicts = {r["center_hz"]: r for r in find_json(measured)}
    assert verdicts[2.40e9]["verdict"] == "fail" and "above max -47.00" in verdicts[2.40e9]["verdict_detail"]
    assert verdicts[2.48e9]["verdict"] == "pass"
    # A limit at a level the plan did not measure does not apply to these results.
    at_other = invoke("limit", "add", "QLN-0731B", "im3_dbc_pep", "--tone-dbm", "-20", "--max", "-90",
                      "--freq-min-hz", "2.3e9", "--freq-max-hz", "2.5e9", "--db", measured)
    assert at_other.exit_code == 0
    assert find_json(measured)[1]["verdict"] == "pass"


def test_the_run_report_shows_the_levels_and_the_convention(measured):
    [report] = measured.parent.glob("report-*.html")
    page = report.read_text()
    assert "IMD at each drive level" in page and "IM3 lower re PEP (dBc)" in page
    assert "the worse (lower IIP3) of lower and upper" in page
    # Two levels fit no intercept: the sweep plots do not call their points "in the fit".
    assert "IM3 lower (2f1-f2), valid, no intercept fitted" in page and "(2f1-f2), in the fit" not in page
    level = find_json(measured)[0]["levels"][1]
    assert f"<td>{level['im3_lower_dbc']:+.2f}</td><td>{level['im3_upper_dbc']:+.2f}</td>" in page


def test_an_imd_limit_without_its_tone_level_is_one_line(measured):
    result = invoke("limit", "add", "QLN-0731B", "im3_dbc", "--max", "-40", "--freq-min-hz", "2.3e9",
                    "--freq-max-hz", "2.5e9", "--db", measured)
    assert result.exit_code == 2
    assert "give its tone_dbm" in result.output and len(result.output.strip().splitlines()) == 1


def test_worse_convention_reports_the_lower_intercept_of_asymmetric_stored_products(tmp_path):
    """The simulator's products are symmetric (a memoryless device), so a ramp run's stored upper
    products are lowered by 2 dB (upper IIP3 1 dB higher) and the run analyzed again."""
    plan = tmp_path / "ramp.toml"
    text = (SAMPLE_RUNS / "demo_plan.toml").read_text().replace("center_freqs_hz = [2.40e9, 2.45e9, 2.48e9]",
                                                                 "center_freqs_hz = [2.45e9]")
    plan.write_text(text + '\n[results]\nintercept = "worse"\n')
    db = tmp_path / "t.db"
    result = invoke("run", plan, "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", db)
    assert result.exit_code == 0, result.output
    engine = open_database(f"sqlite:///{db}")
    sessions = session_factory(engine)
    with sessions.begin() as session:
        session.execute(sa.update(Point).values(im3_upper_dbm=Point.im3_upper_dbm - 2.0))
        guid = session.scalars(sa.select(Run.guid)).one()
    [stored] = analyze_run(sessions, guid)
    assert stored.iip3_upper_dbm - stored.iip3_lower_dbm == pytest.approx(1.0, abs=0.02)
    assert stored.intercept_convention == "worse"
    assert stored.iip3_dbm == stored.iip3_lower_dbm and stored.oip3_dbm == stored.oip3_lower_dbm
    with sessions() as session:  # a ramp stores per-level rows only when its plan asks
        assert session.scalar(sa.select(sa.func.count(LevelResult.id))) == 0
    lower, upper = (f'<td class="num">{v:.2f}</td>' for v in (stored.iip3_lower_dbm, stored.iip3_upper_dbm))
    # The report shows the stored result, and a run with none assessed again: the same (worse) pair.
    for forget in (False, True):
        if forget:
            with sessions.begin() as session:
                session.execute(sa.delete(ResultFlag))
                session.execute(sa.delete(Result))
        page_path = tmp_path / f"report-{forget}.html"
        shown = invoke("report", guid[:8], "--db", db, "--out", page_path)
        assert shown.exit_code == 0, shown.output
        assert f"{lower}{upper}{lower}" in page_path.read_text()  # IIP3 lower, upper, then the reported: lower
    engine.dispose()


def test_level_rows_travel_in_transfer_files(measured, tmp_path):
    first, second, other = tmp_path / "a.jsonl.gz", tmp_path / "b.jsonl.gz", tmp_path / "other.db"
    assert invoke("export", first, "--db", measured).exit_code == 0
    assert invoke("import", first, "--db", other).exit_code == 0
    assert invoke("export", second, "--db", other).exit_code == 0
    assert first.read_bytes() == second.read_bytes()
    assert [r["levels"] for r in find_json(other)] == [r["levels"] for r in find_json(measured)]
    # A row naming no point of its run is refused in one line, nothing imported.
    text = gzip.decompress(first.read_bytes()).decode().replace('"point_key":"c2400000000/d1000000/p-25.00","tone_dbm"',
                                                                 '"point_key":"c1/p-99.00","tone_dbm"', 1)
    lines = text.splitlines()
    body = "".join(line + "\n" for line in lines[:-1])
    trailer = json.loads(lines[-1])  # re-sealed, so only the key is wrong
    trailer["sha256"] = hashlib.sha256(body.encode()).hexdigest()
    damaged = tmp_path / "damaged.jsonl.gz"
    damaged.write_bytes(gzip.compress((body + canonical(trailer) + "\n").encode(), mtime=0))
    result = invoke("import", damaged, "--db", tmp_path / "none.db")
    assert result.exit_code == 2 and "names no point of this run" in result.output
