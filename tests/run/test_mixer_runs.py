"""Mixer plans end to end (issue 15 item 1): sample_runs/mixer_plan.toml measured by `tonebench
run` on the simulated mixer bench, found by `tonebench find --json`; IIP3 against LO drive;
high-side injection; a spur placed on an IM3 frequency flagged; RF off at the LO on every way out,
read from the simulated LO itself.

Truth: the simulated mixer (sample_runs/mixer_bench.toml [simulation.mixer], sim/mixer.py):
conversion gain -6.5 dB, IIP3 12 dBm at the nominal 7 dBm LO, falling 3 dB per dB of LO below it
(a model; common practice that a starved mixer's IIP3 falls several dB per dB of LO).
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.config.bench_file import load_bench
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.mixer import LO_SOURCE_INDEX
from tonebench.store.models import Event, Point, Run

PLAN = SAMPLE_RUNS / "mixer_plan.toml"
BENCH = SAMPLE_RUNS / "mixer_bench.toml"
IIP3_NOMINAL_DBM, LO_NOMINAL_DBM, STARVATION_DB_PER_DB = 12.0, 7.0, 3.0  # mixer_bench.toml
IIP3_AT_NOMINAL_TOLERANCE_DB = 0.3  # issue 15 acceptance
IIP3_AGAINST_LO_TOLERANCE_DB = 0.5  # issue 15 acceptance
WAIT_S = 120.0


def true_iip3_dbm(lo_dbm: float) -> float:
    return IIP3_NOMINAL_DBM - STARVATION_DB_PER_DB * max(0.0, LO_NOMINAL_DBM - lo_dbm)


def plan_text(lo_dbm: float = 7.0, lo_hz: float = 2.3e9, injection: str = "low") -> str:
    """The sample plan at another LO; tones kept 24..36 dB under the intercept (slope-3 region)."""
    iip3_dbm = true_iip3_dbm(lo_dbm)
    return (PLAN.read_text()
            .replace("lo_dbm = 7.0", f"lo_dbm = {lo_dbm!r}")
            .replace("lo_hz = 2.3e9", f"lo_hz = {lo_hz!r}")
            .replace('injection = "low"', f'injection = "{injection}"')
            .replace("tone_start_dbm = -24.0", f"tone_start_dbm = {iip3_dbm - 36.0!r}")
            .replace("tone_stop_dbm = -12.0", f"tone_stop_dbm = {iip3_dbm - 24.0!r}"))


def run_plan(tmp_path: Path, text: str, name: str = "plan.toml") -> tuple[str, dict]:
    plan = tmp_path / name
    plan.write_text(text)
    db = f"sqlite:///{tmp_path / 't.db'}"
    result = invoke("run", plan, "--bench", BENCH, "--db", db)
    assert result.exit_code == 0, result.output
    return db, result


def find_json(db: str) -> list[dict]:
    result = invoke("find", "--part", "TBM-150", "--json", "--db", db)
    assert result.exit_code == 0, result.output
    return json.loads(result.output)


def test_sample_mixer_plan_end_to_end(tmp_path):
    db, result = run_plan(tmp_path, PLAN.read_text())
    assert "RF off at source1, source2, lo (read back)" in result.output
    [row] = find_json(db)
    assert row["iip3_dbm"] == pytest.approx(IIP3_NOMINAL_DBM, abs=IIP3_AT_NOMINAL_TOLERANCE_DB)
    # Conversion gain where gain stands: -6.5 dB and the analyzer's 0.4 dB level error (the bench's
    # [simulation.analyzer] level_error_db, not calibrated out by the [offsets]).
    assert row["gain_db"] == pytest.approx(-6.5 + 0.4, abs=0.1)
    # OIP3 referred to the IF output: IIP3 plus the conversion gain.
    assert row["oip3_dbm"] == pytest.approx(row["iip3_dbm"] + row["gain_db"], abs=0.05)
    engine = create_engine(db)
    with Session(engine) as session:
        point = session.scalars(select(Point)).first()
        # Output losses at the IF (149 MHz: 0.56 + 1.0 dB * 49/2500 from the table), not at the RF.
        assert point.out_loss_f1_db == pytest.approx(0.56 + 1.0 * 49e6 / 2.5e9, abs=1e-6)
        assert point.f1_hz == pytest.approx(2.449e9)  # the point keeps its RF tones
    engine.dispose()


def test_high_side_injection_measures_the_same_device(tmp_path):
    db, _ = run_plan(tmp_path, plan_text(lo_hz=2.6e9, injection="high"))
    [row] = find_json(db)
    assert row["iip3_dbm"] == pytest.approx(IIP3_NOMINAL_DBM, abs=IIP3_AT_NOMINAL_TOLERANCE_DB)
    # The RF's lower product (2f1-f2) is read where it lands, above the tones at the IF: both agree.
    assert row["iip3_lower_dbm"] == pytest.approx(row["iip3_upper_dbm"], abs=0.2)


def test_measured_iip3_follows_the_lo_drive(tmp_path):
    """ONE run stepping the LO ([mixer] lo_levels_dbm, the "lo" plan axis): a result per LO level,
    each within 0.5 dB of the simulated dependence (sim/mixer.py closed form). One tone range for
    all levels: the analysis keeps the slope-3 region of each (noise-limited points at the high
    IIP3, compressed ones at the starved LO left out); RBW 10 Hz lowers the floor for the first."""
    lo_levels_dbm = [9.0, 7.0, 5.0, 3.0, 1.0]
    text = (PLAN.read_text().replace("lo_dbm = 7.0 ", f"lo_levels_dbm = {lo_levels_dbm!r} ")
            .replace("tone_start_dbm = -24.0", "tone_start_dbm = -39.0").replace("rbw_hz = 100.0", "rbw_hz = 10.0"))
    db, _ = run_plan(tmp_path, text)
    rows = find_json(db)
    assert len({row["run_guid"] for row in rows}) == 1
    measured = {row["lo_dbm"]: row["iip3_dbm"] for row in rows}
    assert sorted(measured) == sorted(lo_levels_dbm)
    for lo_dbm, iip3_dbm in measured.items():
        assert iip3_dbm == pytest.approx(true_iip3_dbm(lo_dbm), abs=IIP3_AGAINST_LO_TOLERANCE_DB), lo_dbm
    engine = create_engine(db)
    with Session(engine) as session:
        points = session.scalars(select(Point).order_by(Point.seq)).all()
    engine.dispose()
    # Outside frequency and tone power: the LO levels in plan order, each a whole tone ramp.
    assert list(dict.fromkeys(p.lo_dbm for p in points)) == lo_levels_dbm
    assert points[0].point_key.startswith("lo+9.00dBm/c")


def test_plans_without_a_stepped_lo_leave_no_trace_of_it(tmp_path):
    """lo_dbm (one level): points and results keep lo_dbm None and keys without an LO part."""
    db, _ = run_plan(tmp_path, PLAN.read_text())
    [row] = find_json(db)
    assert row["lo_dbm"] is None
    engine = create_engine(db)
    with Session(engine) as session:
        points = session.scalars(select(Point)).all()
    engine.dispose()
    assert {p.lo_dbm for p in points} == {None}
    assert not any("lo" in p.point_key for p in points)


def test_a_spur_placed_on_an_im3_frequency_is_flagged(tmp_path):
    # LO at f2/2 = 1.2255 GHz: -3*LO + 2*f1 lands exactly on the lower IM3 at the IF (worked by hand).
    db, _ = run_plan(tmp_path, plan_text(lo_hz=2.451e9 / 2))
    engine = create_engine(db)
    with Session(engine) as session:
        spurs = [e.details_json for e in session.scalars(select(Event).where(Event.kind == "mixer-spur"))]
    engine.dispose()
    assert any((s["m"], s["n"], s["tone"], s["near"]) == (-3, 2, "f1", "lower") and abs(s["offset_hz"]) < 1.0
               for s in spurs), spurs


def test_the_sample_plan_has_no_spur_event(tmp_path):
    db, _ = run_plan(tmp_path, PLAN.read_text())
    engine = create_engine(db)
    with Session(engine) as session:
        assert session.scalars(select(Event).where(Event.kind == "mixer-spur")).all() == []
    engine.dispose()


# --- RF off at the LO, read from the simulated LO ---------------------------------------------------


def hardware_mixer_bench(folder: Path, sim) -> Path:
    text = BENCH.read_text().split("[simulation]")[0]
    for role, resource in sim.resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    path = folder / "bench.toml"
    path.write_text(text + '\n[unattended]\nbackoff_s = 0.01\n')
    return path


@pytest.fixture
def mixer_sim():
    with start_sim_bench(load_bench(BENCH).scenario) as sim:
        yield sim


def lo_state(sim) -> tuple[bool, bool]:
    """(ever switched on during the command, on now) from the simulated LO's own log and state."""
    with sim.bench.lock:
        ever = any(instrument == "lo" and line.upper().startswith("OUTP") and line.split()[-1] in ("1", "ON")
                   for _, instrument, line in sim.bench.command_log)
        channel = sim.bench.source(LO_SOURCE_INDEX)
        return ever, channel.commanded.rf_on or channel.effective.rf_on


def test_lo_off_after_a_normal_end(tmp_path, mixer_sim):
    bench = hardware_mixer_bench(tmp_path, mixer_sim)
    (tmp_path / "plan.toml").write_text(PLAN.read_text())
    result = invoke("run", tmp_path / "plan.toml", "--bench", bench, "--db", f"sqlite:///{tmp_path / 't.db'}")
    assert result.exit_code == 0, result.output
    assert lo_state(mixer_sim) == (True, False)


def test_lo_off_after_an_error(tmp_path, mixer_sim):
    bench = hardware_mixer_bench(tmp_path, mixer_sim)
    bench.write_text(bench.read_text() + 'on_point_failure = "abort"\nreconnects = 1\nretries = 0\n')
    (tmp_path / "plan.toml").write_text(PLAN.read_text())
    done = threading.Event()

    def kill_analyzer_once_lo_is_on() -> None:
        deadline = time.monotonic() + WAIT_S
        while not lo_state(mixer_sim)[0] and time.monotonic() < deadline and not done.is_set():
            threading.Event().wait(0.002)
        mixer_sim.switch_off("analyzer")

    killer = threading.Thread(target=kill_analyzer_once_lo_is_on)
    killer.start()
    try:
        result = invoke("run", tmp_path / "plan.toml", "--bench", bench, "--db", f"sqlite:///{tmp_path / 't.db'}")
    finally:
        done.set()
        killer.join()
    assert result.exit_code == 1, result.output
    assert "RF off at source1, source2, lo (read back)" in result.output
    assert lo_state(mixer_sim) == (True, False)


def tone_sources_on(sim) -> list[int]:
    """The tone sources (1, 2) whose RF is on, commanded or in force, in the simulator's own state."""
    with sim.bench.lock:
        return [index for index in (1, 2)
                if sim.bench.source(index).commanded.rf_on or sim.bench.source(index).effective.rf_on]


@pytest.mark.parametrize("signum, count, exit_code", [
    (signal.SIGTERM, 1, 143), (signal.SIGINT, 1, 130), (signal.SIGINT, 5, 130), (signal.SIGTERM, 3, 143),
], ids=["sigterm", "ctrl-c", "ctrl-c-x5", "sigterm-x3"])
def test_lo_off_after_a_signal(tmp_path, mixer_sim, signum, count, exit_code):
    from test_rf_off_paths import send_burst

    bench = hardware_mixer_bench(tmp_path, mixer_sim)
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN.read_text().replace("tone_step_dbm = 3.0", "tone_step_dbm = 0.25"))  # a longer run
    proc = subprocess.Popen([sys.executable, "-m", "tonebench", "run", str(plan), "--bench", str(bench), "--db",
                             f"sqlite:///{tmp_path / 't.db'}"], cwd=tmp_path, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + WAIT_S
    while not lo_state(mixer_sim)[1]:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "LO never came on"
        threading.Event().wait(0.002)
    send_burst(proc.pid, signum, count)  # repeated signals must not cut the cleanup short
    stdout, stderr = proc.communicate(timeout=WAIT_S)
    assert proc.returncode == exit_code and "Traceback" not in stderr, stderr
    assert "RF off at source1, source2, lo (read back)" in stdout + stderr
    assert lo_state(mixer_sim) == (True, False)
    assert tone_sources_on(mixer_sim) == []


def test_the_analyzer_input_is_predicted_at_the_if(tmp_path):
    """mixer_bench: out loss 0.58 dB at the IF, 1.5 dB at the RF. A limit between the two
    predictions (tone 0 dBm: 0 + 3.01 - 6.5 - loss) refuses the plan by the IF one, before RF on."""
    bench = tmp_path / "bench.toml"
    bench.write_text(BENCH.read_text().replace("max_analyzer_input_dbm = 20.0", "max_analyzer_input_dbm = -4.5"))
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN.read_text().replace("tone_stop_dbm = -12.0", "tone_stop_dbm = 0.0"))
    result = invoke("run", plan, "--bench", bench, "--db", f"sqlite:///{tmp_path / 't.db'}")
    assert result.exit_code != 0
    assert "into the analyzer at the IF" in result.output and "max_analyzer_input_dbm is -4.50 dBm" in result.output


@pytest.mark.parametrize("bench_file, plan_edit, line", [
    (SAMPLE_RUNS / "sim_bench.toml", ("", ""), "the plan has a [mixer] table but the bench has no lo source"),
    (BENCH, ("lo_dbm = 7.0 ", "lo_dbm = 14.0 "), "[mixer] lo_dbm 14.00 dBm is above the bench limit max_lo_dbm 13.00 dBm"),
    (BENCH, ("lo_dbm = 7.0 ", "lo_levels_dbm = [7.0, 14.0, 1.0] "),
     "[mixer] lo_levels_dbm level 14.00 dBm is above the bench limit max_lo_dbm 13.00 dBm"),
    (BENCH, ("lo_dbm = 7.0 ", "lo_dbm = 7.0\nlo_levels_dbm = [7.0, 5.0] "), "give exactly one of lo_dbm"),
    (BENCH, ('injection = "low"', 'injection = "high"'), 'injection = "high" needs the LO above every RF product'),
])
def test_a_mixer_plan_is_refused_in_one_line_before_anything_is_connected(tmp_path, bench_file, plan_edit, line):
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN.read_text().replace(*plan_edit))
    result = invoke("run", "--dry-run", plan, "--bench", bench_file)
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and line in lines[0], result.output


def test_the_run_time_guard_also_predicts_the_analyzer_input_at_the_if():
    """Every tone power command on a mixer plan: the common guard (output loss at the RF tone,
    1.5 dB) and the IF one (smallest loss at the plan's IF tones, 0.58 dB) both apply."""
    from types import SimpleNamespace

    from tonebench.config.plan_file import load_plan
    from tonebench.instruments.scpi import LimitError
    from tonebench.plan.limits import power_guard
    from tonebench.plan.points import expand
    from tonebench.run.calibration_choice import offsets_from_bench
    from tonebench.run.mixer_run import tighten_power_guards

    bench = load_bench(BENCH)
    limits = bench.settings.limits.model_copy(update={"max_analyzer_input_dbm": -4.5})
    tables = offsets_from_bench(bench)
    plan = load_plan(PLAN).settings
    sources = [SimpleNamespace(power_guard=power_guard(tables, limits, None)) for _ in range(2)]
    instruments = SimpleNamespace(sources=lambda: sources)
    in1_db = tables["in1"].loss_db(2.449e9)
    sources[0].power_guard("source1", 2.449e9, in1_db)  # 0 dBm at the plane: -4.99 dBm by the RF loss
    tighten_power_guards(instruments, expand(plan), plan.mixer, limits, tables, None)
    with pytest.raises(LimitError, match=r"-4.07 dBm into the analyzer at the IF"):
        sources[0].power_guard("source1", 2.449e9, in1_db)
    sources[0].power_guard("source1", 2.449e9, in1_db - 1.0)  # 1 dB lower passes both


def test_a_mixer_run_is_analyzed_again_but_not_re_referred_to_another_set(tmp_path):
    db, _ = run_plan(tmp_path, PLAN.read_text())
    before = find_json(db)[0]["iip3_dbm"]
    guid = find_json(db)[0]["run_guid"]
    again = invoke("analyze", guid, "--db", db)
    assert again.exit_code == 0, again.output
    assert find_json(db)[0]["iip3_dbm"] == pytest.approx(before, abs=1e-9)
    refused = invoke("analyze", guid, "--cal", "any-set", "--db", db)
    assert refused.exit_code != 0
    assert "a mixer run (read at the IF) cannot be re-referred to another calibration set yet" in refused.output


def test_a_killed_lo_stepped_run_resumes_at_the_lo_level_it_was_on(tmp_path):
    """SIGKILL once the second LO level has begun; resume measures every remaining point once, at
    the LO level its key names, and the results per level still follow the model."""
    from stored_rows import count_points

    from tonebench.run.resume import resume_run

    lo_levels_dbm = [9.0, 7.0, 5.0, 3.0, 1.0]
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN.read_text().replace("lo_dbm = 7.0 ", f"lo_levels_dbm = {lo_levels_dbm!r} ")
                    .replace("tone_start_dbm = -24.0", "tone_start_dbm = -39.0")
                    .replace("rbw_hz = 100.0", "rbw_hz = 10.0"))
    db_path = tmp_path / "t.db"
    process = subprocess.Popen([sys.executable, "-m", "tonebench", "run", str(plan), "--bench", str(BENCH),
                                "--db", f"sqlite:///{db_path}", "--report", str(tmp_path / "first.html")],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + WAIT_S
    try:
        while count_points(db_path) < 12:  # 10 points per LO level
            assert process.poll() is None, "the run ended before it could be killed"
            assert time.monotonic() < deadline, "the run did not get far enough"
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
    finally:
        process.wait(30)
    engine = create_engine(f"sqlite:///{db_path}")
    with Session(engine) as session:
        guid = session.scalars(select(Run.guid)).one()
        stored_at_kill = session.scalars(select(Point.point_key)).all()
    engine.dispose()
    assert 12 <= len(stored_at_kill) < 50
    outcome = resume_run(guid[:8], f"sqlite:///{db_path}", report_path=tmp_path / "r.html")
    assert outcome.status == "complete"
    engine = create_engine(f"sqlite:///{db_path}")
    with Session(engine) as session:
        points = session.scalars(select(Point)).all()
    engine.dispose()
    keys = [p.point_key for p in points]
    assert len(keys) == len(set(keys)) == 50
    assert all(p.point_key.startswith(f"lo{p.lo_dbm:+.2f}dBm/") for p in points)
    measured = {row["lo_dbm"]: row["iip3_dbm"] for row in find_json(f"sqlite:///{db_path}")}
    assert sorted(measured) == sorted(lo_levels_dbm)
    for lo_dbm, iip3_dbm in measured.items():
        assert iip3_dbm == pytest.approx(true_iip3_dbm(lo_dbm), abs=IIP3_AGAINST_LO_TOLERANCE_DB), lo_dbm
