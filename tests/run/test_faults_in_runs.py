"""Whole runs on the simulated bench under injected faults: each fault alone and all of them in one
run. The run completes, every planned point is stored exactly once, the stored readings equal a
fault-free run with the same seed within the simulated noise, RF ends off and no power command
ever broke the bench limits (both asserted from the simulator's own record)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from sim_runs import SETTLE_TOLERANCE_DB, rf_is_off, write_bench, write_plan
from stored_rows import stored

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.plan.limits import TWO_EQUAL_TONES_DB
from tonebench.plan.points import expand
from tonebench.planes.loss_table import LossTable
from tonebench.run.start import execute_run


def run_once(folder: Path, bench_path: Path, plan_path: Path | None = None):
    captured = {}
    db_path = folder / "t.db"
    outcome = execute_run(plan_path or write_plan(folder), bench_path, f"sqlite:///{db_path}", folder / "r.html",
                          None, lambda sim: captured.update(sim=sim))
    return outcome, captured["sim"], db_path


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The fault-free run: same seed, same plan, same settings."""
    folder = tmp_path_factory.mktemp("reference")
    outcome, _sim, db_path = run_once(folder, write_bench(folder))
    assert outcome.status == "complete"
    return stored(db_path)[2]


def noise_tolerance_db(signal_dbm: float, noise_dbm: float, averages: int = 16) -> float:
    """Six standard deviations of the difference between two readings of the same line.

    The simulated reading is the line plus noise times a Gamma(k, 1/k) variable (k = noise
    averages, sim/scenario.py), whose standard deviation is 1/sqrt(k) of the noise power; in dB
    that is 10/ln(10) * (noise/total) / sqrt(k), and two independent readings differ by sqrt(2)
    times that. Plus the settle tolerance, the largest level error a settled reading may keep.
    """
    noise_w, total_w = 10 ** (noise_dbm / 10), 10 ** (signal_dbm / 10)
    sigma_db = 10 / math.log(10) * min(1.0, noise_w / total_w) / math.sqrt(averages)
    return 6 * math.sqrt(2) * sigma_db + 3 * SETTLE_TOLERANCE_DB + 0.02


def assert_like_reference(points: dict, reference: dict) -> None:
    for key, expected in reference.items():
        got = points[key]
        for column, noise_column in (("raw_f1_dbm", "raw_noise_lower_dbm"), ("raw_f2_dbm", "raw_noise_upper_dbm"),
                                     ("raw_lower_dbm", "raw_noise_lower_dbm"), ("raw_upper_dbm", "raw_noise_upper_dbm")):
            want, have = getattr(expected, column), getattr(got, column)
            tolerance = noise_tolerance_db(min(want, have), getattr(expected, noise_column))
            assert abs(have - want) <= tolerance, f"{key} {column}: {have:.3f} vs {want:.3f} dBm (+-{tolerance:.3f})"


def assert_power_commands_within_limits(sim, bench_path: Path) -> None:
    """Every power command the simulator received, with the frequency in force for that source."""
    bench = load_bench(bench_path).settings
    tables = {path: LossTable.from_rows(path, getattr(bench.offsets, path), "bench") for path in ("in1", "in2", "out")}
    freq_hz = {"source1": None, "source2": None}
    checked = 0
    for _clock, instrument, line in sim.bench.command_log:
        if instrument not in freq_hz:
            continue
        word, _, value = line.partition(" ")
        if word == "SOUR:FREQ":
            freq_hz[instrument] = float(value)
        elif word == "SOUR:POW":
            path = "in1" if instrument == "source1" else "in2"
            tone_dbm = float(value) - tables[path].loss_db(freq_hz[instrument])
            assert tone_dbm <= bench.limits.max_tone_dbm + 1e-6, line
            analyzer_dbm = tone_dbm + TWO_EQUAL_TONES_DB + bench.limits.expected_gain_db - tables["out"].loss_db(freq_hz[instrument])
            assert analyzer_dbm <= bench.limits.max_analyzer_input_dbm + 1e-6, line
            checked += 1
    assert checked >= 2 * 51


STALL = [{"instrument": "analyzer", "kind": "stall", "on": "CALC:MARK1:Y?", "nth": 20, "duration_s": 1.2},
         {"instrument": "source1", "kind": "stall", "on": "*OPC?", "nth": 30, "duration_s": 1.2, "late_reply": False}]
DROP = [{"instrument": "analyzer", "kind": "drop", "on": "INIT:IMM", "nth": 30},
        {"instrument": "source2", "kind": "drop", "on": "SOUR:POW", "nth": 12}]
ERROR = [{"instrument": "source1", "kind": "error", "on": "SOUR:POW", "nth": 5, "code": -221},
         {"instrument": "analyzer", "kind": "error", "on": "CALC:MARK1:X", "nth": 40, "code": -222}]
REBOOT = [{"instrument": "source1", "kind": "reboot", "on": "SOUR:POW", "nth": 15},
          {"instrument": "source2", "kind": "reboot", "on": "SYST:ERR?", "nth": 40, "keep_connection": True},
          {"instrument": "analyzer", "kind": "reboot", "on": "INIT:IMM", "nth": 100, "keep_connection": True},
          {"instrument": "analyzer", "kind": "reboot", "on": "CALC:MARK1:Y?", "nth": 150}]
UNSETTLED = [{"instrument": "source2", "kind": "unsettled", "on": "SOUR:POW", "nth": 8, "level_error_db": 2.0,
              "duration_s": 0.05},
             {"instrument": "source1", "kind": "unsettled", "on": "SOUR:POW", "nth": 25, "level_error_db": -1.5,
              "duration_s": 0.05}]

CASES = {"stall": STALL, "drop": DROP, "error": ERROR, "reboot": REBOOT, "unsettled": UNSETTLED,
         "all": STALL + DROP + ERROR + REBOOT + UNSETTLED}
# What the event log must show for each fault.
EXPECTED_EVENTS = {"stall": {"retry"}, "drop": {"reconnect", "reapplied"}, "error": {"scpi-error"},
                   "reboot": {"reconnect", "state-lost"}, "unsettled": {"point-retry"}}


@pytest.mark.parametrize("case", list(CASES))
def test_run_completes_under_faults_with_every_point_once(tmp_path, reference, case):
    bench_path = write_bench(tmp_path, faults=CASES[case])
    outcome, sim, db_path = run_once(tmp_path, bench_path)
    assert outcome.status == "complete"
    assert sim.faults.pending() == [] and len(sim.faults.fired) == len(CASES[case])  # every fault happened
    status, end_reason, points, keys, events = stored(db_path)
    assert status == "complete" and end_reason
    planned = [p.key for p in expand(load_plan(write_plan(tmp_path)).settings)]
    assert sorted(keys) == sorted(planned) and len(keys) == len(set(keys))
    assert all(p.status == "measured" for p in points.values()), [p.fail_reason for p in points.values() if p.fail_reason]
    assert_like_reference(points, reference)
    kinds = {kind for kind, _ in events}
    wanted = set().union(*(EXPECTED_EVENTS[name] for name in (EXPECTED_EVENTS if case == "all" else [case])))
    assert wanted <= kinds, (wanted - kinds, events)
    assert rf_is_off(sim)
    assert_power_commands_within_limits(sim, bench_path)
    log_lines = (tmp_path / "t.log").read_text().splitlines()
    assert any(" run-start " in line for line in log_lines) and any(" run-end " in line for line in log_lines)


def test_fault_free_reference_is_itself_clean(reference):
    # The comparison above is only meaningful if the reference has real IM3 readings above noise.
    above = [p for p in reference.values() if p.raw_lower_dbm > p.raw_noise_lower_dbm + 20]
    assert len(above) > 20
    assert np.isfinite([p.raw_f1_dbm for p in reference.values()]).all()
