"""The bench-time estimate (run/bench_time.py): counted by hand on a small plan, and within 10 %
of the simulated bench's own virtual clock (sweeps, source settling, chamber) for the sample
plans; stored with the run beside what it took; `run --dry-run` prints it with each point's
settings and connects and writes nothing; `queue add` prints it."""

from __future__ import annotations

import json

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.instruments.open_bench import role_dialects
from tonebench.plan.points import expand
from tonebench.run.bench_time import estimate_bench_time, sweeps_per_point
from tonebench.run.start import execute_run
from tonebench.store.models import Point, Run
from tonebench.units import format_duration


def test_sweeps_counted_by_hand():
    """demo_plan: 3 centres x 17 tone powers; each point 4 reads, the two top powers of each
    sweep 2 more (the step check), each sweep's first point 2 more (the settle check)."""
    plan = load_plan(SAMPLE_RUNS / "demo_plan.toml").settings
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml").settings
    points = expand(plan)
    counts = sweeps_per_point(points, plan, points)
    assert sum(t for t, _ in counts) == 51 * 2 + 3 * 2  # the tones, and again at each sweep's first point
    assert sum(p for _, p in counts) == 51 * 2 + 3 * 2 * 2  # the products, and again at the top two powers
    estimate = estimate_bench_time(points, plan, bench, role_dialects(bench))
    # 2.5 * span / RBW^2 (generic-analyzer k), span 10 RBW at the plan's RBW; 5 ms per point: both
    # sources are set, then each *OPC? waited for, so they settle at the same time.
    rbw_hz, span_hz = plan.analyzer.rbw_hz, plan.analyzer.effective_span_hz
    assert estimate.sweep_time_s == pytest.approx(2.5 * span_hz / rbw_hz ** 2)
    assert estimate.total_s == pytest.approx(222 * estimate.sweep_time_s + 51 * 0.005)
    done = frozenset(p.key for p in points[:17])  # a resumed run: the first sweep done
    assert estimate_bench_time(points, plan, bench, role_dialects(bench), done).sweeps == 222 - (17 * 4 + 4 + 2)


def test_a_trace_average_multiplies_the_sweep_time():
    plan = load_plan(SAMPLE_RUNS / "demo_plan.toml").settings
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml").settings
    points = expand(plan)
    single = estimate_bench_time(points, plan, bench, role_dialects(bench))
    averaged_plan = plan.model_copy(update={"analyzer": plan.analyzer.model_copy(update={"average_count": 8})})
    averaged = estimate_bench_time(points, averaged_plan, bench, role_dialects(bench))
    assert averaged.total_s - single.total_s == pytest.approx(7 * 222 * single.sweep_time_s)


@pytest.mark.parametrize("plan, bench", [("demo_plan.toml", "sim_bench.toml"), ("bias_plan.toml", "bias_bench.toml"),
                                         ("bias_temperature_plan.toml", "bias_chamber_bench.toml")])
def test_the_estimate_is_within_ten_percent_of_the_simulated_bench_time(tmp_path, plan, bench):
    sims, estimates = [], []
    db_url = f"sqlite:///{tmp_path / 'tb.db'}"
    outcome = execute_run(SAMPLE_RUNS / plan, SAMPLE_RUNS / bench, db_url, None, on_sim_started=sims.append,
                          on_estimate=estimates.append)
    assert outcome.status == "complete", outcome.reason
    virtual_s = sims[0].bench.clock_s
    assert outcome.bench_time.clock == "virtual"
    assert outcome.bench_time.taken_s == pytest.approx(virtual_s, rel=0.01)
    assert estimates[0].total_s == pytest.approx(virtual_s, rel=0.10)
    with Session(create_engine(db_url)) as session:
        metadata = session.scalars(select(Run)).one().metadata_json
    assert metadata["bench_time_estimate"]["total_s"] == estimates[0].total_s
    assert metadata["bench_time_s"] == outcome.bench_time.taken_s and metadata["bench_time_clock"] == "virtual"


def test_a_video_filter_under_the_rbw_is_in_the_estimate_and_the_dry_run(tmp_path):
    """VBW a fifth of the RBW: each sweep takes k * span / (RBW * VBW), five times the sweep at
    VBW = RBW (a video filter settles RBW/VBW times slower; common practice, from memory). The
    simulated analyzer slows the same way (tests/sim/test_video_filter.py), so an estimate that
    left the VBW out would fall about five times short of its clock."""
    plan = tmp_path / "plan.toml"
    plan.write_text((SAMPLE_RUNS / "demo_plan.toml").read_text().replace("rbw_hz = 1000.0",
                                                                         "rbw_hz = 1000.0\nvbw_hz = 200.0"))
    settings, bench = load_plan(plan).settings, load_bench(SAMPLE_RUNS / "sim_bench.toml").settings
    estimate = estimate_bench_time(expand(settings), settings, bench, role_dialects(bench))
    assert estimate.sweep_time_s == pytest.approx(2.5 * 10e3 / (1e3 * 200.0))
    sims, estimates = [], []
    outcome = execute_run(plan, SAMPLE_RUNS / "sim_bench.toml", f"sqlite:///{tmp_path / 'tb.db'}", None,
                          on_sim_started=sims.append, on_estimate=estimates.append)
    assert outcome.status == "complete", outcome.reason
    assert estimates[0].total_s == pytest.approx(sims[0].bench.clock_s, rel=0.10)
    with Session(create_engine(f"sqlite:///{tmp_path / 'tb.db'}")) as session:
        assert {p.vbw_hz for p in session.scalars(select(Point))} == {200.0}
    shown = invoke("run", plan, "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", tmp_path / "dry.db", "--dry-run")
    assert shown.exit_code == 0, shown.output
    assert "1000, VBW 200 " in shown.output and "0.75 s" in shown.output, shown.output  # 6 sweeps of 125 ms


def test_both_sources_settle_at_the_same_time(tmp_path):
    """Per point source 1 takes its power (its RF state read on the line says it did), source 2
    is set and waited for, then source 1's *OPC?: on the simulator's virtual clock the two 5 ms
    settlings overlap, so a point's tones cost 5 ms, not 10."""
    sims = []
    outcome = execute_run(SAMPLE_RUNS / "demo_plan.toml", SAMPLE_RUNS / "sim_bench.toml",
                          f"sqlite:///{tmp_path / 'tb.db'}", None, on_sim_started=sims.append)
    assert outcome.status == "complete", outcome.reason
    log = [entry for entry in sims[0].bench.command_log if entry[1] != "analyzer"]
    firsts = [i for i, (_, role, line) in enumerate(log) if role == "source1" and line.startswith("SOUR:POW")]
    assert len(firsts) == 51
    # The points that change power only (a sweep's first point also sets the frequencies).
    power_only = [first for first in firsts if log[first + 2][2].startswith("SOUR:POW")]
    assert len(power_only) == 51 - 3
    for first in power_only:
        start_s = log[first][0]
        lines = [(role, line) for _, role, line in log[first:first + 7]]
        assert lines[:7] == [("source1", lines[0][1]), ("source1", "OUTP?"), ("source2", lines[2][1]),
                             ("source2", "*OPC?"), ("source2", "SYST:ERR?"), ("source1", "*OPC?"),
                             ("source1", "SYST:ERR?")], lines
        assert lines[2][1].startswith("SOUR:POW")
        assert log[first + 6][0] - start_s == pytest.approx(0.005)  # both waits over after 5 ms


def test_dry_run_prints_settings_and_estimate_and_touches_nothing(tmp_path):
    db = tmp_path / "tb.db"
    result = invoke("run", SAMPLE_RUNS / "demo_plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", db,
                    "--dry-run")
    assert result.exit_code == 0, result.output
    assert "2.4 GHz, spacing 1 MHz, -40.00 dBm per tone" in result.output
    assert "bench time estimate: 5.8 s for 51 points (222 sweeps of 25 ms" in result.output
    assert "nothing connected, nothing switched on, nothing written" in result.output
    assert not db.exists()
    bad = invoke("run", SAMPLE_RUNS / "demo_plan.toml", "--bench", SAMPLE_RUNS / "nope.toml", "--db", db, "--dry-run")
    assert bad.exit_code == 2 and len(bad.output.strip().splitlines()) == 1 and not db.exists()


def test_queue_add_says_the_bench_time(tmp_path):
    result = invoke("queue", "add", SAMPLE_RUNS / "demo_plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml",
                    "--db", tmp_path / "tb.db")
    assert result.exit_code == 0, result.output
    assert "bench time estimate: 5.8 s for 51 points" in result.output


@pytest.mark.parametrize("seconds, text", [(0.025, "25 ms"), (7.234, "7.23 s"), (725.0, "12 min 5 s"),
                                           (3600.0, "1 h"), (12000.0, "3 h 20 min")])
def test_durations_read_as_one_would_say_them(seconds, text):
    assert format_duration(seconds) == text


def test_a_chamber_ramp_adds_the_way_there(tmp_path):
    plan = load_plan(SAMPLE_RUNS / "bias_temperature_plan.toml").settings
    bench = load_bench(SAMPLE_RUNS / "bias_chamber_bench.toml").settings
    points = expand(plan)
    estimate = estimate_bench_time(points, plan, bench, role_dialects(bench))
    # From 23 degC to -20, 25 and 85 degC: 43 + 45 + 60 degC at 5.4 degC/min, and three dwells of 300 s.
    assert estimate.soak_s == pytest.approx(60 * 148 / 5.4 + 3 * 300)
    assert json.dumps(estimate.as_dict())  # stored with the run as JSON


def test_tones_read_wider_take_less_bench_time_and_give_the_same_intercepts(tmp_path):
    """`[analyzer] tone_rbw_hz`: the tones at 30 kHz (span 300 kHz, under the 1 MHz spacing) and
    the products at the plan's 1 kHz. A tone is a line far over the noise: its reading does not
    depend on the RBW, the sweep time falls with it (k * 10 / RBW). Same seed, same device."""
    text = (SAMPLE_RUNS / "demo_plan.toml").read_text()
    wide = tmp_path / "wide.toml"
    wide.write_text(text.replace("rbw_hz = 1000.0", "rbw_hz = 1000.0\ntone_rbw_hz = 30000.0", 1))
    outcomes = {}
    for name, plan in (("plan", SAMPLE_RUNS / "demo_plan.toml"), ("wide", wide)):
        estimates = []
        outcomes[name] = (execute_run(plan, SAMPLE_RUNS / "sim_bench.toml", f"sqlite:///{tmp_path / name}.db", None,
                                      on_estimate=estimates.append), estimates[0])
    (plan_run, _), (wide_run, wide_estimate) = outcomes["plan"], outcomes["wide"]
    for a, b in zip(sorted(plan_run.results, key=lambda r: r.center_hz), sorted(wide_run.results, key=lambda r: r.center_hz)):
        assert b.iip3_dbm == pytest.approx(a.iip3_dbm, abs=0.05)
    assert wide_run.bench_time.taken_s < 0.6 * plan_run.bench_time.taken_s
    assert wide_estimate.total_s == pytest.approx(wide_run.bench_time.taken_s, rel=0.10)
    with Session(create_engine(f"sqlite:///{tmp_path / 'wide'}.db")) as session:
        assert {p.extra_json["tone_rbw_hz"] for p in session.scalars(select(Point))} == {30000.0}
    too_wide = tmp_path / "too_wide.toml"
    too_wide.write_text(text.replace("rbw_hz = 1000.0", "rbw_hz = 1000.0\ntone_rbw_hz = 100000.0", 1))
    refused = invoke("run", too_wide, "--bench", SAMPLE_RUNS / "sim_bench.toml", "--dry-run")
    assert refused.exit_code == 2 and "tone_rbw_hz 100000 Hz: its span (ten of it) must be narrower" in refused.output
