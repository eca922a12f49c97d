"""The thermal chamber: the simulated chamber's closed-form lag against a numerical integration
(scipy's solve_ivp as the reference), soaks in whole runs on the simulated FET bench
(sample_runs/bias_chamber_bench.toml) with the chamber's reading stored per point, a soak that
never settles aborting the run with RF and bias off (read from the simulator), plans refused
before anything is switched on, and the sweet spot's drift over three temperatures against the
simulated FET's own drift."""

from __future__ import annotations

import json
import re
import signal
import subprocess
import sys

import numpy as np
import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from scipy.integrate import solve_ivp
from sim_runs import rf_is_off
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.analysis.bias_drift import sweet_spot_drift
from tonebench.errors import InputError
from tonebench.run.start import execute_run
from tonebench.sim.chamber import SimChamber
from tonebench.sim.fet import SimFet
from tonebench.sim.scenario import ChamberScenario
from tonebench.store.models import Event, Point, Result

BENCH = (SAMPLE_RUNS / "bias_chamber_bench.toml").read_text()
PLAN = """
[plan]
name = "tbf77-two-temperatures"

[device]
part_number = "TBF-77"
serial = "TBF77-0050"

[sweep]
center_freqs_hz = [2.45e9]
spacings_hz = [1.0e6]
tone_start_dbm = -30.0
tone_stop_dbm = -20.0
tone_step_dbm = 5.0
temperatures_c = [85.0, -20.0]

[analyzer]
rbw_hz = 1000.0
atten_db = 10.0

[bias]
gate_v = [0.62]
"""


def _run(tmp_path, bench_text=BENCH, plan_text=PLAN, held_at_c=None):
    (tmp_path / "bench.toml").write_text(bench_text)
    (tmp_path / "plan.toml").write_text(plan_text)
    started = []
    try:
        outcome = execute_run(tmp_path / "plan.toml", tmp_path / "bench.toml", f"sqlite:///{tmp_path / 'tb.db'}",
                              tmp_path / "report.html", on_sim_started=started.append, held_at_c=held_at_c)
    except InputError as exc:
        return exc, started
    return outcome, started


def test_the_closed_form_lag_matches_a_numerical_integration():
    scenario = ChamberScenario(air_time_constant_s=120.0, device_time_constant_s=45.0, start_c=23.0)
    clock = [0.0]
    chamber = SimChamber(scenario, lambda: clock[0])
    chamber.set_point(-20.0)
    ta, td, target = 120.0, 45.0, -20.0
    reference = solve_ivp(lambda t, y: [(target - y[0]) / ta, (y[0] - y[1]) / td], (0.0, 900.0), [23.0, 23.0],
                          t_eval=[30.0, 150.0, 600.0, 900.0], rtol=1e-10, atol=1e-10)
    for t_s, air_c, device_c in zip(reference.t, *reference.y):
        clock[0] = t_s
        assert chamber.temperatures_c() == pytest.approx((air_c, device_c), abs=1e-6)


def test_a_set_point_beyond_reach_settles_at_the_reach_limit():
    clock = [0.0]
    chamber = SimChamber(ChamberScenario(min_reach_c=-10.0), lambda: clock[0])
    chamber.set_point(-40.0)
    clock[0] = 5000.0
    assert chamber.air_c() == pytest.approx(-10.0, abs=1e-6)


def test_each_temperature_is_soaked_before_its_points_and_stored_with_them(tmp_path):
    outcome, started = _run(tmp_path)
    assert outcome.status == "complete", outcome.reason
    assert rf_is_off(started[0])
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        points = session.scalars(select(Point).order_by(Point.seq)).all()
        results = session.scalars(select(Result)).all()
        kinds = [e.kind for e in session.scalars(select(Event).order_by(Event.id))]
    # The plan's order: every point at 85 degC, then every point at -20 degC.
    assert [p.temperature_c for p in points] == [85.0] * 3 + [-20.0] * 3
    assert all(abs(p.chamber_read_c - p.temperature_c) <= 0.5 for p in points)
    assert points[0].point_key.startswith("t+85.0C/")
    assert sorted(r.temperature_c for r in results) == [-20.0, 85.0]
    assert kinds.count("soak-start") == kinds.count("soak-done") == 2
    assert kinds.index("soak-done") < kinds.index("rf-on")
    # At a fixed gate voltage the gain moves with temperature as g1 does (threshold and mobility):
    # the measured difference against the simulated FET's own g1 at each chamber reading.
    gains = {r.temperature_c: r.gain_db for r in results}
    reads = {p.temperature_c: p.chamber_read_c + 273.15 for p in points}
    g1 = {t: float(SimFet().series(0.62, reads[t]).g1_s) for t in reads}
    assert gains[85.0] - gains[-20.0] == pytest.approx(20 * np.log10(g1[85.0] / g1[-20.0]), abs=0.3)


def test_a_soak_that_never_settles_aborts_the_run_with_rf_and_bias_off(tmp_path):
    bench = BENCH.replace("start_c = 23.0", "start_c = 23.0\nmin_reach_c = 0.0").replace(
        "timeout_s = 3600.0", "timeout_s = 1800.0")
    outcome, started = _run(tmp_path, bench_text=bench, plan_text=PLAN.replace("[85.0, -20.0]", "[-20.0]"))
    assert outcome.status == "aborted"
    assert "no soak at -20 degC after 1800 s" in outcome.reason
    sim = started[0]
    assert rf_is_off(sim)
    assert not any(supply.channel(1).output_on for supply in sim.bench.supplies.values())
    assert sim.bench.clock_s >= 1800.0  # waited on the virtual clock, not in real time


@pytest.mark.parametrize("start_c, soaked", [(85.0, False), (84.0, True)])
def test_a_chamber_held_at_the_callers_soak_is_not_dwelt_in_again(tmp_path, start_c, soaked):
    """The runs of a study follow its DC sweep's soak: a chamber still within tolerance of the
    temperature the caller soaked at waits no second dwell; one found out of it is soaked again;
    the other temperature of the plan is soaked as always."""
    outcome, started = _run(tmp_path, bench_text=BENCH.replace("start_c = 23.0", f"start_c = {start_c}"),
                            held_at_c=85.0)
    assert outcome.status == "complete", outcome.reason
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        events = [(e.kind, e.message) for e in session.scalars(select(Event).order_by(Event.id))]
        reads = [p.chamber_read_c for p in session.scalars(select(Point).where(Point.temperature_c == 85.0))]
    kinds = [kind for kind, _ in events]
    assert kinds.count("soak-start") == (2 if soaked else 1) and kinds.count("soak-held") == (0 if soaked else 1)
    assert rf_is_off(started[0])  # read from the simulated sources themselves
    assert all(abs(read_c - 85.0) <= 0.5 for read_c in reads)
    if not soaked:
        assert "held at 85 degC since the last soak, reads 85.00 degC" in dict(events)["soak-held"]


@pytest.mark.parametrize("edit, message", [
    (("temperatures_c = [85.0, -20.0]", "temperatures_c = [85.0, 150.0]"),
     "temperature 150 degC outside the bench file's [chamber] min_c..max_c (-40..125 degC)"),
    (("temperatures_c = [85.0, -20.0]", "temperatures_c = [85.0, 85.0]"), "temperatures_c repeats a temperature"),
])
def test_bad_temperatures_are_refused_before_anything_is_switched_on(tmp_path, edit, message):
    outcome, started = _run(tmp_path, plan_text=PLAN.replace(*edit))
    assert isinstance(outcome, InputError) and message in str(outcome)
    assert started == []


def test_temperatures_need_a_chamber_on_the_bench(tmp_path):
    bench = (SAMPLE_RUNS / "bias_bench.toml").read_text()
    outcome, started = _run(tmp_path, bench_text=bench)
    assert isinstance(outcome, InputError) and "names no chamber" in str(outcome) and started == []


def test_a_chamber_role_on_a_simulated_bench_needs_a_simulated_chamber(tmp_path):
    bench = BENCH[:BENCH.index("[simulation.chamber]")]
    outcome, _ = _run(tmp_path, bench_text=bench)
    assert isinstance(outcome, InputError)
    assert "instruments.chamber on a simulated bench needs a [simulation.chamber] table" in str(outcome)


def test_the_drift_of_an_exact_line_is_its_slope():
    drift = sweet_spot_drift([-20.0, 25.0, 85.0], [0.6, 0.6 - 0.045 * 1.3, 0.6 - 0.105 * 1.3], [1e-3, 1e-3, 1e-3])
    assert drift.mv_per_k == pytest.approx(-1.3, rel=1e-9)
    # Three 1 mV bounds over a 105 K span: the slope's sigma is 1 mV / (sqrt(sum (T - mean)^2)).
    temps = np.array([-20.0, 25.0, 85.0])
    assert drift.bound_mv_per_k == pytest.approx(1.0 / np.sqrt(np.sum((temps - temps.mean()) ** 2)), rel=1e-6)
    assert sweet_spot_drift([25.0], [0.57], [1e-3]) is None


def test_the_sweet_spot_drift_over_three_temperatures_matches_the_simulated_fet(tmp_path):
    plan = SAMPLE_RUNS / "bias_temperature_plan.toml"
    result = invoke("bias", "search", plan, "--bench", SAMPLE_RUNS / "bias_chamber_bench.toml",
                    "--db", tmp_path / "tb.db", "--page", tmp_path / "bias.html")
    assert result.exit_code == 0, result.output
    fet = SimFet()
    spots = [float(v) for v in re.findall(r"measured at -30 dBm per tone: sweet spot (\d\.\d+) V", result.output)]
    reads_c = [float(v) for v in re.findall(r"chamber read (-?\d+\.\d+) degC", result.output)]
    assert len(spots) == len(reads_c) == 3
    for spot_v, read_c in zip(spots, reads_c):
        assert abs(spot_v - fet.g3_zero_v(read_c + 273.15)) < 5e-3  # the 5 mV
    measured = float(re.search(r"sweet spot drift: ([-+]\d\.\d+) mV/K", result.output).group(1))
    truth = float(np.polyfit([r + 273.15 for r in reads_c], [fet.g3_zero_v(r + 273.15) for r in reads_c], 1)[0]) * 1e3
    assert measured == pytest.approx(truth, rel=0.10)
    assert "Sweet spot against temperature" in (tmp_path / "bias.html").read_text()
    # The catalog returns the same findings, one series, per temperature.
    found = invoke("find", "--sweet-spots", "--json", "--temp-min-c", "0", "--db", tmp_path / "tb.db")
    assert found.exit_code == 0, found.output
    rows = json.loads(found.output)
    assert sorted((r["temperature_c"], r["kind"]) for r in rows) == [
        (25.0, "dc-prediction"), (25.0, "two-tone"), (85.0, "dc-prediction"), (85.0, "two-tone")]
    assert len({r["series"] for r in rows}) == 1 and rows[0]["part_number"] == "TBF-77"
    two_tone_85 = next(r for r in rows if r["temperature_c"] == 85.0 and r["kind"] == "two-tone")
    assert f"{two_tone_85['sweet_spot_v']:.4f}" == f"{spots[2]:.4f}"
    refused = invoke("find", "--sweet-spots", "--flag", "slope", "--db", tmp_path / "tb.db")
    assert refused.exit_code == 2 and "apply to results, not sweet spots" in refused.output
    # No spec limit on TBF-77 here: measured findings are judged 'no-limit', predictions not at all.
    judged = json.loads(invoke("find", "--sweet-spots", "--json", "--verdict", "no-limit", "--db", tmp_path / "tb.db").output)
    assert len(judged) == 3 and {r["kind"] for r in judged} == {"two-tone"}


def chamber_lab(folder, start_c: float):
    """The chamber bench served in this process (its chamber holding start_c: the simulator's
    clock stands still between commands), reached by a bench file as hardware with a short dwell."""
    from tonebench.config.bench_file import load_bench
    from tonebench.sim.launch import start_sim_bench

    scenario = load_bench(SAMPLE_RUNS / "bias_chamber_bench.toml").scenario
    scenario = scenario.model_copy(update={"chamber": scenario.chamber.model_copy(update={"start_c": start_c})})
    sim = start_sim_bench(scenario)
    text = BENCH.split("[simulation]")[0].replace("dwell_s = 300.0", "dwell_s = 0.3").replace("poll_s = 10.0",
                                                                                              "poll_s = 0.05")
    for role, resource in sim.resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    (folder / "bench.toml").write_text(text)
    (folder / "plan.toml").write_text(PLAN.replace("[85.0, -20.0]", "[25.0]"))
    return sim


@pytest.mark.parametrize("start_c, when", [(25.0, "measuring"), (60.0, "soaking")])
@pytest.mark.parametrize("signum, count, code", [(signal.SIGINT, 5, 130), (signal.SIGTERM, 3, 143)],
                         ids=["ctrl-c-x5", "sigterm-x3"])
def test_repeated_signals_in_a_chamber_run_leave_rf_and_bias_off(tmp_path, start_c, when, signum, count, code):
    from test_rf_off_paths import both_on, finish, send_burst, wait_for

    sim = chamber_lab(tmp_path, start_c)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "tonebench", "run", "plan.toml", "--bench", "bench.toml",
                                 "--db", "t.db"], cwd=tmp_path, text=True, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE)
        if when == "measuring":
            wait_for(lambda: both_on(sim), proc, "RF on")
        else:  # the chamber at 60 degC never reaches 25 degC here: signals arrive mid-soak
            wait_for(lambda: sim.bench.chamber.set_point_c == 25.0
                     and all(s.channel(1).output_on for s in sim.bench.supplies.values()), proc, "soaking")
        send_burst(proc.pid, signum, count)
        returncode, _stdout, stderr = finish(proc)
        assert returncode == code and "Traceback" not in stderr, stderr
        assert rf_is_off(sim)
        assert not any(s.channel(1).output_on for s in sim.bench.supplies.values())
        if when == "soaking":
            assert not any(line.upper().startswith("OUTP ON") for _, name, line in sim.bench.command_log
                           if name.startswith("source"))
    finally:
        sim.close()
