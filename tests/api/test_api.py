"""The Python API (issue 13) against the CLI on the same database: the same rows and numbers;
tonebench.analysis.fit against a textbook cubic; read-only unless a call writes; the worked
example runs against the demo database."""

from __future__ import annotations

import hashlib
import json
import math
import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from cli_invoke import invoke
from conftest import PROJECT_ROOT, SAMPLE_RUNS

import tonebench
from tonebench.catalog.synthetic import Layout, fill
from tonebench.errors import InputError
from tonebench.store import open_database
from tonebench.units import SYSTEM_IMPEDANCE_OHM, watt_to_dbm


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory):
    """A sample run on the simulated bench, with a spec limit (verdicts), and six synthetic
    devices from another bench beside it."""
    folder = tmp_path_factory.mktemp("api")
    db = folder / "lab.db"
    assert invoke("limit", "add", "KLN-2417A", "iip3_dbm", "--min", "-2.1", "--freq-min-hz", "2.4e9",
                  "--freq-max-hz", "2.46e9", "--db", db).exit_code == 0
    result = invoke("run", SAMPLE_RUNS / "demo_plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", db)
    assert result.exit_code == 0, result.output
    engine = open_database(f"sqlite:///{db}")
    fill(engine, 6, seed=5, layout=Layout(centers_hz=(2.45e9,), spacings_hz=(1e6,), biases_v=(None,),
                                          tones_dbm=(-30.0, -25.0, -20.0, -15.0)), n_lots=2, random_verdicts=True)
    engine.dispose()
    return db


def cli_json(*args) -> list[dict]:
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    return json.loads(result.output)


def same(a, b) -> bool:
    if a is None or (isinstance(a, float) and math.isnan(a)):
        return b is None or (isinstance(b, float) and math.isnan(b))
    if isinstance(a, float) or isinstance(b, float):
        return b is not None and math.isclose(float(a), float(b), rel_tol=0, abs_tol=1e-12)
    return a == b


def test_find_gives_the_rows_of_tonebench_find(demo_db):
    db = tonebench.open(str(demo_db))
    for query, flags in (({}, []), ({"part": "KLN-2417A"}, ["--part", "KLN-2417A"]),
                         ({"freq_hz": (2.44e9, 2.46e9), "verdict": ["pass", "fail"]},
                          ["--freq-min-hz", "2.44e9", "--freq-max-hz", "2.46e9", "--verdict", "pass", "--verdict", "fail"])):
        frame = db.find(**query)
        expected = cli_json("find", "--json", "--db", demo_db, *flags)
        assert len(frame) == len(expected) > 0
        for row, want in zip(frame.to_dict("records"), expected):
            row["started_at"] = row["started_at"].isoformat()
            row["tags"], row["flags"] = list(row["tags"]), list(row["flags"])
            assert set(row) == set(want)
            assert all(same(row[k], want[k]) for k in want), (row, want)


def test_runs_and_one_run_agree_with_runs_and_show(demo_db):
    db = tonebench.open(demo_db)  # a plain path, as the CLI takes it
    runs = db.runs()
    listed = invoke("runs", "--db", demo_db).output
    assert len(runs) == 7  # the sample run and six synthetic ones
    for row in runs.itertuples():
        assert re.search(rf"{row.run_guid[:8]}\s.*{row.status}.*\s{row.points}\s*$", listed, re.M), row
    sample = runs[runs["part_number"] == "KLN-2417A"].iloc[0]
    run = db.run(sample["run_guid"][:6])
    shown = invoke("show", run.guid[:8], "--db", demo_db).output
    results = run.results()
    assert len(results) == 3
    for row in results.itertuples():
        text = f"{row.iip3_dbm:+.2f} ±{row.iip3_bound_db:.2f}"
        assert text in shown and f"{row.n_valid}/{row.n_points}" in shown
    verdicts = dict(zip(results["center_hz"], results["verdict"]))
    assert verdicts == {2.40e9: "fail", 2.45e9: "pass", 2.48e9: "no-limit"}  # -2.13, -2.07 against -2.1; out of range


def test_points_carry_the_fit_region_and_the_flags_show_counts(demo_db):
    db = tonebench.open(demo_db)
    run = db.run(db.runs(part="KLN-2417A")["run_guid"].iloc[0])
    points = run.points()
    assert len(points) == 51 and list(points["seq"]) == list(range(51))
    results = run.results().set_index("center_hz")
    for center_hz, sweep in points.groupby("center_hz"):
        assert sweep["in_fit"].sum() == results.loc[center_hz, "n_valid"]
        assert sweep.loc[~sweep["in_fit"], "left_out"].notna().all() and sweep.loc[sweep["in_fit"], "left_out"].isna().all()
    shown = invoke("show", run.guid[:8], "--db", demo_db).output
    counts = dict(re.findall(r"([a-z-]+(?: \([a-z]+\))?) (\d+)", shown.split("flagged points: ", 1)[1].split("(reasons", 1)[0]))
    assert counts and all(sum(flag in flags for flags in points["flags"]) == int(n) for flag, n in counts.items())
    assert {"rbw_hz", "atten_db", "raw_lower_dbm", "pin1_dbm", "in1_loss_db", "point"} <= set(points.columns)
    assert points["point"].iloc[0] == "2.4 GHz, spacing 1 MHz, -40.00 dBm per tone"


def test_a_stored_sweep_fitted_again_from_its_table_gives_the_stored_result(demo_db):
    db = tonebench.open(demo_db)
    run = db.run(db.runs(part="KLN-2417A")["run_guid"].iloc[0])
    points, results = run.points(), run.results()
    for row in results.itertuples():
        sweep = points[points["center_hz"] == row.center_hz]
        assessment = tonebench.analysis.fit(sweep, run.analysis_settings(row.center_hz, row.spacing_hz))
        assert assessment.fit.iip3_dbm == pytest.approx(row.iip3_dbm, abs=1e-9)
        assert assessment.iip3_bound_db == pytest.approx(row.iip3_bound_db, abs=1e-9)
        assert assessment.fit.n_valid == row.n_valid
    with pytest.raises(InputError, match="holds 3 values of center_hz; fit one sweep at a time"):
        tonebench.analysis.fit(points)
    with pytest.raises(InputError, match="no column noise_lower_dbm, noise_upper_dbm"):
        tonebench.analysis.fit(points.drop(columns=["noise_lower_dbm", "noise_upper_dbm"]))


def test_fit_returns_the_textbook_intercept_of_a_cubic():
    # y = a1 x + a3 x^3 driven by two tones of amplitude A: fundamental a1 A + (9/4) a3 A^3, IM3
    # (3/4) |a3| A^3, and the input intercept amplitude A_IP3 = sqrt((4/3) |a1/a3|) (the classic
    # power-series result, e.g. Razavi, RF Microelectronics, ch. 2; from memory). 50 ohm.
    a1, iip3_dbm = 10.0, 5.0
    a_ip3_sq = 2.0 * SYSTEM_IMPEDANCE_OHM * 10 ** ((iip3_dbm - 30.0) / 10.0)
    a3 = -(4.0 / 3.0) * a1 / a_ip3_sq
    pin_dbm = np.arange(-55.0, -29.0, 2.0)  # 35 dB and more under the intercept: compression < 0.01 dB
    amp = np.sqrt(2.0 * SYSTEM_IMPEDANCE_OHM * 10 ** ((pin_dbm - 30.0) / 10.0))

    def dbm(v):
        return watt_to_dbm(np.abs(v) ** 2 / (2.0 * SYSTEM_IMPEDANCE_OHM))

    fundamental, im3 = dbm(a1 * amp + 2.25 * a3 * amp**3), dbm(0.75 * a3 * amp**3)
    table = pd.DataFrame({"pin1_dbm": pin_dbm, "pin2_dbm": pin_dbm, "pout_f1_dbm": fundamental, "pout_f2_dbm": fundamental,
                          "im3_lower_dbm": im3, "im3_upper_dbm": im3, "noise_lower_dbm": -200.0, "noise_upper_dbm": -200.0})
    assessment = tonebench.analysis.fit(table)
    assert assessment.fit.iip3_dbm == pytest.approx(iip3_dbm, abs=0.01)
    assert assessment.fit.oip3_dbm == pytest.approx(iip3_dbm + 20.0, abs=0.01)  # 20 log10(a1) = 20 dB gain
    assert assessment.fit.gain_db == pytest.approx(20.0, abs=0.01)


def test_figures_are_the_reports(demo_db):
    db = tonebench.open(demo_db)
    run = db.run(db.runs(part="KLN-2417A")["run_guid"].iloc[0])
    figure = run.figure(center_hz=2.45e9)
    names = [trace.name for trace in figure.data]
    assert "IM3 lower (2f1-f2), in the fit" in names and "IM3 upper (2f2-f1), in the fit" in names
    stored = run.results().set_index("center_hz").loc[2.45e9]
    star = next(t for t in figure.data if t.name == "intercept lower")
    assert star.x[0] == pytest.approx(stored["iip3_lower_dbm"], abs=1e-9)
    with pytest.raises(InputError, match="3 sweeps match no condition; the run has: .*center_hz=2.45e\\+09"):
        run.figure()
    figures = db.compare()
    assert {"by-frequency", "by-spacing", "by-lot", "ecdf", "wafer-maps", "asymmetry"} <= set(figures)
    plotted = sum(len(t.x) for t in figures["by-frequency"].data if t.xaxis == "x")
    assert plotted == db.find()["iip3_dbm"].notna().sum()  # each fitted result once in the IIP3 panel


def test_plan_load_expands_as_a_run_does(tmp_path):
    plan = tonebench.plan.load(SAMPLE_RUNS / "demo_plan.toml")
    points = plan.points()
    assert len(points) == 51 and plan.name == "kln2417-iip3-ism-band"
    assert list(points["key"])[:2] == ["c2400000000/d1000000/p-40.00", "c2400000000/d1000000/p-38.00"]
    assert (points["upper_hz"] - points["f2_hz"] == points["spacing_hz"]).all()
    bad = tmp_path / "bad.toml"
    bad.write_text((SAMPLE_RUNS / "demo_plan.toml").read_text().replace("spacings_hz = [1.0e6]", 'spacings_hz = ["1 dBm"]'))
    with pytest.raises(InputError, match="field 'sweep.spacings_hz'"):
        tonebench.plan.load(bad)


def test_reading_writes_nothing_and_analyze_says_it_writes(demo_db, tmp_path):
    copy = tmp_path / "copy.db"
    copy.write_bytes(demo_db.read_bytes())
    before = hashlib.sha256(copy.read_bytes()).hexdigest()
    db = tonebench.open(copy)
    run = db.run(db.runs(part="KLN-2417A")["run_guid"].iloc[0])
    run.points(), run.results(), run.figure(center_hz=2.4e9), db.find(), db.compare(), db.runs()
    db.close()
    assert hashlib.sha256(copy.read_bytes()).hexdigest() == before
    stored_at = _created(copy, run.guid)
    refitted = tonebench.open(copy).analyze(run)
    assert len(refitted) == 3 and len(stored_at) == 3 and _created(copy, run.guid).isdisjoint(stored_at)


def _created(path, guid: str) -> set:
    from sqlalchemy.orm import Session

    from tonebench.store.models import Result, Run

    engine = open_database(f"sqlite:///{path}", read_only=True)
    with Session(engine) as session:
        rows = {r.created_at for r in session.query(Result).join(Run).filter(Run.guid == guid)}
    engine.dispose()
    return rows


def test_the_default_database_is_the_clis(demo_db, monkeypatch):
    monkeypatch.setenv("TONEBENCH_DB", str(demo_db))
    assert len(tonebench.open().runs()) == 7
    with pytest.raises(InputError, match="sqlite://"):
        tonebench.open("sqlite://")


def test_points_export_as_csv_and_parquet_reads_back_the_same(demo_db, tmp_path):
    db = tonebench.open(demo_db)
    guid = db.runs(part="KLN-2417A")["run_guid"].iloc[0]
    frame = db.run(guid).points()
    for fmt in ("csv", "parquet"):
        path = tmp_path / f"points.{fmt}"
        result = invoke("export", path, "--points", fmt, "--run", guid[:8], "--db", demo_db)
        assert result.exit_code == 0, result.output
        back = pd.read_csv(path) if fmt == "csv" else pd.read_parquet(path)
        assert len(back) == len(frame) == 51
        for column in ("tone_dbm", "im3_lower_dbm", "raw_upper_dbm", "rbw_hz"):
            assert np.allclose(back[column], frame[column], equal_nan=True, rtol=0, atol=1e-9)
        assert list(back["in_fit"]) == list(frame["in_fit"])
    frame.to_parquet(tmp_path / "direct.parquet")  # from Python too
    assert len(pd.read_parquet(tmp_path / "direct.parquet")) == 51
    result = invoke("export", tmp_path / "p.xlsx", "--points", "xlsx", "--db", demo_db)
    assert result.exit_code == 2 and "allowed formats are csv, parquet" in result.output
    assert not (tmp_path / "p.xlsx").exists()


def test_the_worked_example_runs_against_the_demo_database(tmp_path):
    demo = invoke("demo", "--out", tmp_path / "demo")
    assert demo.exit_code == 0, demo.output
    database = tmp_path / "demo" / "tonebench.db"
    done = subprocess.run([sys.executable, str(PROJECT_ROOT / "sample_runs" / "analysis_example.py"), str(database)],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert re.search(r"lot TB24-031: 3 results from 1 device", done.stdout)
    assert re.search(r"stored IIP3 ([-+]\d+\.\d+) dBm, fitted again \1 dBm", done.stdout), done.stdout
    assert (tmp_path / "demo" / "iip3-by-lot.html").stat().st_size > 100_000


def test_analyze_stores_what_the_cli_analyze_stores(demo_db, tmp_path):
    by_cli, by_api = tmp_path / "cli.db", tmp_path / "api.db"
    by_cli.write_bytes(demo_db.read_bytes())
    by_api.write_bytes(demo_db.read_bytes())
    guid = tonebench.open(demo_db).runs(part="KLN-2417A")["run_guid"].iloc[0]
    assert invoke("analyze", guid[:8], "--db", by_cli).exit_code == 0
    from_api = tonebench.open(by_api).analyze(guid)
    from_cli = tonebench.open(by_cli).run(guid).results()
    columns = ["center_hz", "iip3_dbm", "iip3_bound_db", "oip3_dbm", "gain_db", "n_valid", "verdict"]
    pd.testing.assert_frame_equal(from_api[columns], from_cli[columns])
