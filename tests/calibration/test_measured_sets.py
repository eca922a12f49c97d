"""Measured calibration on the simulated bench, runs that use it, re-referral, staleness and coverage.

Path losses are drawn per seed into the simulator's [simulation] table only; the tool learns them by
measuring (power meter at the DUT input plane, a thru for the output path)."""

from __future__ import annotations

import datetime as dt
import re

import numpy as np
import pytest
from sqlalchemy import create_engine, func, select, update
from sqlalchemy.orm import Session
from calibration_benches import PATH_NAMES, simulation_table, truth, write_bench, write_plan
from cli_invoke import invoke

from tonebench.calibration import workflow
from tonebench.planes.loss_table import LossTable
from tonebench.results.stored_results import analyze_run
from tonebench.results.sweeps import rereferred
from tonebench.run.start import execute_run
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import CalibrationSet, Event, Point, Result, Run
from tonebench.units import format_freq


def results_by_center(outcome) -> dict[float, object]:
    return {r.center_hz: r for r in outcome.results}


def measured_set(tmp_path, simulation, name="lab-1"):
    db = f"sqlite:///{tmp_path / 'cal.db'}"
    bench = write_bench(tmp_path, simulation)
    plan = write_plan(tmp_path)
    workflow.measure_input(db, name, bench, plan)
    view = workflow.measure_output(db, name, bench, plan)
    return db, bench, plan, view


@pytest.mark.parametrize("seed", [11, 23])
def test_measured_calibration_recovers_the_paths_and_the_iip3(tmp_path, seed):
    simulation = simulation_table(seed)
    t = truth(simulation)
    db, bench, plan, view = measured_set(tmp_path, simulation)

    # 1. The measured set holds the simulator's true losses (read from Python) within 0.1 dB across its band.
    band_hz = np.linspace(view.freq_min_hz, view.freq_max_hz, 41)
    for path in PATH_NAMES:
        error_db = view.tables[path].loss_db(band_hz) - t.true_loss_db(path, band_hz)
        assert np.max(np.abs(error_db)) <= 0.1, (path, error_db)
    # The arms really differ, so a single input offset could not have done.
    assert abs(t.true_loss_db("in1", 2.44e9) - t.true_loss_db("in2", 2.44e9)) > 0.3

    # 2. A run with it (leveled: the bench has a power meter) gets IIP3 within 0.3 dB of the truth.
    calibrated = execute_run(plan, bench, db, tmp_path / "r1.html", cal_name="lab-1")
    assert calibrated.calibration == "lab-1"
    for center_hz, result in results_by_center(calibrated).items():
        assert result.iip3_dbm == pytest.approx(t.true_iip3_dbm(center_hz), abs=0.3)
        # Gain = Pout - Pin uses both sides of the calibration directly.
        assert result.gain_db == pytest.approx(t.true_gain_db(center_hz), abs=0.15)

    # 3. The same run with zero offsets (no calibration, no leveling) is off by the path losses:
    #    IIP3 by the input loss (the tones are weaker than believed), the gain by both losses.
    zero = {path: [[2.0e9, 0.0], [3.0e9, 0.0]] for path in PATH_NAMES}
    raw_bench = write_bench(tmp_path, simulation, offsets=zero, leveling={"enabled": False}, file_name="raw.toml")
    uncalibrated = execute_run(plan, raw_bench, db, tmp_path / "r2.html")
    for center_hz, result in results_by_center(uncalibrated).items():
        f1_hz, f2_hz = center_hz - 0.5e6, center_hz + 0.5e6
        input_loss_db = (t.true_loss_db("in1", f1_hz) + t.true_loss_db("in2", f2_hz)) / 2
        output_loss_db = t.true_loss_db("out", center_hz)
        iip3_error_db = result.iip3_dbm - t.true_iip3_dbm(center_hz)
        gain_error_db = result.gain_db - t.true_gain_db(center_hz)
        assert input_loss_db > 3.0 and abs(iip3_error_db) > 2.5
        assert iip3_error_db == pytest.approx(input_loss_db, abs=0.3)
        assert gain_error_db == pytest.approx(-(input_loss_db + output_loss_db), abs=0.15)


def test_output_loss_takes_in_the_analyzers_level_error_and_the_gain_stays_right(tmp_path):
    level_error_db = 0.3
    simulation = simulation_table(5, analyzer={"level_error_db": level_error_db})
    t = truth(simulation)
    db, bench, plan, view = measured_set(tmp_path, simulation)
    band_hz = np.linspace(view.freq_min_hz, view.freq_max_hz, 11)
    # The analyzer reads 0.3 dB high, so the loss it sees (and corrects) is 0.3 dB less.
    assert np.max(np.abs(view.tables["out"].loss_db(band_hz) - (t.true_loss_db("out", band_hz) - level_error_db))) <= 0.1
    outcome = execute_run(plan, bench, db, tmp_path / "r.html", cal_name="lab-1")
    for center_hz, result in results_by_center(outcome).items():
        assert result.gain_db == pytest.approx(t.true_gain_db(center_hz), abs=0.15)
        assert result.iip3_dbm == pytest.approx(t.true_iip3_dbm(center_hz), abs=0.3)


def test_rereferring_a_run_changes_dut_referred_values_by_exactly_the_offset_difference(tmp_path):
    simulation = simulation_table(31)
    db, bench, plan, view = measured_set(tmp_path, simulation)
    open_loop = write_bench(tmp_path, simulation, leveling={"enabled": False}, file_name="open.toml")
    outcome = execute_run(plan, open_loop, db, tmp_path / "r.html", cal_name="lab-1")

    # A second set: the first one's inputs 0.4 dB higher and output 0.25 dB lower, as CSV tables.
    shifts_db = {"in1": 0.4, "in2": 0.4, "out": -0.25}
    files = {}
    for path, shift_db in shifts_db.items():
        table = view.tables[path]
        lines = ["freq_hz,loss_db"] + [f"{float(f)!r},{float(loss) + shift_db!r}" for f, loss in zip(table.freqs_hz, table.losses_db)]
        files[path] = tmp_path / f"{path}.csv"
        files[path].write_text("\n".join(lines))
    second = workflow.import_tables(db, "lab-2", files)

    sessions = session_factory(open_database(db))
    with sessions() as session:
        points = session.scalars(select(Point).join(Run).where(Run.guid == outcome.guid)).all()
        for point in points:
            moved = rereferred(point, second.tables)
            # Inputs drop by the input offset difference, outputs rise by the output one: exactly.
            assert moved["pin1_dbm"] - point.pin1_dbm == pytest.approx(-0.4, abs=1e-9)
            assert moved["pin2_dbm"] - point.pin2_dbm == pytest.approx(-0.4, abs=1e-9)
            for column in ("pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm", "im3_upper_dbm", "noise_lower_dbm"):
                assert moved[column] - getattr(point, column) == pytest.approx(-0.25, abs=1e-9)
        stored = {(p.id, p.pin1_dbm, p.raw_f1_dbm, p.in1_loss_db) for p in points}

    result = invoke("analyze", outcome.guid, "--db", db, "--cal", "lab-2")
    assert result.exit_code == 0, result.output
    with sessions() as session:
        run = session.scalars(select(Run).where(Run.guid == outcome.guid)).one()
        after = {r.center_hz: r for r in run.results}
        # The points keep what was measured and the offsets used then.
        assert {(p.id, p.pin1_dbm, p.raw_f1_dbm, p.in1_loss_db) for p in run.points} == stored
        assert run.calibration_set.name == "lab-1"
        assert {r.calibration_set_id for r in run.results} == {second.id}
    for center_hz, before in results_by_center(outcome).items():
        # Constant shifts: IIP3 = Pin + (Pout - Pim3)/2 moves with Pin only, OIP3 with the output only.
        assert after[center_hz].iip3_dbm - before.iip3_dbm == pytest.approx(-0.4, abs=1e-9)
        assert after[center_hz].oip3_dbm - before.oip3_dbm == pytest.approx(-0.25, abs=1e-9)
        assert after[center_hz].gain_db - before.gain_db == pytest.approx(0.15, abs=1e-9)
    shown = invoke("show", outcome.guid, "--db", db)
    assert "calibration: lab-1" in shown.output and "re-referred to: lab-2" in shown.output
    page = tmp_path / "again.html"
    assert invoke("report", outcome.guid, "--db", db, "--out", page).exit_code == 0
    assert "Re-referred to" in page.read_text() and "lab-2 (table)" in page.read_text()

    # Back to the set it was measured with: the original results again.
    assert invoke("analyze", outcome.guid, "--db", db, "--cal", "lab-1").exit_code == 0
    again = {r.center_hz: r for r in analyze_run(sessions, outcome.guid)}
    for center_hz, before in results_by_center(outcome).items():
        assert again[center_hz].iip3_dbm == pytest.approx(before.iip3_dbm, abs=1e-12)


def test_a_leveled_tone_keeps_its_meter_referred_power_when_rereferred(tmp_path):
    simulation = simulation_table(47)
    db, bench, plan, view = measured_set(tmp_path, simulation)
    outcome = execute_run(plan, bench, db, tmp_path / "r.html", cal_name="lab-1")
    shifted = {path: LossTable(path, t.freqs_hz, t.losses_db + 1.0, "shifted")
               for path, t in view.tables.items()}
    with session_factory(open_database(db))() as session:
        point = session.scalars(select(Point).join(Run).where(Run.guid == outcome.guid)).first()
        assert point.source1_correction_db is not None
        moved = rereferred(point, shifted)
        assert moved["pin1_dbm"] == point.pin1_dbm  # measured at the plane by the meter: no path loss in it
        assert moved["pout_f1_dbm"] - point.pout_f1_dbm == pytest.approx(1.0, abs=1e-9)


def count_runs(db_url: str) -> int:
    with Session(create_engine(db_url)) as session:
        return session.scalar(select(func.count()).select_from(Run))


def test_plan_outside_the_calibrated_range_is_refused_with_nothing_written(tmp_path):
    simulation = simulation_table(3)
    db, bench, plan, view = measured_set(tmp_path, simulation)
    wide = write_plan(tmp_path, centers_hz=(2.40e9, 2.60e9), file_name="wide.toml")
    result = invoke("run", wide, "--bench", bench, "--db", db, "--cal", "lab-1")
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "calibration set lab-1" in lines[0] and "does not extrapolate" in lines[0], result.output
    assert format_freq(view.freq_max_hz) in lines[0]
    assert count_runs(db) == 0
    # An upper IM3 product just past the range is refused too (tones inside, 2f2-f1 outside).
    edge_center_hz = view.freq_max_hz - 1.0e6  # f2 = max - 0.5 MHz, 2f2 - f1 = max + 0.5 MHz
    edge = write_plan(tmp_path, centers_hz=(edge_center_hz,), file_name="edge.toml")
    result = invoke("run", edge, "--bench", bench, "--db", db, "--cal", "lab-1")
    assert result.exit_code == 2 and "2f2-f1" in result.output
    assert count_runs(db) == 0


def test_stale_calibration_warns_and_expired_is_refused(tmp_path):
    simulation = simulation_table(4)
    db, bench, plan, view = measured_set(tmp_path, simulation)
    engine = create_engine(db)
    with Session(engine) as session, session.begin():
        session.execute(update(CalibrationSet).where(CalibrationSet.name == "lab-1")
                        .values(created_at=dt.datetime.now(dt.timezone.utc) - dt.timedelta(days=45)))
    result = invoke("run", plan, "--bench", bench, "--db", db, "--cal", "lab-1")
    assert result.exit_code == 0, result.output
    warnings = [line for line in result.stderr.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1 and "45.0 days old" in warnings[0] and "validity of 30 days" in warnings[0]
    with Session(engine) as session:
        kinds = session.scalars(select(Event.kind).where(Event.level == "warning")).all()
        assert "calibration-stale" in kinds

    listed = invoke("cal", "list", "--db", db)
    assert re.search(r"lab-1\s+measured.*stale", listed.output), listed.output
    assert invoke("cal", "expire", "lab-1", "--db", db).exit_code == 0
    runs_before = count_runs(db)
    refused = invoke("run", plan, "--bench", bench, "--db", db, "--cal", "lab-1")
    assert refused.exit_code == 2 and "expired" in refused.output
    assert count_runs(db) == runs_before


def test_bench_file_offsets_are_recorded_as_a_bench_file_set(tmp_path):
    simulation = simulation_table(8)
    rows = {path: [[2.3e9, 5.0], [2.6e9, 5.5]] for path in PATH_NAMES}
    bench = write_bench(tmp_path, simulation, offsets=rows, power_meter=False)
    plan = write_plan(tmp_path, centers_hz=(2.45e9,), start_dbm=-26.0, stop_dbm=-20.0)
    db = f"sqlite:///{tmp_path / 'b.db'}"
    first = execute_run(plan, bench, db, tmp_path / "a.html")
    second = execute_run(plan, bench, db, tmp_path / "b.html")
    with Session(create_engine(db)) as session:
        runs = session.scalars(select(Run)).all()
        assert {run.calibration_set.method for run in runs} == {"bench-file"}
        assert len({run.calibration_set_id for run in runs}) == 1  # same offsets, one set
        results = session.scalars(select(Result)).all()
        assert {r.calibration_set_id for r in results} == {runs[0].calibration_set_id}
        assert first.guid != second.guid


def test_calibration_named_in_the_bench_file_is_used(tmp_path):
    simulation = simulation_table(12)
    db, _, plan, _ = measured_set(tmp_path, simulation)
    bench = write_bench(tmp_path, simulation, calibration="lab-1", file_name="named.toml")
    small = write_plan(tmp_path, centers_hz=(2.48e9,), start_dbm=-24.0, stop_dbm=-20.0, file_name="small.toml")
    outcome = execute_run(small, bench, db, tmp_path / "r.html")
    assert outcome.calibration == "lab-1"


def test_unknown_set_is_one_line_naming_the_known_ones(tmp_path):
    simulation = simulation_table(13)
    db, bench, plan, _ = measured_set(tmp_path, simulation)
    result = invoke("run", plan, "--bench", bench, "--db", db, "--cal", "nope")
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == ["error: calibration set 'nope': not in this database; known: lab-1"]


def test_power_meter_role_is_optional_and_must_be_a_power_meter(tmp_path):
    from tonebench.instruments.open_bench import open_bench
    from tonebench.config.bench_file import load_bench
    from tonebench.errors import InputError
    from tonebench.sim.launch import start_sim_bench

    simulation = simulation_table(6)
    with_meter = load_bench(write_bench(tmp_path, simulation))
    assert with_meter.settings.has_power_meter
    without = load_bench(write_bench(tmp_path, simulation, power_meter=False, file_name="plain.toml"))
    assert not without.settings.has_power_meter
    text = write_bench(tmp_path, simulation, file_name="odd.toml").read_text()
    odd = tmp_path / "odd.toml"
    odd.write_text(text.replace("[instruments.power_meter]", "[instruments.thermometer]"))
    with pytest.raises(InputError, match="unknown instrument role.*thermometer.*allowed: source1, source2, analyzer, power_meter"):
        load_bench(odd)
    odd.write_text(text.replace('dialect = "generic-power-meter"', 'dialect = "generic-source"'))
    with start_sim_bench(load_bench(odd).scenario) as sim:
        with pytest.raises(InputError, match="instruments.power_meter: dialect generic-source is for a source"):
            open_bench(load_bench(odd).settings, sim.resources)


def test_measuring_the_inputs_needs_a_power_meter(tmp_path):
    simulation = simulation_table(7)
    bench = write_bench(tmp_path, simulation, power_meter=False)
    result = invoke("cal", "measure-input", "x", "--bench", bench, "--plan", write_plan(tmp_path),
                    "--db", f"sqlite:///{tmp_path / 'm.db'}")
    assert result.exit_code == 2 and "no [instruments.power_meter]" in result.output


def test_cli_measures_lists_and_shows_a_set(tmp_path):
    simulation = simulation_table(9)
    db = f"sqlite:///{tmp_path / 'cli.db'}"
    bench, plan = write_bench(tmp_path, simulation), write_plan(tmp_path, centers_hz=(2.45e9,))
    measured = invoke("cal", "measure-input", "bench-7", "--bench", bench, "--plan", plan, "--db", db, "--operator", "sam")
    assert measured.exit_code == 0, measured.output
    assert "calibration set bench-7 (measured): in1 4 points" in measured.output
    assert invoke("cal", "measure-output", "bench-7", "--bench", bench, "--plan", plan, "--db", db).exit_code == 0
    listed = invoke("cal", "list", "--db", db)
    assert re.search(r"bench-7\s+measured\s.*valid\s.*in1,in2,out", listed.output), listed.output
    page = tmp_path / "b7.html"
    shown = invoke("cal", "show", "bench-7", "--db", db, "--html", page)
    assert shown.exit_code == 0, shown.output
    assert "SIM-PM-0001" in shown.output and "by sam" in shown.output  # the meter's *IDN? and the operator
    html = page.read_text()
    assert html.count("<script") >= 1 and "in1 (source 1 to DUT input)" in html
