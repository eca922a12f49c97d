"""Closed-loop leveling on the simulated bench: tones brought to their target at the DUT input plane
with the power meter, one source on at a time, bounded, with events for trouble."""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session
from calibration_benches import PATH_NAMES, simulation_table, true_rows, truth, write_bench, write_plan
from typer.testing import CliRunner

from tonebench.calibration import workflow
from tonebench.cli import app
from tonebench.errors import InstrumentError
from tonebench.run.start import execute_run
from tonebench.store.models import Event, Point, Run

runner = CliRunner(env={"COLUMNS": "220"})
# An exact meter, so the truth check below sees only the leveling (and the 0.01 dB reading scatter).
EXACT_METER = {"accuracy_db": 0.0, "reading_noise_db": 0.01}


def wrong_set(tmp_path, simulation, db: str, errors_db: dict[str, float], name: str = "off") -> None:
    """A set holding the true losses plus the given errors, as if an old calibration had drifted."""
    files = {}
    for path, rows in true_rows(simulation, np.linspace(2.38e9, 2.50e9, 13)).items():
        files[path] = tmp_path / f"{name}-{path}.csv"
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss + errors_db.get(path, 0.0)!r}" for f, loss in rows))
    workflow.import_tables(db, name, files)


def run(tmp_path, simulation, db, cal, leveling=None, plan=None, file_name="bench.toml"):
    bench = write_bench(tmp_path, simulation, leveling=leveling, file_name=file_name)
    plan = plan or write_plan(tmp_path, centers_hz=(2.40e9, 2.48e9))
    captured = {}
    outcome = execute_run(plan, bench, db, tmp_path / f"{file_name}.html", None,
                          lambda sim: captured.update(sim=sim), cal_name=cal)
    return outcome, captured["sim"]


def test_leveling_brings_each_tone_to_its_target_and_stores_the_correction(tmp_path):
    simulation = simulation_table(41, power_meter=EXACT_METER)
    t = truth(simulation)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    errors_db = {"in1": 0.8, "in2": 0.6}  # the set believes the arms lose more than they do
    wrong_set(tmp_path, simulation, db, errors_db)
    outcome, sim = run(tmp_path, simulation, db, "off")
    with Session(create_engine(db)) as session:
        points = session.scalars(select(Point).join(Run).where(Run.guid == outcome.guid)).all()
        assert points
        for point in points:
            # The meter's view: within the 0.05 dB tolerance of the target.
            assert abs(point.pin1_dbm - point.tone_dbm) <= 0.05 and abs(point.pin2_dbm - point.tone_dbm) <= 0.05
            # The corrections undo the set's errors (to the tolerance).
            assert point.source1_correction_db == pytest.approx(-0.8, abs=0.06)
            assert point.source2_correction_db == pytest.approx(-0.6, abs=0.06)
            # The truth (Python only): the power that reached the DUT input plane, 3 sigma of meter scatter allowed.
            true_in1_dbm = point.source1_dbm - t.true_loss_db("in1", point.f1_hz)
            true_in2_dbm = point.source2_dbm - t.true_loss_db("in2", point.f2_hz)
            assert abs(true_in1_dbm - point.tone_dbm) <= 0.05 + 0.03
            assert abs(true_in2_dbm - point.tone_dbm) <= 0.05 + 0.03
    for result in outcome.results:
        assert result.iip3_dbm == pytest.approx(t.true_iip3_dbm(result.center_hz), abs=0.3)

    # The same drifted set without leveling: the tones are 0.6 to 0.8 dB stronger than believed,
    # and the IIP3 comes out low by about that much.
    unleveled, _ = run(tmp_path, simulation, db, "off", leveling={"enabled": False}, file_name="open.toml")
    for result in unleveled.results:
        error_db = result.iip3_dbm - t.true_iip3_dbm(result.center_hz)
        assert error_db == pytest.approx(-0.7, abs=0.3) and error_db < -0.4


def test_one_source_on_at_each_meter_reading(tmp_path):
    simulation = simulation_table(42, power_meter=EXACT_METER)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    wrong_set(tmp_path, simulation, db, {"in1": 0.3, "in2": -0.2})
    _, sim = run(tmp_path, simulation, db, "off")
    rf = {"source1": False, "source2": False}
    readings = 0
    for _, instrument, line in sim.bench.command_log:
        if instrument in rf and line.startswith("OUTP "):
            rf[instrument] = line == "OUTP ON"
        if instrument == "power_meter" and line == "INIT:IMM":
            readings += 1
            assert sum(rf.values()) == 1, "a broadband meter must see one tone only"
    # Two sweeps, two tones each, at least one reading each and at most the 5 allowed.
    assert 4 <= readings <= 4 * 5
    assert rf == {"source1": False, "source2": False}


def test_unconverged_leveling_and_tone_imbalance_are_events(tmp_path):
    simulation = simulation_table(43, power_meter=EXACT_METER)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    wrong_set(tmp_path, simulation, db, {"in1": 0.8, "in2": -0.6})
    outcome, _ = run(tmp_path, simulation, db, "off", leveling={"max_iterations": 1})
    with Session(create_engine(db)) as session:
        events = session.scalars(select(Event).join(Run).where(Run.guid == outcome.guid, Event.level == "warning")).all()
        kinds = [e.kind for e in events]
        assert kinds.count("leveling") == 4  # two sweeps, two tones, none within tolerance after one reading
        imbalance = [e for e in events if e.kind == "tone-imbalance"]
        assert len(imbalance) == 2
        # Source 1 reads 0.8 dB high, source 2 0.6 dB low: 1.4 dB apart at the DUT input plane.
        assert all(e.details_json["imbalance_db"] == pytest.approx(1.4, abs=0.05) for e in imbalance)


def test_a_correction_beyond_the_limit_stops_the_run_with_rf_off(tmp_path):
    simulation = simulation_table(44, power_meter=EXACT_METER)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    wrong_set(tmp_path, simulation, db, {"in1": -3.5})  # as if a cable were loose: 3.5 dB missing
    captured = {}
    with pytest.raises(InstrumentError, match="more than the 3 dB allowed"):
        execute_run(write_plan(tmp_path), write_bench(tmp_path, simulation), db, tmp_path / "r.html", None,
                    lambda sim: captured.update(sim=sim), cal_name="off")
    bench = captured["sim"].bench
    assert not bench.source(1).commanded.rf_on and not bench.source(2).commanded.rf_on
    with Session(create_engine(db)) as session:
        assert session.scalars(select(Run.status)).one() == "failed"


def test_meter_range_is_checked_before_the_run(tmp_path):
    simulation = simulation_table(45)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    wrong_set(tmp_path, simulation, db, {})
    quiet = write_plan(tmp_path, centers_hz=(2.45e9,), start_dbm=-80.0, stop_dbm=-70.0, file_name="quiet.toml")
    result = runner.invoke(app, ["run", str(quiet), "--bench", str(write_bench(tmp_path, simulation)), "--db", db,
                                 "--cal", "off"])
    assert result.exit_code == 2
    assert "leveling reads each tone at its sweep's highest power, -70.00 dBm" in result.output
    with Session(create_engine(db)) as session:
        assert session.scalars(select(Run)).all() == []


def test_leveling_costs_little_bench_time(tmp_path):
    """Once per sweep and tone, not per point: measured on the simulator's virtual clock."""
    simulation = simulation_table(46, power_meter=EXACT_METER)
    db = f"sqlite:///{tmp_path / 'l.db'}"
    wrong_set(tmp_path, simulation, db, {path: 0.0 for path in PATH_NAMES})
    _, leveled = run(tmp_path, simulation, db, "off")
    _, unleveled = run(tmp_path, simulation, db, "off", leveling={"enabled": False}, file_name="open.toml")
    extra_s = leveled.bench.clock_s - unleveled.bench.clock_s
    assert 0.0 < extra_s < 0.25 * unleveled.bench.clock_s, (leveled.bench.clock_s, unleveled.bench.clock_s)
