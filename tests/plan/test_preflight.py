"""Everything checked before RF goes on (issue 9, item 2): the frequency ranges of sources,
analyzer and power meter for every tone and product of a run, a resume, `queue add` and each
calibration step, and the plan's point count before it is expanded.

The bench here is a hardware bench file whose resources point at a simulated bench started by
the test, so the simulator's own record (its command log and source state) shows that RF never
went on, whatever the run believed.
"""

from __future__ import annotations

import pytest
from hardware_benches import dialect_copy, hardware_bench, one_error_line
from sim_runs import PLAN_TEXT, rf_never_on, write_plan
from stored_rows import count_rows
from typer.testing import CliRunner

from tonebench.cli import app
from tonebench.config.plan_file import load_plan
from tonebench.errors import InputError
from tonebench.plan.points import expand
from tonebench.store.models import CalibrationSet, Job, Run

# The demo plan's highest read: the upper IM3 product 2f2-f1 of 2.48 GHz +/- 0.5 MHz, over a
# 10 kHz span (10 RBW); the noise marker sits 4 kHz above it.
TOP_PRODUCT_HZ = 2.4815e9


# --- the point count -----------------------------------------------------------------------------


def test_point_count_is_computed_from_the_axes_and_matches_the_expansion(tmp_path):
    for start, stop, step in ((-40.0, -8.0, 2.0), (-30.0, -29.0, 0.3), (-20.0, -20.0, 1.0), (-10.0, -7.05, 0.1)):
        text = PLAN_TEXT.replace("tone_start_dbm = -40.0", f"tone_start_dbm = {start}").replace(
            "tone_stop_dbm = -8.0", f"tone_stop_dbm = {stop}").replace("tone_step_dbm = 2.0", f"tone_step_dbm = {step}")
        settings = load_plan(write_plan(tmp_path, text)).settings
        assert settings.sweep.point_count() == len(expand(settings))


def test_a_plan_of_ten_to_the_eight_points_is_refused_when_read_in_one_line(tmp_path):
    # One centre, one spacing, 100 dB in 1 micro-dB steps: 10^8 + 1 points (today: gigabytes).
    text = PLAN_TEXT.replace("[2.40e9, 2.45e9, 2.48e9]", "[2.45e9]").replace(
        "tone_start_dbm = -40.0", "tone_start_dbm = -100.0").replace("tone_stop_dbm = -8.0", "tone_stop_dbm = 0.0").replace(
        "tone_step_dbm = 2.0", "tone_step_dbm = 0.000001")
    with pytest.raises(InputError) as refused:
        load_plan(write_plan(tmp_path, text))
    message = str(refused.value)
    assert "\n" not in message
    assert "100,000,001 points" in message and "cap of 100,000 points" in message
    assert "split it into several plans" in message and "tone_step_dbm" in message


def test_run_and_queue_refuse_a_plan_over_the_cap_before_connecting(tmp_path, sim):
    # 3 centres x 1 spacing x 40,001 levels = 120,003 points: just over the cap.
    text = PLAN_TEXT.replace("tone_step_dbm = 2.0", "tone_step_dbm = 0.0008").replace(
        "tone_start_dbm = -40.0", "tone_start_dbm = -40.0")
    plan = write_plan(tmp_path, text)
    bench = hardware_bench(tmp_path, sim)
    db_path = tmp_path / "t.db"
    for command in (["run", str(plan), "--bench", str(bench)], ["queue", "add", str(plan), "--bench", str(bench)]):
        result = CliRunner().invoke(app, [*command, "--db", f"sqlite:///{db_path}"])
        assert result.exit_code == 2, result.output
        line = one_error_line(result)
        assert "120,003 points" in line and "cap of 100,000 points" in line and "split" in line
    assert count_rows(db_path, Run) == 0 and count_rows(db_path, Job) == 0
    assert sim.bench.command_log == []  # not even connected
    assert rf_never_on(sim)


# --- frequency ranges of a run ---------------------------------------------------------------------


def test_run_refuses_an_analyzer_span_past_its_range_before_rf_goes_on(tmp_path, sim):
    """The product itself (and its noise marker) lie inside the analyzer's range, the read's span
    does not: today this runs; it must be refused before anything is connected."""
    narrow = dialect_copy(tmp_path, "generic-analyzer", max_freq_hz=TOP_PRODUCT_HZ + 4.5e3)
    bench = hardware_bench(tmp_path, sim, dialects={"analyzer": narrow})
    db_path = tmp_path / "t.db"
    result = CliRunner().invoke(app, ["run", str(write_plan(tmp_path)), "--bench", str(bench), "--db", f"sqlite:///{db_path}"])
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "point 2.48 GHz, spacing 1 MHz" in line and "upper IM3 product 2f2-f1 at 2481500000 Hz over a 10000 Hz span" in line
    assert "2481495000..2481505000 Hz" in line and "analyzer (dialect generic-analyzer) covers 9000..2481504500 Hz" in line
    assert count_rows(db_path, Run) == 0
    assert rf_never_on(sim)


def test_run_refuses_a_tone_outside_a_source_range(tmp_path, sim):
    narrow = dialect_copy(tmp_path, "generic-source", max_freq_hz=2.47e9)
    bench = hardware_bench(tmp_path, sim, dialects={"source2": narrow})
    db_path = tmp_path / "t.db"
    result = CliRunner().invoke(app, ["run", str(write_plan(tmp_path)), "--bench", str(bench), "--db", f"sqlite:///{db_path}"])
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "tone f2 needs 2480500000 Hz; source2 (dialect generic-source) covers 9000..2470000000 Hz" in line
    assert count_rows(db_path, Run) == 0
    assert rf_never_on(sim)


def test_queue_add_checks_the_frequency_ranges_from_the_dialect_files(tmp_path, sim):
    narrow = dialect_copy(tmp_path, "generic-analyzer", max_freq_hz=TOP_PRODUCT_HZ + 4.5e3)
    bench = hardware_bench(tmp_path, sim, dialects={"analyzer": narrow})
    sim.close()  # `queue add` never connects: the bench may be switched off
    db_path = tmp_path / "t.db"
    result = CliRunner().invoke(app, ["queue", "add", str(write_plan(tmp_path)), "--bench", str(bench),
                                      "--db", f"sqlite:///{db_path}"])
    assert result.exit_code == 2, result.output
    assert "upper IM3 product 2f2-f1" in one_error_line(result)
    assert count_rows(db_path, Job) == 0


# --- frequency ranges of calibration steps -----------------------------------------------------------

# Tones at 5.9985 and 5.9995 GHz lie inside the sources' 6 GHz; their upper IM3 product at
# 6.0005 GHz, where the input calibration steps each source, does not.
EDGE_PLAN = PLAN_TEXT.replace("[2.40e9, 2.45e9, 2.48e9]", "[5.999e9]")


def test_cal_measure_input_refuses_a_grid_beyond_a_source_before_rf_goes_on(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim, power_meter=True)
    db_path = tmp_path / "t.db"
    result = CliRunner().invoke(app, ["cal", "measure-input", "edge", "--bench", str(bench), "--plan",
                                      str(write_plan(tmp_path, EDGE_PLAN)), "--db", f"sqlite:///{db_path}"])
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "input calibration edge" in line and "stepping source1 over the calibration frequencies" in line
    assert "5997500000..6000500000 Hz" in line and "covers 9000..6000000000 Hz" in line
    assert count_rows(db_path, CalibrationSet) == 0
    assert rf_never_on(sim)


def test_cal_measure_output_refuses_an_analyzer_span_past_its_range(tmp_path, sim):
    narrow = dialect_copy(tmp_path, "generic-analyzer", max_freq_hz=TOP_PRODUCT_HZ + 4.5e3)
    bench = hardware_bench(tmp_path, sim, dialects={"analyzer": narrow})
    db = f"sqlite:///{tmp_path / 't.db'}"
    table = tmp_path / "loss.csv"
    table.write_text("freq_hz,loss_db\n2.3e9,6.5\n2.6e9,6.6\n")
    imported = CliRunner().invoke(app, ["cal", "import-table", "ins", "--loss-in1", str(table), "--loss-in2", str(table), "--db", db])
    assert imported.exit_code == 0, imported.output
    result = CliRunner().invoke(app, ["cal", "measure-output", "ins", "--bench", str(bench), "--plan",
                                      str(write_plan(tmp_path)), "--thru-in-place", "--db", db])
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "output calibration ins" in line and "reading 2481500000 Hz over a 10000 Hz span" in line
    assert rf_never_on(sim)


def test_cal_measure_residual_refuses_a_product_read_past_the_analyzer_range(tmp_path, sim):
    narrow = dialect_copy(tmp_path, "generic-analyzer", max_freq_hz=TOP_PRODUCT_HZ + 4.5e3)
    bench = hardware_bench(tmp_path, sim, dialects={"analyzer": narrow})
    db = f"sqlite:///{tmp_path / 't.db'}"
    table = tmp_path / "loss.csv"
    table.write_text("freq_hz,loss_db\n2.3e9,6.5\n2.6e9,6.6\n")
    imported = CliRunner().invoke(app, ["cal", "import-table", "all", "--loss-in1", str(table), "--loss-in2", str(table),
                                        "--loss-out", str(table), "--db", db])
    assert imported.exit_code == 0, imported.output
    result = CliRunner().invoke(app, ["cal", "measure-residual", "all", "--bench", str(bench), "--plan",
                                      str(write_plan(tmp_path)), "--thru-in-place", "--db", db])
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "system residual all" in line and "reading 2f2-f1 at 2481500000 Hz over a 10000 Hz span" in line
    assert rf_never_on(sim)
