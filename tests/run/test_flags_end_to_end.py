"""Flags, bounds and IIP2 end to end: the sequencer on the simulated bench over TCP, the store, the
analysis, `tonebench show`. Each scenario has a known truth (the simulator's), never seen by the tool.
"""

from __future__ import annotations

import pytest
from cleanruns import CENTER_HZ, PATHS, loss_db
from flag_benches import run, write_bench, write_plan
from sqlalchemy import func, select
from typer.testing import CliRunner

from tonebench.calibration import workflow
from tonebench.cli import app
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import BenchTruth
from tonebench.store.models import Event, Point, PointFlag, Result, ResultFlag

runner = CliRunner(env={"COLUMNS": "200"})
def true_iip3_dbm() -> float:
    return BenchTruth(Scenario(dut={"iip3_dbm": -2.0})).true_iip3_dbm(CENTER_HZ)


def flags_of(session, model, column, ident):
    return sorted({(f.flag, f.cause) for f in session.scalars(select(model).where(column == ident))})


def test_clean_run_with_automatic_attenuation(tmp_path):
    outcome, session, db = run(tmp_path, write_plan(tmp_path, -34.0, -22.0), write_bench(tmp_path))
    result = session.scalars(select(Result)).one()
    points = session.scalars(select(Point).order_by(Point.tone_dbm)).all()
    # Only the top point is left out (higher-order terms bias its IM3); the result is not flagged.
    assert [f.flag for f in session.scalars(select(PointFlag))] == ["slope"]
    assert session.scalar(select(func.count()).select_from(ResultFlag)) == 0
    truth = true_iip3_dbm()
    assert abs(result.iip3_dbm - truth) <= 0.3
    assert abs(result.iip3_dbm - truth) <= result.iip3_bound_db < 0.5
    # Attenuation chosen per point, rising with the tones; the reference level moved with it.
    atten = [p.atten_db for p in points]
    assert atten == sorted(atten) and atten[-1] - atten[0] >= 10.0
    assert all(p.ref_level_dbm - p.atten_db == pytest.approx(0.0 - 10.0) for p in points)
    assert all(p.extra_json["atten_choice"] == "optimum" for p in points)
    # The step check at the two top points, both readings stored.
    stepped = [p for p in points if p.step_atten_db is not None]
    assert [p.tone_dbm for p in stepped] == [-24.0, -22.0]
    for p in stepped:
        assert p.step_atten_db == 10.0 and p.raw_lower_step_dbm is not None and p.raw_upper_step_dbm is not None
        assert abs(p.raw_lower_step_dbm - p.raw_lower_dbm) < 1.0
        assert p.extra_json["step_reason"] == "top"
    # No residual in a bench file's offsets: the check is skipped, and says so.
    assert any("source intermod not checked" in note for note in result.details_json["notes"])
    shown = runner.invoke(app, ["show", outcome.guid[:8], "--db", db])
    assert shown.exit_code == 0 and "flags: none" in shown.output
    assert f"{result.iip3_dbm:+.2f} ±{result.iip3_bound_db:.2f}" in shown.output


def test_analyzer_limited_at_0_db_then_recovered_automatically(tmp_path):
    # A poor analyzer (mixer TOI +5 dBm), its figure given in the bench file.
    bench = write_bench(tmp_path, mixer_toi_dbm=5.0, declared_toi_dbm=5.0)
    outcome, session, db = run(tmp_path, write_plan(tmp_path, -40.0, -28.0, atten_db=0.0), bench)
    result = session.scalars(select(Result)).one()
    points = session.scalars(select(Point).order_by(Point.tone_dbm)).all()
    # Predicted within 20 dB everywhere, so every point got the step check, and it shows the
    # analyzer's own product (an analyzer-made IM3 drops about 20 dB with 10 dB more attenuation).
    assert all(p.step_atten_db == 10.0 for p in points)
    assert all(p.raw_lower_dbm - p.raw_lower_step_dbm > 1.0 for p in points)
    assert ("analyzer-limited", "distortion") in flags_of(session, ResultFlag, ResultFlag.result_id, result.id)
    for p in points:
        assert ("analyzer-limited", "distortion") in flags_of(session, PointFlag, PointFlag.point_id, p.id)
    assert result.iip3_dbm is None and "analyzer's own IM3" in result.reason
    shown = runner.invoke(app, ["show", outcome.guid[:8], "--db", db])
    assert "analyzer-limited (distortion)" in shown.output and "raise the analyzer attenuation" in shown.output

    (tmp_path / "auto").mkdir()
    _outcome, session, _ = run(tmp_path / "auto", write_plan(tmp_path, -40.0, -28.0, name="auto.toml"), bench)
    result = session.scalars(select(Result)).one()
    truth = true_iip3_dbm()
    assert abs(result.iip3_dbm - truth) <= result.iip3_bound_db
    assert abs(result.iip3_dbm - truth) <= 0.3
    assert ("analyzer-limited", "distortion") not in flags_of(session, ResultFlag, ResultFlag.result_id, result.id)
    assert min(p.atten_db for p in session.scalars(select(Point))) >= 10.0


def test_source_intermod_flag_from_the_calibration_residual(tmp_path):
    # A poor combiner: the sources' residual intercept only 7 dB above the DUT's IIP3.
    bench = write_bench(tmp_path, system_ip3_dbm=5.0)
    plan = write_plan(tmp_path, -34.0, -22.0)
    db = f"sqlite:///{tmp_path / 'runs.db'}"
    files = {}
    for path in PATHS:
        files[path] = tmp_path / f"{path}.csv"
        rows = [(f, loss_db(path, f)) for f in (2.3e9, 2.6e9)]
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss!r}" for f, loss in rows))
    workflow.import_tables(db, "combiner-cal", files)
    residual_plan = write_plan(tmp_path, -34.0, -22.0, atten_db=10.0, name="residual.toml")
    workflow.measure_residual(db, "combiner-cal", bench, residual_plan)
    outcome, session, db = run(tmp_path, plan, bench, cal_name="combiner-cal")
    result = session.scalars(select(Result)).one()
    assert flags_of(session, ResultFlag, ResultFlag.result_id, result.id) == [("source-intermod-limited", None)]
    flag = session.scalars(select(ResultFlag)).one()
    assert flag.error_db > 0.5 and "residual" in flag.detail
    assert abs(result.iip3_dbm - true_iip3_dbm()) <= result.iip3_bound_db
    shown = runner.invoke(app, ["show", outcome.guid[:8], "--db", db])
    assert "source-intermod-limited" in shown.output


def test_noise_limited_run_gives_only_a_bound(tmp_path):
    _outcome, session, _ = run(tmp_path, write_plan(tmp_path, -60.0, -46.0), write_bench(tmp_path))
    result = session.scalars(select(Result)).one()
    assert result.iip3_dbm is None and result.iip3_bound_db is None
    assert flags_of(session, ResultFlag, ResultFlag.result_id, result.id) == [("analyzer-limited", "noise")]
    at_least = result.details_json["iip3_at_least_dbm"]
    assert at_least is not None and at_least <= true_iip3_dbm()
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "IIP3 at least (dBm)" in page and "analyzer-limited (noise)" in page


def test_second_order_read_and_fitted(tmp_path):
    bench = write_bench(tmp_path, iip2_dbm=22.0, wide_out=True)
    _outcome, session, _ = run(tmp_path, write_plan(tmp_path, -40.0, -22.0, second_order=True), bench)
    result = session.scalars(select(Result)).one()
    points = session.scalars(select(Point)).all()
    assert all(p.raw_diff_dbm is not None and p.raw_sum_dbm is not None for p in points)
    assert all(p.im2_sum_dbm == pytest.approx(p.raw_sum_dbm + p.out_loss_sum_db) for p in points)
    bound_db = result.details_json["second_order"]["bound_db"]
    assert abs(result.iip2_dbm - 22.0) <= bound_db and abs(result.iip2_dbm - 22.0) <= 0.3
    assert result.slope_im2 == pytest.approx(2.0, abs=0.1)
    assert result.oip2_dbm == pytest.approx(result.iip2_dbm + result.gain_db)


def test_second_order_skipped_where_the_output_path_is_not_calibrated(tmp_path):
    _outcome, session, _ = run(tmp_path, write_plan(tmp_path, -34.0, -28.0, second_order=True), write_bench(tmp_path))
    assert all(p.raw_diff_dbm is None for p in session.scalars(select(Point)))
    events = [e for e in session.scalars(select(Event)) if e.kind == "second-order-skipped"]
    assert len(events) == 1 and "no output loss" in events[0].message
    assert session.scalars(select(Result)).one().iip2_dbm is None


def test_bench_file_performance_figures_are_checked(tmp_path):
    from tonebench.config.bench_file import load_bench
    from tonebench.errors import InputError

    good = write_bench(tmp_path, declared_toi_dbm=5.0)
    assert load_bench(good).settings.instruments["analyzer"].performance == {"mixer_toi_dbm": 5.0}
    text = good.read_text().replace("mixer_toi_dbm = 5.0", "mixer_toy_dbm = 5.0")
    good.write_text(text)
    with pytest.raises(InputError, match=r"mixer_toy_dbm is not a figure tonebench uses; allowed: mixer_toi_dbm") as exc:
        load_bench(good)
    assert "\n" not in str(exc.value)
    good.write_text(text.replace("mixer_toy_dbm = 5.0", "level_accuracy_db = 9.0"))
    with pytest.raises(InputError, match=r"level_accuracy_db = 9 outside 0\.\.5"):
        load_bench(good)


def test_plan_attenuation_is_automatic_unless_given(tmp_path):
    from tonebench.config.plan_file import load_plan

    assert load_plan(write_plan(tmp_path, -30.0, -20.0)).settings.analyzer.auto_atten
    fixed = load_plan(write_plan(tmp_path, -30.0, -20.0, atten_db=10.0, name="fixed.toml")).settings.analyzer
    assert not fixed.auto_atten and fixed.atten_db == 10.0  # the default value, given: fixed
