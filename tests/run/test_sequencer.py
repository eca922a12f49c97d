"""The sequencer itself, on the in-process simulated bench (no runner, no CLI): what it commands
for each point, what it reads, the record it stores, RF at the end and what it keeps per sweep.

Expected values come from outside the sequencer: the bench file's loss table (sample_runs/
sim_bench.toml, interpolated here by hand), the simulator's known truth (sim BenchTruth) and the
simulator's own record of every SCPI line it received and of its sources' state.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.instruments.open_bench import open_bench
from tonebench.plan.points import PlannedPoint, expand
from tonebench.results.sweeps import stored_points
from tonebench.run.sequencer import Sequencer
from tonebench.run.start import offsets_from_bench
from tonebench.run.sweep_state import SweepState, sweep_states
from tonebench.sim.launch import start_sim_bench
from tonebench.store.database import open_database, session_factory
from tonebench.store.records import RunRecorder

PLAN = """
[plan]
name = "sequencer-unit"

[device]
part_number = "SEQ-1"
serial = "S-001"

[sweep]
center_freqs_hz = [2.40e9, 2.45e9]
spacings_hz = [1.0e6]
tone_start_dbm = -30.0
tone_stop_dbm = -26.0
tone_step_dbm = 2.0

[analyzer]
rbw_hz = 1000.0
atten_db = 20.0
ref_level_dbm = 0.0
"""
TONES_DBM = (-30.0, -28.0, -26.0)
CENTERS_HZ = (2.40e9, 2.45e9)


def table_loss_db(rows: list[tuple[float, float]], freq_hz: float) -> float:
    """Linear in dB between the two rows of sample_runs/sim_bench.toml's [offsets] (by hand)."""
    (f_lo, loss_lo), (f_hi, loss_hi) = rows
    return loss_lo + (freq_hz - f_lo) * (loss_hi - loss_lo) / (f_hi - f_lo)


IN1_ROWS = [(2.30e9, 6.38), (2.60e9, 6.62)]
IN2_ROWS = [(2.30e9, 6.765), (2.60e9, 7.035)]
OUT_ROWS = [(2.30e9, 1.44), (2.60e9, 1.56)]


@dataclass
class Outcome:
    sequencer: Sequencer
    points: list[PlannedPoint]
    records: dict  # point_key -> PointRecord as stored
    commands: list[tuple[float, str, str]]  # the simulator's log: (clock_s, instrument, line)
    sim: object  # the running simulated bench (sim.bench: SimBench)


@pytest.fixture(scope="module")
def outcome(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sequencer")
    (folder / "plan.toml").write_text(PLAN)
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")
    plan = load_plan(folder / "plan.toml")
    points = expand(plan.settings)
    engine = open_database(f"sqlite:///{folder / 'seq.db'}")
    sessions = session_factory(engine)
    recorder = RunRecorder.start(
        sessions, bench_name="sim", bench_description="", device={"part_number": "SEQ-1", "serial": "S-001"},
        plan_name="sequencer-unit", plan_text=plan.text, plan_sha256=plan.sha256, simulated=True,
        instruments=[], offsets=[], metadata={},
    )
    with start_sim_bench(bench.scenario) as sim:
        instruments = open_bench(bench.settings, sim.resources)
        try:
            sequencer = Sequencer(instruments, offsets_from_bench(bench), bench.settings.limits,
                                  plan.settings.analyzer, recorder, unattended=bench.settings.unattended)
            sequencer.run(points)
        finally:
            instruments.close()
        with sessions() as session:
            records = {p.record.point_key: p.record for p in stored_points(session, recorder.run_id)}
        yield Outcome(sequencer, points, records, list(sim.bench.command_log), sim)
    engine.dispose()


def per_point_segments(commands) -> list[list[tuple[str, str]]]:
    """The received lines split at each power command to source1 (one per point, no leveling)."""
    segments: list[list[tuple[str, str]]] = []
    for _, instrument, line in commands:
        if instrument == "source1" and line.startswith("SOUR:POW "):
            segments.append([])
        if segments:
            segments[-1].append((instrument, line))
    return segments


def centers_hz(segment) -> list[float]:
    return [float(line.split()[1]) for instrument, line in segment
            if instrument == "analyzer" and line.startswith("FREQ:CENT ")]


def power_dbm(segment, source: str) -> float:
    (value,) = [float(line.split()[1]) for instrument, line in segment
                if instrument == source and line.startswith("SOUR:POW ")]
    return value


def test_every_point_is_stored_once_in_plan_order(outcome):
    assert len(outcome.points) == 6
    assert sorted(outcome.records) == sorted(p.key for p in outcome.points)
    assert all(r.status == "measured" for r in outcome.records.values())


def test_each_point_sets_both_sources_from_the_loss_table(outcome):
    segments = per_point_segments(outcome.commands)
    assert len(segments) == len(outcome.points)
    for point, segment in zip(outcome.points, segments):
        # The dialect formats power with two decimals (drivers/generic-source.toml).
        assert power_dbm(segment, "source1") == pytest.approx(point.tone_dbm + table_loss_db(IN1_ROWS, point.f1_hz),
                                                               abs=0.006)
        assert power_dbm(segment, "source2") == pytest.approx(point.tone_dbm + table_loss_db(IN2_ROWS, point.f2_hz),
                                                               abs=0.006)


def test_each_point_reads_the_tones_then_both_im3_products(outcome):
    for point, segment in zip(outcome.points, per_point_segments(outcome.commands)):
        f1_hz, f2_hz = point.center_hz - 0.5e6, point.center_hz + 0.5e6
        assert centers_hz(segment)[:4] == pytest.approx([f1_hz, f2_hz, 2 * f1_hz - f2_hz, 2 * f2_hz - f1_hz],
                                                        abs=0.001)


def test_the_two_top_points_of_each_sweep_repeat_the_im3_reads_with_more_attenuation(outcome):
    for point, segment in zip(outcome.points, per_point_segments(outcome.commands)):
        record = outcome.records[point.key]
        top = point.tone_dbm in TONES_DBM[-2:]  # step_top_points defaults to 2
        assert (record.step_atten_db is not None) == top
        attens_db = [float(line.split()[1]) for instrument, line in segment
                     if instrument == "analyzer" and line.startswith("INP:ATT ")]
        if top:
            assert record.step_atten_db == 10.0 and record.extra_json["step_reason"] == "top"
            assert 30.0 in attens_db  # the plan's 20 dB plus the default 10 dB step


def test_record_fields_follow_the_loss_table_and_the_readings(outcome):
    for point in outcome.points:
        r = outcome.records[point.key]
        f1_hz, f2_hz = point.f1_hz, point.f2_hz
        assert r.in1_loss_db == pytest.approx(table_loss_db(IN1_ROWS, f1_hz), abs=1e-9)
        assert r.in2_loss_db == pytest.approx(table_loss_db(IN2_ROWS, f2_hz), abs=1e-9)
        assert r.out_loss_lower_db == pytest.approx(table_loss_db(OUT_ROWS, 2 * f1_hz - f2_hz), abs=1e-9)
        assert r.source1_dbm == pytest.approx(point.tone_dbm + r.in1_loss_db, abs=1e-9)
        assert r.pin1_dbm == pytest.approx(r.source1_dbm - r.in1_loss_db, abs=1e-9)
        assert r.pout_f1_dbm == r.raw_f1_dbm + r.out_loss_f1_db
        assert r.im3_upper_dbm == r.raw_upper_dbm + r.out_loss_upper_db
        assert r.noise_lower_dbm == r.raw_noise_lower_dbm + r.out_loss_lower_db
        assert (r.atten_db, r.rbw_hz, r.source1_correction_db) == (20.0, 1000.0, None)
        assert r.overload is False and r.extra_json["atten_choice"] == "fixed"


def test_dut_referred_values_match_the_simulators_truth(outcome):
    truth = outcome.sim.bench.truth
    for point in outcome.points:
        r = outcome.records[point.key]
        gain_db = float(truth.true_gain_db(point.f1_hz))
        iip3_dbm = float(truth.true_iip3_dbm(point.center_hz))
        # Small signal (P1dB is -12 dBm); the analyzer's level error is 0.4 dB (sim_bench.toml).
        assert r.pout_f1_dbm == pytest.approx(point.tone_dbm + gain_db, abs=0.5)
        assert r.im3_lower_dbm == pytest.approx(3 * point.tone_dbm - 2 * iip3_dbm + gain_db, abs=1.0)
        assert r.noise_lower_dbm < r.im3_lower_dbm - 15.0


def test_rf_is_off_at_both_sources_at_the_end(outcome):
    bench = outcome.sim.bench
    assert outcome.sequencer.rf_report is not None and outcome.sequencer.rf_report.ok
    for index in (1, 2):
        assert bench.source(index).commanded.rf_on is False
    source_lines = [(i, line) for _, i, line in outcome.commands if i in ("source1", "source2")]
    assert ("source1", "OUTP ON") in source_lines and ("source2", "OUTP ON") in source_lines
    last_rf = {i: line for i, line in source_lines if line in ("OUTP ON", "OUTP OFF")}
    assert last_rf == {"source1": "OUTP OFF", "source2": "OUTP OFF"}


def test_state_is_kept_per_sweep(outcome):
    sweeps = outcome.sequencer.sweeps
    assert set(sweeps) == {(None, None, center_hz, 1.0e6, None) for center_hz in CENTERS_HZ}
    for (_, _, center_hz, spacing_hz, _), state in sweeps.items():
        assert state.top_dbm == -26.0 and state.step_levels_dbm == frozenset({-28.0, -26.0})
        records = sorted((r for r in outcome.records.values() if r.center_hz == center_hz), key=lambda r: r.tone_dbm)
        assert state.accepted == [(r.raw_f1_dbm, r.raw_f2_dbm, r.tone_dbm) for r in records]  # -30, -28, -26 dBm


def test_sweep_states_group_by_sweep_and_pick_the_top_levels():
    points = [PlannedPoint(i, center_hz, 1e6, tone_dbm) for i, (center_hz, tone_dbm) in
              enumerate([(1e9, -10.0), (1e9, -5.0), (1e9, 0.0), (2e9, -20.0)])]
    states = sweep_states(points, step_top_points=2)
    assert states[(None, None, 1e9, 1e6, None)].top_dbm == 0.0
    assert states[(None, None, 1e9, 1e6, None)].step_levels_dbm == frozenset({-5.0, 0.0})
    assert states[(None, None, 2e9, 1e6, None)].step_levels_dbm == frozenset({-20.0})
    assert sweep_states(points, step_top_points=0)[(None, None, 2e9, 1e6, None)].step_levels_dbm == frozenset()


def test_a_sweep_predicts_its_next_tones_from_its_last_two_points():
    state = SweepState(top_dbm=0.0, step_levels_dbm=frozenset())
    assert state.expected_tones_dbm(-10.0) is None and state.predicted_tone_dbm(-10.0) is None
    state.accept(-2.0, -3.0, -20.0)
    assert state.expected_tones_dbm(-18.0) == (0.0, -1.0)  # slope 1 through the only point
    assert state.predicted_tone_dbm(-18.0) == -0.5
    state.accept(-0.5, -1.0, -18.0)  # f1 grew 1.5 dB, f2 2 dB over the 2 dB step
    assert state.expected_tones_dbm(-16.0) == (1.0, 1.0)
    state.accept(0.5, 0.0, -16.0)
    # Three points: the parabola through them (f1 gains 1.5 then 1 dB per 2 dB: bending over).
    assert state.expected_tones_dbm(-14.0) == pytest.approx((1.0, 0.0))
    state.accept(1.0, 0.0, -14.0)
    assert state.accepted == [(-0.5, -1.0, -18.0), (0.5, 0.0, -16.0), (1.0, 0.0, -14.0)]  # the last three only


def test_a_compressing_sweep_is_followed_without_repeat_reads():
    """Tones through a smooth compression curve (Rapp-like, from memory: Pout = Pin + G -
    10 log10(1 + 10^((Pin - Psat)/10))): beyond the third point the parabola predicts each next
    reading within 0.1 dB at 2 dB steps, where the line through two would miss by more."""
    def out_dbm(pin_dbm):
        return pin_dbm + 15.0 - 10 * np.log10(1 + 10 ** ((pin_dbm + 17.0) / 10))
    state = SweepState(top_dbm=0.0, step_levels_dbm=frozenset())
    misses_line = 0
    for pin in np.arange(-30.0, -6.0, 2.0):
        expected = state.expected_tones_dbm(pin)
        if len(state.accepted) == 3:
            assert abs(expected[0] - out_dbm(pin)) < 0.1
            (_, _, t1), (f1b, _, t2) = state.accepted[-2], state.accepted[-1]
            line = f1b + (f1b - state.accepted[-2][0]) / (t2 - t1) * (pin - t2)
            misses_line += abs(line - out_dbm(pin)) > 0.1
        state.accept(out_dbm(pin), out_dbm(pin), pin)
    assert misses_line >= 3


def test_plan_order_is_sweep_by_sweep(outcome):
    keys = [p.key for p in outcome.points]
    assert [re.match(r"c(\d+)", k).group(1) for k in keys] == ["2400000000"] * 3 + ["2450000000"] * 3
