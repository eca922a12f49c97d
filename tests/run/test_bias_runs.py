"""Whole runs on the simulated FET bench (sample_runs/bias_bench.toml): bias comes on before RF and
goes off after it, in the safe order, on every way out; a tripped supply aborts the run; plans are
checked against the bench file's [bias] limits before anything is switched on. Every state is
read from the simulator's own instruments and its one command log."""

from __future__ import annotations

import math
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import SAMPLE_RUNS
from sim_runs import rf_is_off
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.errors import InputError
from tonebench.instruments.rf_guard import Terminated
from tonebench.run.ending import RunCancelled
from tonebench.run.start import execute_run
from tonebench.store.models import Event, Point, Run

BIAS_BENCH = (SAMPLE_RUNS / "bias_bench.toml").read_text()
PLAN = """
[plan]
name = "tbf77-bias-steps"

[device]
part_number = "TBF-77"
serial = "TBF77-0042"
lot = "TF26-007"

[sweep]
center_freqs_hz = [2.45e9]
spacings_hz = [1.0e6]
tone_start_dbm = -30.0
tone_stop_dbm = -20.0
tone_step_dbm = 5.0

[analyzer]
rbw_hz = 1000.0
atten_db = 10.0

[bias]
gate_v = [0.55, 0.62]
"""


def write(folder: Path, bench_text: str = BIAS_BENCH, plan_text: str = PLAN) -> tuple[Path, Path]:
    (folder / "bench.toml").write_text(bench_text)
    (folder / "plan.toml").write_text(plan_text)
    return folder / "plan.toml", folder / "bench.toml"


def run(folder: Path, bench_text: str = BIAS_BENCH, plan_text: str = PLAN, **kwargs):
    plan, bench = write(folder, bench_text, plan_text)
    started = []
    try:
        outcome = execute_run(plan, bench, f"sqlite:///{folder / 'tb.db'}", folder / "report.html",
                              on_sim_started=started.append, **kwargs)
    except BaseException as exc:  # noqa: BLE001 - the test looks at the bench after any way out
        return exc, started[0] if started else None
    return outcome, started[0]


def switch_lines(sim) -> list[tuple[str, str]]:
    """(instrument, "ON"/"OFF") for every output switch command, in the order the bench got them."""
    lines = []
    for _clock, instrument, line in sim.bench.command_log:
        for unit in line.split(";"):
            word = unit.strip().lstrip(":").upper()
            if word in ("OUTP ON", "OUTP OFF", "OUTP 1", "OUTP 0"):
                lines.append((instrument, "ON" if word.endswith(("ON", "1")) else "OFF"))
    return lines


def bias_is_off(sim) -> bool:
    return not any(supply.channel(1).output_on for supply in sim.bench.supplies.values())


def assert_safe_order(sim) -> None:
    """Gate on before drain on before any RF on; the last RF off before the drain goes off, and
    the drain off before the gate; everything off at the end."""
    lines = switch_lines(sim)
    first_on = {name: lines.index((name, "ON")) for name in ("gate", "drain", "source1", "source2")
                if (name, "ON") in lines}
    assert first_on["gate"] < first_on["drain"] < min(first_on.get("source1", 1e9), first_on.get("source2", 1e9))
    last_off = {name: max(i for i, (n, s) in enumerate(lines) if n == name and s == "OFF")
                for name in ("gate", "drain", "source1", "source2")}
    assert max(last_off["source1"], last_off["source2"]) < last_off["drain"] < last_off["gate"]
    assert rf_is_off(sim) and bias_is_off(sim)


def test_bias_steps_measured_with_the_drain_current_of_each_point(tmp_path):
    outcome, sim = run(tmp_path)
    assert outcome.status == "complete", outcome.reason
    assert_safe_order(sim)
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        points = session.scalars(select(Point).order_by(Point.seq)).all()
        kinds = [e.kind for e in session.scalars(select(Event).order_by(Event.id))]
    assert [p.bias_v for p in points] == [0.55] * 3 + [0.62] * 3
    fet = sim.bench.fet_bias.fet
    for point in points:
        true_a = float(fet.drain_a(point.bias_v, 300.0)) * math.tanh(3.0 / 0.3)
        assert point.drain_current_a == pytest.approx(true_a, abs=5 * 2e-7)  # the scenario's reading noise
        assert point.gate_read_v == pytest.approx(point.bias_v) and point.drain_read_v == pytest.approx(3.0)
        assert abs(point.gate_current_a) < 1e-6
    assert kinds.index("bias-on") < kinds.index("rf-on") < kinds.index("rf-off") < kinds.index("bias-off")
    # The drain came up in steps of at most ramp_step_v (0.1 V): 30 steps to 3 V.
    drain_volts = [line for _c, name, line in sim.bench.command_log if name == "drain" and ":VOLT " in line]
    assert len(drain_volts) >= 2 * 30


@pytest.mark.parametrize("stop", [KeyboardInterrupt, Terminated, RuntimeError, RunCancelled])
def test_bias_goes_off_after_rf_on_every_way_out(tmp_path, stop):
    def progress(done, total):
        if done == 2:
            raise stop("stopped by the test")

    result, sim = run(tmp_path, on_progress=progress)
    assert isinstance(result, stop)
    assert_safe_order(sim)
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        assert session.scalars(select(Run.status)).one() in ("aborted", "failed")


def test_a_tripped_drain_aborts_the_run_with_an_event_and_never_reads_zero_bias(tmp_path):
    bench_text = BIAS_BENCH.replace("drain_current_limit_a = 0.06", "drain_current_limit_a = 0.008")
    outcome, sim = run(tmp_path, bench_text)  # Id is 5 mA at 0.55 V and 11 mA at 0.62 V
    assert outcome.status == "aborted" and "bias supply tripped" in outcome.reason
    assert sim.bench.supplies["drain"].channel(1).tripped
    assert rf_is_off(sim) and bias_is_off(sim)
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        points = session.scalars(select(Point)).all()
        trip = session.scalars(select(Event).where(Event.kind == "bias-tripped")).one()
    assert "tripped" in trip.message and {p.bias_v for p in points} == {0.55}
    assert all(p.drain_current_a > 4e-3 for p in points)  # no point stored with the tripped (zero) bias


@pytest.mark.parametrize("bench_edit, plan_edit, message", [
    (None, ("gate_v = [0.55, 0.62]", "gate_v = [0.55, 0.95]"), "gate voltage 0.95 V outside the bench file's [bias]"),
    (None, ("gate_v = [0.55, 0.62]", "gate_v = [0.55]\ndrain_v = 4.5"), "drain voltage 4.5 V outside 0..drain_max_v"),
    (None, ("[bias]\ngate_v = [0.55, 0.62]", ""), "the plan needs a [bias] table"),
])
def test_plans_outside_the_bias_limits_are_refused_before_anything_starts(tmp_path, bench_edit, plan_edit, message):
    result, sim = run(tmp_path, plan_text=PLAN.replace(*plan_edit))
    assert isinstance(result, InputError) and message in str(result)
    assert sim is None  # refused before the simulator (the instruments) even started
    assert not (tmp_path / "tb.db").exists()  # nor was the database written


def test_a_bias_plan_on_a_bench_without_supplies_is_refused(tmp_path):
    bench_text = (SAMPLE_RUNS / "sim_bench.toml").read_text()
    result, sim = run(tmp_path, bench_text)
    assert isinstance(result, InputError) and "names no gate and drain supplies" in str(result)
    assert sim is None


def bias_lab(folder: Path):
    """The sample FET bench served in this process, and a bench file reaching it as hardware."""
    from tonebench.config.bench_file import load_bench
    from tonebench.sim.launch import start_sim_bench

    sim = start_sim_bench(load_bench(SAMPLE_RUNS / "bias_bench.toml").scenario)
    text = BIAS_BENCH.split("[simulation]")[0]
    for role, resource in sim.resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    (folder / "bench.toml").write_text(text)
    (folder / "plan.toml").write_text(PLAN)
    return sim


@pytest.mark.parametrize("signum, count, code", [
    (signal.SIGINT, 5, 130), (signal.SIGTERM, 3, 143),
], ids=["ctrl-c-x5", "sigterm-x3"])
def test_repeated_signals_leave_rf_and_bias_off_in_order(tmp_path, signum, count, code):
    from test_rf_off_paths import both_on, finish, send_burst, wait_for

    sim = bias_lab(tmp_path)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "tonebench", "run", "plan.toml", "--bench", "bench.toml",
                                 "--db", "t.db"], cwd=tmp_path, text=True, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE)
        wait_for(lambda: both_on(sim), proc, "RF on")
        send_burst(proc.pid, signum, count)
        returncode, _stdout, stderr = finish(proc)
        assert returncode == code and "Traceback" not in stderr, stderr
        assert_safe_order(sim)
    finally:
        sim.close()


def test_a_drain_current_target_is_found_on_the_bench_and_held_for_every_point(tmp_path):
    from tonebench.sim.fet import SimFet

    # The simulated FET at 0.60 V gate and 3 V drain (the drain's knee factor tanh(Vd / 0.3 V)).
    target_a = float(SimFet().drain_a(0.60, 300.0)) * math.tanh(3.0 / 0.3)
    outcome, sim = run(tmp_path, plan_text=PLAN.replace("gate_v = [0.55, 0.62]", f"drain_current_a = {target_a!r}"))
    assert outcome.status == "complete", outcome.reason
    assert_safe_order(sim)
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        points = session.scalars(select(Point).order_by(Point.seq)).all()
        events = {e.kind: e.message for e in session.scalars(select(Event))}
    assert len(points) == 3 and all(p.bias_v is None for p in points)  # no bias axis: one gate, found
    for point in points:
        assert point.drain_current_a == pytest.approx(target_a, rel=0.011)
        assert point.gate_read_v == pytest.approx(0.60, abs=2e-3)  # the FET's own gate for that current
    assert "bias-target" in events and f"(target {target_a * 1e3:g} mA" in events["bias-target"]
    gates = [float(line.split()[-1]) for _c, name, line in sim.bench.command_log if name == "gate" and ":VOLT " in line]
    assert max(gates) < 0.85 and min(gates) >= 0.0  # bisection midpoints: never at the limits


def test_a_drain_current_the_gate_limits_cannot_give_aborts_with_bias_off(tmp_path):
    outcome, sim = run(tmp_path, plan_text=PLAN.replace("gate_v = [0.55, 0.62]", "drain_current_a = 0.055"),
                       bench_text=BIAS_BENCH.replace("gate_max_v = 0.85", "gate_max_v = 0.50"))
    assert outcome.status == "aborted" and "no gate voltage within 0..0.5 V gives 55 mA" in outcome.reason
    assert rf_is_off(sim) and bias_is_off(sim)
    assert not any(line.upper().startswith("OUTP ON") for _c, name, line in sim.bench.command_log
                   if name.startswith("source"))


@pytest.mark.parametrize("plan_edit, words", [
    ("gate_v = [0.55, 0.62]\ndrain_current_a = 0.01", "drain_current_a is given with gate voltages"),
    ("drain_current_a = 0.07", "is not below the bench file's drain_current_limit_a (0.06 A)"),
])
def test_bad_drain_current_targets_are_refused_before_anything_is_switched_on(tmp_path, plan_edit, words):
    result, sim = run(tmp_path, plan_text=PLAN.replace("gate_v = [0.55, 0.62]", plan_edit))
    assert isinstance(result, InputError) and words in str(result), result
    assert sim is None or bias_is_off(sim)
