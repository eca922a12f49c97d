"""A simulated bench and plans for the flag checks: a cubic DUT behind the sample bench's paths,
the analyzer's mixer TOI, the sources' residual intercept and IIP2 set per test, and a run of
them into a SQLite file beside the test."""

from __future__ import annotations

from cleanruns import CENTER_HZ, PATHS, loss_db
from sqlalchemy import create_engine
from sqlalchemy.orm import Session

from tonebench.run.start import execute_run


def offsets_toml(low_hz: float, high_hz: float) -> str:
    return "\n".join(f"{p} = [[{low_hz!r}, {loss_db(p, low_hz)!r}], [{high_hz!r}, {loss_db(p, high_hz)!r}]]"
                     for p in PATHS)


def write_bench(folder, *, mixer_toi_dbm=15.0, declared_toi_dbm=None, system_ip3_dbm=45.0, iip2_dbm=60.0,
                wide_out=False, phase_deg=0.0, seed=7):
    """A simulated bench; declared_toi_dbm puts this analyzer's own mixer TOI in the bench file."""
    performance = "" if declared_toi_dbm is None else f"performance = {{ mixer_toi_dbm = {declared_toi_dbm!r} }}"
    low_hz, high_hz = (0.5e6, 5.0e9) if wide_out else (2.3e9, 2.6e9)
    text = f"""
[bench]
name = "flag-bench"
[instruments.source1]
dialect = "generic-source"
[instruments.source2]
dialect = "generic-source"
[instruments.analyzer]
dialect = "generic-analyzer"
{performance}
[offsets]
{offsets_toml(low_hz, high_hz)}
[limits]
max_tone_dbm = 0.0
max_analyzer_input_dbm = 20.0
expected_gain_db = 16.0
[simulation]
seed = {seed}
coherent_phase_deg = {phase_deg!r}
[simulation.dut]
gain_db = 15.0
iip3_dbm = -2.0
p1db_dbm = -12.0
iip2_dbm = {iip2_dbm!r}
[simulation.paths]
in1_loss_db = 6.5
in1_slope_db_per_ghz = 0.8
in2_loss_db = 6.9
in2_slope_db_per_ghz = 0.9
out_loss_db = 1.5
out_slope_db_per_ghz = 0.4
[simulation.sources]
system_ip3_dbm = {system_ip3_dbm!r}
[simulation.analyzer]
mixer_toi_dbm = {mixer_toi_dbm!r}
level_error_db = 0.4
"""
    path = folder / "bench.toml"
    path.write_text(text, encoding="utf-8")
    return path


def write_plan(folder, start_dbm, stop_dbm, *, atten_db=None, second_order=False, name="plan.toml"):
    atten = "" if atten_db is None else f"atten_db = {atten_db!r}"
    text = f"""
[plan]
name = "flag-check"
[device]
part_number = "KLN-2417A"
serial = "KLN24031-0777"
[sweep]
center_freqs_hz = [{CENTER_HZ!r}]
spacings_hz = [1.0e6]
tone_start_dbm = {start_dbm!r}
tone_stop_dbm = {stop_dbm!r}
tone_step_dbm = 2.0
second_order = {"true" if second_order else "false"}
[analyzer]
rbw_hz = 1000.0
{atten}
"""
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def run(tmp_path, plan, bench, cal_name=None):
    db = f"sqlite:///{tmp_path / 'runs.db'}"
    outcome = execute_run(plan, bench, db, tmp_path / "report.html", cal_name=cal_name, on_warning=lambda m: None)
    session = Session(create_engine(db))
    return outcome, session, db
