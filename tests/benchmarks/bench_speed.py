"""Speed figures of tonebench, printed (not asserted: timings belong to a benchmark, not a test).

    python tests/benchmarks/bench_speed.py            # about a minute on two cores

1. Bench time of the demo plan (51 points, three frequencies) on the simulated bench's virtual
   clock: tonebench as it runs, its own estimate, a floor for its fixed settings (four reads per
   point and nothing else), and a hand-written script that reads all four products in one wide
   span at a fixed 1 kHz RBW (the common way; the same signal-to-noise for the products needs the
   same RBW, but the span must hold both tones and both products).
2. Wall time per point: `tonebench run` against a raw pyvisa loop sending the same reads (both
   sources set, four single sweeps with markers) to the same simulated bench.
3. Points committed per second into SQLite (one plain transaction per point, WAL, synchronous=NORMAL).
4. Re-analysis time of one stored run (`analyze_run`), best of five.
5. Import time of the command line.
"""

from __future__ import annotations

import dataclasses
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pyvisa
from sqlalchemy import select

ROOT = Path(__file__).resolve().parents[2]
SAMPLE_RUNS = ROOT / "sample_runs"
PLAN, BENCH = SAMPLE_RUNS / "demo_plan.toml", SAMPLE_RUNS / "sim_bench.toml"
ACCURACY_PLAN = SAMPLE_RUNS / "accuracy_plan.toml"


def run_tonebench(folder: Path, plan: Path = PLAN, name: str = "bench", bench: Path = BENCH):
    from tonebench.run.start import execute_run

    sims, estimates = [], []
    started_s = time.perf_counter()
    outcome = execute_run(plan, bench, f"sqlite:///{folder / name}.db", folder / f"{name}.html",
                          on_sim_started=sims.append, on_estimate=estimates.append)
    return outcome, sims[0], estimates[0], time.perf_counter() - started_s


def one_line_bench(folder: Path) -> Path:
    """The sample bench with dialects that join each step's operations on one line ([io] one_line)."""
    from tonebench.packaged import data_dir

    text = BENCH.read_text()
    for name in ("generic-source", "generic-analyzer"):
        path = folder / f"{name}-one-line.toml"
        path.write_text((data_dir("drivers") / f"{name}.toml").read_text().replace("[io]\n", "[io]\none_line = true\n", 1))
        text = text.replace(f'dialect = "{name}"', f'dialect = "{path}"')
    bench = folder / "one-line-bench.toml"
    bench.write_text(text)
    return bench


def physical_bound_s(db_url: str, plan_path: Path, settlings: int = 1) -> float:
    """The least bench time for the accuracy the plan asks, knowing every product's level and
    noise (the run's own noise-corrected readings and noise markers, per hertz): per point each
    product at the continuous RBW that gives it exactly the target over that noise,
    no wider than ten RBWs inside the spacing and no narrower than the budget pays for two sweeps;
    the tones at the widest; four reads or one sweep holding all four at the narrowest RBW,
    whichever is shorter; the sources' settling, both at once (settlings=2: one after the other,
    the bound before tonebench settled them at once). No step or settle checks."""
    import math

    from tonebench.analysis.sweep_fit import noise_corrected_dbm
    from tonebench.config.bench_file import load_bench
    from tonebench.config.plan_file import load_plan
    from tonebench.instruments.open_bench import role_dialects
    from tonebench.run.bench_time import sweep_time_factor
    from tonebench.run.read_settings import SPAN_RBWS, target_snr_db
    from tonebench.store.database import open_database, session_factory
    from tonebench.store.models import Point

    plan, bench = load_plan(plan_path).settings, load_bench(BENCH).settings
    dialect = role_dialects(bench)["analyzer"]
    k = sweep_time_factor(bench, dialect)
    target_db = target_snr_db(plan.analyzer)
    budget_s = plan.analyzer.narrowing_budget_s
    floor_hz = 2 * k * SPAN_RBWS / budget_s if budget_s else plan.analyzer.rbw_hz
    total_s = 0.0
    with session_factory(open_database(db_url))() as session:
        points = session.scalars(select(Point).where(Point.status == "measured")).all()
    for p in points:
        widest_hz = p.spacing_hz / SPAN_RBWS
        rbws_hz = []
        read_rbw_hz = p.extra_json.get("im3_rbw_hz", p.rbw_hz)
        for reading, noise in ((p.raw_lower_dbm, p.raw_noise_lower_dbm), (p.raw_upper_dbm, p.raw_noise_upper_dbm)):
            product_dbm = float(noise_corrected_dbm(reading, noise)[0])
            noise_1hz_dbm = noise - 10 * math.log10(read_rbw_hz)
            rbws_hz.append(min(max(10 ** ((product_dbm - noise_1hz_dbm - target_db) / 10), floor_hz), widest_hz))
        four_s = 2 * k * SPAN_RBWS / widest_hz + sum(k * SPAN_RBWS / rbw for rbw in rbws_hz)
        narrowest_hz = min(rbws_hz)
        one_s = k * (3 * p.spacing_hz + SPAN_RBWS * narrowest_hz) / narrowest_hz ** 2
        total_s += min(four_s, one_s) + settlings * 0.005  # 1: both sources settling at the same time
    assert math.isfinite(total_s)
    return total_s


def raw_loop(points, wide_span: bool, status: bool = False) -> tuple[float, float]:
    """(virtual bench s, wall s) of a plain pyvisa loop: per point both sources set, then either
    four narrow reads at the plan's RBW (the same reads tonebench makes) or one wide sweep at
    1 kHz RBW holding all four products (the hand-written script).

    status: the loop makes tonebench's reads and asks what it asks for safety, joined with ';'
    onto the queries it makes anyway (as `[io] one_line` does): the noise marker beside each IM3
    product (a measurement, not safety: the bare loop leaves it out), each source's error queue
    with its *OPC?, each read's status, sweep time and error queue with its last marker, and per
    point each source's event status and RF state (the lost-state check: two round trips the bare
    loop does not make). Not made: tonebench's settle confirmation and its commit."""
    from tonebench.config.bench_file import load_bench
    from tonebench.config.plan_file import load_plan
    from tonebench.instruments.transport import disable_nagle
    from tonebench.plan.limits import predict_levels
    from tonebench.run.calibration_choice import offsets_from_bench
    from tonebench.sim.launch import start_sim_bench

    bench, plan = load_bench(BENCH), load_plan(PLAN).settings
    offsets = offsets_from_bench(bench)
    manager = pyvisa.ResourceManager("@py")
    with start_sim_bench(bench.scenario) as sim:
        handles = {role: manager.open_resource(sim.resources[role], read_termination="\n", write_termination="\n")
                   for role in ("source1", "source2", "analyzer")}
        for handle in handles.values():
            disable_nagle(handle)  # as tonebench does: no 40 ms delayed-ACK wait per query
        analyzer = handles["analyzer"]
        rbw_hz = 1e3 if wide_span else plan.analyzer.rbw_hz
        analyzer.write("INIT:CONT OFF")
        analyzer.write(f"BAND {rbw_hz:.3f}")
        analyzer.write(f"INP:ATT {plan.analyzer.atten_db:.1f}")
        for role in ("source1", "source2"):
            handles[role].write("OUTP ON")
        started_s, clock_s = time.perf_counter(), sim.bench.clock_s
        for point in points:
            levels = predict_levels(point, offsets, bench.settings.limits)
            for role, freq_hz, power_dbm in (("source1", point.f1_hz, levels.source1_dbm),
                                             ("source2", point.f2_hz, levels.source2_dbm)):
                handles[role].write(f"SOUR:FREQ {freq_hz:.3f}")
                handles[role].write(f"SOUR:POW {power_dbm:.2f}")
                handles[role].query("*OPC?;:SYST:ERR?" if status else "*OPC?")
            if wide_span:
                reads = [(point.center_hz, 4 * point.spacing_hz,
                          (point.lower_hz, point.f1_hz, point.f2_hz, point.upper_hz))]
            else:
                reads = [(freq_hz, 10 * rbw_hz, (freq_hz,)) for freq_hz in (point.f1_hz, point.f2_hz, point.lower_hz,
                                                                             point.upper_hz)]
                if status:  # the noise beside each product, on the side away from the tones
                    off_hz = plan.analyzer.noise_offset_hz
                    reads[2:] = [(point.lower_hz, 10 * rbw_hz, (point.lower_hz, point.lower_hz - off_hz)),
                                 (point.upper_hz, 10 * rbw_hz, (point.upper_hz, point.upper_hz + off_hz))]
            for center_hz, span_hz, markers_hz in reads:
                analyzer.write(f"FREQ:SPAN {span_hz:.3f}")
                analyzer.write(f"FREQ:CENT {center_hz:.3f}")
                analyzer.write("INIT:IMM")
                analyzer.query("*OPC?")
                for marker_hz in markers_hz:
                    analyzer.write(f"CALC:MARK1:X {marker_hz:.3f}")
                    if status and marker_hz == markers_hz[-1]:
                        float(analyzer.query("STAT:QUES:COND?;:CALC:MARK1:Y?;:SWE:TIME?;:SYST:ERR?").split(";")[1])
                    else:
                        float(analyzer.query("CALC:MARK1:Y?"))
            if status:
                for role in ("source1", "source2"):
                    handles[role].query("*ESR?;:OUTP?")
        wall_s, virtual_s = time.perf_counter() - started_s, sim.bench.clock_s - clock_s
        for role in ("source1", "source2"):
            handles[role].write("OUTP OFF")
        for handle in handles.values():
            handle.close()
    return virtual_s, wall_s


def commits_per_second(db_url: str, count: int = 2000) -> float:
    from tonebench.store.database import open_database, session_factory
    from tonebench.store.models import Point, Run
    from tonebench.store.point_record import PointRecord
    from tonebench.store.point_writer import store_point

    sessions = session_factory(open_database(db_url))
    with sessions() as session:
        run = session.scalars(select(Run)).first()
        template = session.scalars(select(Point).where(Point.run_id == run.id, Point.status == "measured")).first()
        values = {f.name: getattr(template, f.name) for f in dataclasses.fields(PointRecord) if hasattr(template, f.name)}
    started_s = time.perf_counter()
    for n in range(count):
        store_point(sessions, run.id, PointRecord(**{**values, "point_key": f"bench/{n}", "seq": 10_000 + n}))
    return count / (time.perf_counter() - started_s)


def loop_ms_per_point(db_url: str) -> float:
    """From the stored points' commit times: the sequencer's own rate, set-up and report left out."""
    from tonebench.store.database import open_database, session_factory
    from tonebench.store.models import Point

    with session_factory(open_database(db_url))() as session:
        times = sorted(session.scalars(select(Point.measured_at)))
    return 1e3 * (times[-1] - times[0]).total_seconds() / (len(times) - 1)


def reanalysis_s(db_url: str, guid: str) -> float:
    from tonebench.results.stored_results import analyze_run
    from tonebench.store.database import open_database, session_factory

    sessions = session_factory(open_database(db_url))
    times = []
    for _ in range(5):
        started_s = time.perf_counter()
        analyze_run(sessions, guid)
        times.append(time.perf_counter() - started_s)
    return min(times)


def import_s() -> float:
    code = "import time; t = time.perf_counter(); import tonebench.cli.main; print(time.perf_counter() - t)"
    return min(float(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout)
               for _ in range(3))


def main() -> None:
    from tonebench.config.plan_file import load_plan
    from tonebench.plan.points import expand
    from tonebench.run.bench_time import sweep_time_s
    from tonebench.config.bench_file import load_bench
    from tonebench.instruments.open_bench import role_dialects

    points = expand(load_plan(PLAN).settings)
    with tempfile.TemporaryDirectory() as folder:
        outcome, sim, estimate, run_wall_s = run_tonebench(Path(folder))
        lines = len(sim.bench.command_log)
        raw_virtual_s, raw_wall_s = raw_loop(points, wide_span=False)
        _, status_wall_s = raw_loop(points, wide_span=False, status=True)
        script_virtual_s, _ = raw_loop(points, wide_span=True)
        plan, bench = load_plan(PLAN).settings, load_bench(BENCH).settings
        floor_s = len(points) * (4 * sweep_time_s(plan, bench, role_dialects(bench)["analyzer"]) + 0.005)
        db_url = f"sqlite:///{Path(folder) / 'bench'}.db"
        print(f"demo plan, {len(points)} points, simulated bench (virtual clock = the instruments' own time)")
        print(f"  bench time  tonebench {outcome.bench_time.taken_s:8.2f} s   estimate {estimate.total_s:8.2f} s")
        print(f"              four reads per point, nothing else {floor_s:8.2f} s (tonebench / this: "
              f"{outcome.bench_time.taken_s / floor_s:.2f})")
        print(f"              one wide span at 1 kHz RBW (hand-written script) {script_virtual_s:8.1f} s "
              f"({script_virtual_s / outcome.bench_time.taken_s:.0f} x tonebench)")
        accurate, _, accurate_estimate, _ = run_tonebench(Path(folder), ACCURACY_PLAN, "accuracy")
        bound_s = physical_bound_s(f"sqlite:///{Path(folder) / 'accuracy'}.db", ACCURACY_PLAN)
        apart_s = physical_bound_s(f"sqlite:///{Path(folder) / 'accuracy'}.db", ACCURACY_PLAN, settlings=2)
        print(f"  to accuracy (sample_runs/accuracy_plan.toml, 0.1 dB per point): tonebench "
              f"{accurate.bench_time.taken_s:6.2f} s, estimate {accurate_estimate.total_s:6.2f} s, "
              f"physical bound {bound_s:6.2f} s (tonebench / bound: {accurate.bench_time.taken_s / bound_s:.2f}; "
              f"{accurate.bench_time.taken_s / apart_s:.2f} against a bound settling the sources one after the other)")
        print(f"  commands    {lines / len(points):.1f} lines per point sent to the instruments")
        print(f"  wall time   tonebench {loop_ms_per_point(db_url):6.1f} ms per point in its loop "
              f"({1e3 * run_wall_s / len(points):.1f} ms with connecting, analysis and report); "
              f"raw pyvisa loop, four reads per point {1e3 * raw_wall_s / len(points):6.1f} ms "
              f"({1e3 * status_wall_s / len(points):.1f} ms with tonebench's noise markers, status and error queries)")
        _, joined_sim, _, _ = run_tonebench(Path(folder), PLAN, "one-line", one_line_bench(Path(folder)))
        joined_lines, joined_db = len(joined_sim.bench.command_log), f"sqlite:///{Path(folder) / 'one-line.db'}"
        joined_queries = sum("?" in line for _, _, line in joined_sim.bench.command_log)
        print(f"  one line    with [io] one_line: {joined_lines / len(points):.1f} lines per point "
              f"({joined_queries / len(points):.1f} round trips; the raw loop 10, with the status queries 12), "
              f"{loop_ms_per_point(joined_db):6.1f} ms per point in its loop")
        # Re-analysis first: the commit figure adds its points to the same run.
        print(f"  re-analysis {1e3 * reanalysis_s(db_url, outcome.guid):8.1f} ms per run ({len(points)} points)")
        print(f"  commits     {commits_per_second(db_url):8.0f} points per second into SQLite")
    print(f"  import      {import_s():8.2f} s for the command line")


if __name__ == "__main__":
    main()
