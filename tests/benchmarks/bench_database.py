"""Fill a database at lab scale and time it: bulk insert, typical queries, re-running the analysis.

    python tests/benchmarks/bench_database.py                      # SQLite and a temporary PostgreSQL
    python tests/benchmarks/bench_database.py --devices 500 --backend sqlite     # a quick look
    python tests/benchmarks/bench_database.py --skip-reanalysis   # insert, verdicts and queries only
    python tests/benchmarks/bench_database.py --pg-url postgresql+psycopg://user@host/empty_db
    python tests/benchmarks/bench_database.py --keep /tmp/tb-bench --skip-reanalysis  # build once, then
        # the same command again reuses the kept databases and only times the queries
    python tests/benchmarks/bench_database.py --reanalysis-runs            # re-analysis of 10,000 demo-size runs only
    python tests/benchmarks/bench_database.py --reanalysis-runs 2000 --run-size 200 --workers 1
    python tests/benchmarks/bench_database.py --reanalysis-runs 1000 --phases   # and where the time goes

With the defaults: 10,000 devices, one run each of 4 centers x 2 spacings x 25 tone steps, i.e.
2,000,000 points and 80,000 results. Each query kind prints wall-clock latency and this process's
CPU time (on SQLite all of the query's work; on PostgreSQL the server's is not in it): on a loaded
machine the wall clock's 95th percentile is mostly waiting for a core. Not a test: it prints figures. A temporary PostgreSQL server
is started in a temporary folder, as tests/conftest.py does, unless --pg-url names one (which
must hold an empty database: the benchmark writes into it).

--reanalysis-runs N stores N runs (one device each; default 10,000) of the demo plan's size (51
points: 3 centers x 17 tone steps, 1 MHz spacing) or, with --run-size 200, of the layout above
(200 points in 8 sweeps), and times only `analyze_runs` over all of them (what `analyze --all`
does), with --workers processes reading and assessing (default: one per core).
"""

from __future__ import annotations

import argparse
import contextlib
import glob
import os
import random
import shutil
import socket
import statistics
import subprocess
import tempfile
import time
from pathlib import Path

import sqlalchemy as sa

from tonebench.catalog.limits import add_limit, apply_verdicts
from tonebench.catalog.query import ResultFilter, find_results
from tonebench.catalog.synthetic import PARTS, TAGS, Layout, fill
from tonebench.results import batch_pool
from tonebench.results.stored_results import analyze_runs
from tonebench.store import open_database, session_factory
from tonebench.store.models import Device, Run

QUERY_REPEATS = 25
# The demo plan's size (sample_runs/demo_plan.toml): 3 centers, one spacing, -40 to -8 dBm in 2 dB steps.
DEMO_LAYOUT = Layout(centers_hz=(2.40e9, 2.45e9, 2.48e9), spacings_hz=(1.0e6,),
                     tones_dbm=tuple(float(t) for t in range(-40, -8 + 1, 2)))
RUN_SIZES = {"demo": DEMO_LAYOUT, "200": Layout()}


@contextlib.contextmanager
def temporary_postgres(keep: str | None = None):
    """URL of a database on a PostgreSQL server started in a folder: a temporary one (empty), or
    `keep`, whose data folder is created on the first call and reused (and left) afterwards."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    bin_dir = os.path.dirname(found[-1]) if found else os.path.dirname(shutil.which("initdb") or "")
    if not bin_dir:
        raise SystemExit("PostgreSQL server binaries not found (apt-get install postgresql)")
    as_user = ["runuser", "-u", "postgres", "--"] if os.geteuid() == 0 else []
    folder = os.path.join(keep, "pg") if keep else tempfile.mkdtemp(prefix="tonebench-bench-pg-")
    os.makedirs(folder, exist_ok=True)
    os.chmod(folder, 0o777)
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
    data = os.path.join(folder, "data")
    if not os.path.isdir(data):
        subprocess.run([*as_user, f"{bin_dir}/initdb", "-D", data, "-U", "postgres", "--auth=trust", "-E", "UTF8"],
                       check=True, capture_output=True)
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = str(probe.getsockname()[1])
    subprocess.run([*as_user, f"{bin_dir}/pg_ctl", "-D", data, "-w", "-l", os.path.join(folder, "log"), "-o",
                    f"-k {folder} -p {port} -c listen_addresses=''", "start"], check=True, capture_output=True)
    try:
        yield f"postgresql+psycopg://postgres@/postgres?host={folder}&port={port}"
    finally:
        subprocess.run([*as_user, f"{bin_dir}/pg_ctl", "-D", data, "-m", "fast", "stop"], capture_output=True)
        if not keep:
            shutil.rmtree(folder, ignore_errors=True)


def typical_filters(engine: sa.Engine, rng: random.Random) -> dict[str, list[ResultFilter]]:
    """Each kind of question a user asks, with values drawn from the data."""
    with engine.connect() as connection:
        lots = sorted(connection.scalars(sa.select(Device.lot).distinct()))
        wafers = sorted(connection.scalars(sa.select(Device.wafer).distinct()))
        serials = connection.scalars(sa.select(Device.serial).order_by(Device.id)).all()
        first, last = connection.execute(sa.select(sa.func.min(Run.started_at), sa.func.max(Run.started_at))).one()
    parts = [p[0] for p in PARTS]
    span = last - first

    def window():
        start = first + span * rng.random() * 0.9
        return start, start + span / 30  # about one day in thirty

    def n(make):
        return [make() for _ in range(QUERY_REPEATS)]

    return {
        "lot + 2.45 GHz + verdict fail": n(lambda: ResultFilter(lots=(rng.choice(lots),), freq_min_hz=2.44e9,
                                                                freq_max_hz=2.46e9, verdicts=("fail",))),
        "part + wafer + spacing range": n(lambda: ResultFilter(parts=(rng.choice(parts),), wafers=(rng.choice(wafers),),
                                                               spacing_min_hz=5e5, spacing_max_hz=2e6)),
        "one serial": n(lambda: ResultFilter(serials=(rng.choice(serials),))),
        "part + flagged (any flag)": n(lambda: ResultFilter(parts=(rng.choice(parts),), lots=(rng.choice(lots),),
                                                            flagged=True)),
        "lot + one flag": n(lambda: ResultFilter(lots=(rng.choice(lots),), flags=("analyzer-limited",))),
        "tag + date window": n(lambda: ResultFilter(tags=(rng.choice(TAGS),), since=(w := window())[0], until=w[1])),
        "date window only": n(lambda: ResultFilter(since=(w := window())[0], until=w[1])),
    }


def time_queries(engine: sa.Engine) -> None:
    rng = random.Random(3)
    sessions = session_factory(engine)
    for name, filters in typical_filters(engine, rng).items():
        durations_s, cpu_s, counts = [], [], []
        with sessions() as session:
            for flt in filters:
                started_s, started_cpu_s = time.perf_counter(), time.process_time()
                counts.append(len(find_results(session, flt)))
                durations_s.append(time.perf_counter() - started_s)
                cpu_s.append(time.process_time() - started_cpu_s)
        durations_s.sort()
        p95 = durations_s[min(len(durations_s) - 1, int(round(0.95 * (len(durations_s) - 1))))]
        print(f"  query {name:32} median {statistics.median(durations_s) * 1e3:8.1f} ms, "
              f"95th percentile {p95 * 1e3:8.1f} ms, median {statistics.median(counts):.0f} results "
              f"(this process's CPU: median {statistics.median(cpu_s) * 1e3:.1f} ms)", flush=True)


def database_size(engine: sa.Engine) -> str:
    if engine.dialect.name == "sqlite":
        path = Path(engine.url.database)
        size = sum(p.stat().st_size for p in path.parent.glob(path.name + "*"))
    else:
        with engine.connect() as connection:
            size = connection.scalar(sa.text("SELECT pg_database_size(current_database())"))
    return f"{size / 2**20:.0f} MiB"


def is_filled(engine: sa.Engine) -> bool:
    with engine.connect() as connection:
        return connection.scalar(sa.select(sa.func.count(Run.id))) > 0


def bench(url: str, n_devices: int, label: str, reanalyze: bool = True) -> None:
    print(f"{label}: {n_devices} devices", flush=True)
    engine = open_database(url)
    if is_filled(engine):  # a kept database: time its queries as it is
        with engine.connect() as connection:
            n_runs = connection.scalar(sa.select(sa.func.count(Run.id)))
        print(f"  reusing the kept database ({n_runs} runs, {database_size(engine)}); no insert", flush=True)
        time_queries(engine)
        engine.dispose()
        return
    started_s = time.perf_counter()
    summary = fill(engine, n_devices, seed=1, n_lots=max(4, n_devices // 250), batch_devices=100)
    insert_s = time.perf_counter() - started_s
    print(f"  insert: {summary.devices} devices, {summary.runs} runs, {summary.points} points, "
          f"{summary.results} results in {insert_s:.1f} s ({summary.points / insert_s:,.0f} points/s); "
          f"database {database_size(engine)}", flush=True)

    sessions = session_factory(engine)
    with sessions.begin() as session:
        for part, _, iip3_dbm, gain_db, _ in PARTS:
            add_limit(session, part, "iip3_dbm", min_value=iip3_dbm - 1.0, freq_min_hz=2.3e9, freq_max_hz=2.6e9)
            add_limit(session, part, "gain_db", min_value=gain_db - 1.0, max_value=gain_db + 1.0,
                      freq_min_hz=2.3e9, freq_max_hz=2.6e9, spacing_max_hz=2e6)
        started_s = time.perf_counter()
        counts = apply_verdicts(session)
    print(f"  verdicts over all results: {time.perf_counter() - started_s:.1f} s ({dict(counts)})", flush=True)

    time_queries(engine)
    if not reanalyze:
        engine.dispose()
        return

    with engine.connect() as connection:
        guids = connection.scalars(sa.select(Run.guid).order_by(Run.id)).all()
    started_s = time.perf_counter()
    analyze_runs(sessions, guids)
    analysis_s = time.perf_counter() - started_s
    with sessions.begin() as session:
        started_verdicts_s = time.perf_counter()
        apply_verdicts(session)
        verdicts_s = time.perf_counter() - started_verdicts_s
    print(f"  re-analysis of all {len(guids)} runs in one process (analyze_runs): {analysis_s:.1f} s ({analysis_s / len(guids) * 1e3:.1f} ms per run), "
          f"then verdicts {verdicts_s:.1f} s", flush=True)
    engine.dispose()


def bench_reanalysis(url: str, n_runs: int, layout: Layout, workers: int, label: str, phases: bool = False) -> None:
    """Time analyze_runs over n_runs stored synthetic runs (their first re-analysis)."""
    engine = open_database(url)
    started_s = time.perf_counter()
    summary = fill(engine, n_runs, seed=1, layout=layout, n_lots=max(4, n_runs // 250), batch_devices=200)
    print(f"{label}: {summary.runs} runs of {layout.points_per_run} points "
          f"({summary.results // max(summary.runs, 1)} sweeps each) stored in {time.perf_counter() - started_s:.1f} s",
          flush=True)
    with engine.connect() as connection:
        guids = connection.scalars(sa.select(Run.guid).order_by(Run.id)).all()
    batch_pool.WORKERS = workers
    started_s = time.perf_counter()
    stored = analyze_runs(session_factory(engine), guids)
    taken_s = time.perf_counter() - started_s
    print(f"  re-analysis (analyze_runs, {workers} worker{'s' if workers > 1 else ''}): {len(guids)} runs, "
          f"{stored} results in {taken_s:.1f} s: {len(guids) / taken_s:,.0f} runs/s, "
          f"{taken_s / len(guids) * 1e3:.2f} ms per run", flush=True)
    if phases:
        reanalysis_phases(engine, guids)
    engine.dispose()


def reanalysis_phases(engine: sa.Engine, guids: list[str]) -> None:
    """Where the time of a re-analysis goes: all of it in this process, CPU seconds per step."""
    from tonebench.results import stored_results

    spent_s: dict[str, float] = {}
    steps = {"read points, build arrays": "batch_sweeps", "assess": "assess_sweeps",
             "result rows": "_result_values", "delete old rows": "_forget_analysis",
             "verdicts": "apply_verdicts", "write (delete, insert, verdicts)": "_store_batch"}
    originals = {name: getattr(stored_results, name) for name in steps.values()}

    def timed(label, function):
        def run(*args, **kwargs):
            started_s = time.process_time()
            try:
                return function(*args, **kwargs)
            finally:
                spent_s[label] = spent_s.get(label, 0.0) + time.process_time() - started_s
        return run

    batch_pool.WORKERS = 1
    for label, name in steps.items():
        setattr(stored_results, name, timed(label, originals[name]))
    try:
        started_cpu_s, started_s = time.process_time(), time.perf_counter()
        analyze_runs(session_factory(engine), guids)
        total_cpu_s, total_s = time.process_time() - started_cpu_s, time.perf_counter() - started_s
    finally:
        for name, function in originals.items():
            setattr(stored_results, name, function)
    print(f"  in one process: {total_s:.1f} s, {total_cpu_s:.1f} CPU s of this process; CPU s per step "
          "(the write's include its delete and verdicts; the database server's own time is not counted):")
    for label, seconds in spent_s.items():
        print(f"    {label:34} {seconds:6.2f} s ({seconds / len(guids) * 1e3:.3f} ms per run)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--devices", type=int, default=10_000)
    parser.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    parser.add_argument("--pg-url", help="an empty PostgreSQL database to use instead of a temporary server")
    parser.add_argument("--skip-reanalysis", action="store_true", help="stop after the queries (the slowest part)")
    parser.add_argument("--keep", metavar="FOLDER",
                        help="build the databases in FOLDER and leave them; a later call with the same FOLDER "
                             "reuses them and only times the queries")
    parser.add_argument("--reanalysis-runs", type=int, nargs="?", const=10_000, metavar="N",
                        help="only time the re-analysis of N stored runs (default 10,000)")
    parser.add_argument("--run-size", choices=sorted(RUN_SIZES), default="demo",
                        help="with --reanalysis-runs: demo (51 points, 3 sweeps) or 200 (200 points, 8 sweeps)")
    parser.add_argument("--workers", type=int, default=batch_pool.WORKERS,
                        help="with --reanalysis-runs: processes reading and assessing (default: one per core)")
    parser.add_argument("--phases", action="store_true",
                        help="with --reanalysis-runs: then once more in one process, timing each step")
    args = parser.parse_args()
    if args.reanalysis_runs is not None:
        if args.reanalysis_runs < 1 or args.workers < 1:
            parser.error(f"--reanalysis-runs ({args.reanalysis_runs}) and --workers ({args.workers}) must be at least 1")
        reanalysis(args)
        return
    reanalyze = not args.skip_reanalysis
    if args.keep and reanalyze:
        parser.error("--keep needs --skip-reanalysis: re-analysis rewrites the kept results")
    if args.backend in ("sqlite", "both"):
        with contextlib.ExitStack() as stack:
            folder = args.keep or stack.enter_context(tempfile.TemporaryDirectory())
            os.makedirs(folder, exist_ok=True)
            bench(f"sqlite:///{folder}/bench.db", args.devices, "SQLite", reanalyze)
    if args.backend in ("postgresql", "both"):
        if args.pg_url:
            bench(args.pg_url, args.devices, "PostgreSQL", reanalyze)
        else:
            with temporary_postgres(args.keep) as url:
                bench(url, args.devices, "PostgreSQL (local server in " + (args.keep or "a temporary folder") + ")", reanalyze)


def reanalysis(args) -> None:
    layout = RUN_SIZES[args.run_size]
    if args.backend in ("sqlite", "both"):
        with tempfile.TemporaryDirectory() as folder:
            bench_reanalysis(f"sqlite:///{folder}/bench.db", args.reanalysis_runs, layout, args.workers, "SQLite",
                             args.phases)
    if args.backend in ("postgresql", "both"):
        if args.pg_url:
            bench_reanalysis(args.pg_url, args.reanalysis_runs, layout, args.workers, "PostgreSQL", args.phases)
        else:
            with temporary_postgres() as url:
                bench_reanalysis(url, args.reanalysis_runs, layout, args.workers, "PostgreSQL (temporary local server)",
                                 args.phases)


if __name__ == "__main__":
    main()
