"""The command line end to end: bad input handling, a run on the simulated bench, sim serve."""

import re
import socket
import subprocess
import sys
import textwrap

import pytest
from conftest import SAMPLE_RUNS
from cli_invoke import invoke


SHORT_PLAN = textwrap.dedent(
    """
    [plan]
    name = "short-check"
    [device]
    part_number = "KLN-2417A"
    serial = "KLN24031-0002"
    [sweep]
    center_freqs_hz = [2.45e9]
    spacings_hz = [1.0e6]
    tone_start_dbm = -34.0
    tone_stop_dbm = -24.0
    tone_step_dbm = 2.0
    [analyzer]
    rbw_hz = 1000.0
    atten_db = 20.0
    """
)


def closed_loopback_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def hardware_bench(resources: dict[str, str], dialect_analyzer: str = "generic-analyzer") -> str:
    """The simulated bench's offsets and limits, with explicit resources and no [simulation] table."""
    text = (SAMPLE_RUNS / "sim_bench.toml").read_text().split("[simulation]")[0]
    text = text.replace('dialect = "generic-analyzer"', f'dialect = "{dialect_analyzer}"')
    for role, resource in resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    return text


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def assert_refused(result, expected: str, workdir):
    assert result.exit_code == 2, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:") and expected in lines[0], result.output
    written = sorted(p.name for p in workdir.iterdir() if p.suffix in (".db", ".html", ".db-wal"))
    assert written == [], f"bad input must write nothing, found {written}"


def test_bad_plan_type(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN.replace("tone_step_dbm = 2.0", "tone_step_dbm = [2]"))
    result = invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "tone_step_dbm", workdir)


def test_missing_field_and_power_out_of_range(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN.replace('serial = "KLN24031-0002"\n', ""))
    result = invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "device.serial' is missing", workdir)
    (workdir / "plan.toml").write_text(SHORT_PLAN.replace("tone_stop_dbm = -24.0", "tone_stop_dbm = 99.0"))
    result = invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "tone_stop_dbm", workdir)


def test_unknown_dialect(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    bench = (SAMPLE_RUNS / "sim_bench.toml").read_text().replace('dialect = "generic-analyzer"', 'dialect = "no-such-analyzer"')
    (workdir / "bench.toml").write_text(bench)
    result = invoke("run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "unknown dialect 'no-such-analyzer'", workdir)


def test_unreachable_resource(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    resources = {role: f"TCPIP0::127.0.0.1::{closed_loopback_port()}::SOCKET" for role in ("source1", "source2", "analyzer")}
    assert len(set(resources.values())) == 3  # one resource per role, else that is what is refused
    (workdir / "bench.toml").write_text(hardware_bench(resources))
    result = invoke("run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "cannot reach", workdir)


def test_malformed_resource(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    resources = {role: "TCPIP0::127.0.0.1" for role in ("source1", "source2", "analyzer")}
    (workdir / "bench.toml").write_text(hardware_bench(resources))
    result = invoke("run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{workdir}/t.db")
    assert_refused(result, "TCPIP0::127.0.0.1", workdir)


def test_bad_database_url(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    result = invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", "nosuchdb://somewhere/x")
    assert_refused(result, "nosuchdb://somewhere/x", workdir)


def test_run_on_simulated_bench_then_runs_show_analyze_report(workdir):
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    db = f"sqlite:///{workdir}/runs.db"
    result = invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", db)
    assert result.exit_code == 0, result.output
    guid = re.search(r"run ([0-9a-f-]{36}): complete", result.output).group(1)
    report = re.search(r"report:\s+(\S+)", result.output).group(1)
    assert (workdir / report).exists() or __import__("pathlib").Path(report).exists()

    listed = invoke("runs", "--db", db)
    assert listed.exit_code == 0 and guid[:8] in listed.output and "complete" in listed.output

    shown = invoke("show", guid[:8], "--db", db)
    assert shown.exit_code == 0, shown.output
    assert "tonebench,simulated" in shown.output  # *IDN? replies stored with the run
    assert "rf-off" in shown.output

    analyzed = invoke("analyze", guid, "--db", db)
    assert analyzed.exit_code == 0 and "2.45 GHz" in analyzed.output

    out_html = workdir / "again.html"
    reported = invoke("report", guid, "--db", db, "--out", out_html)
    assert reported.exit_code == 0 and out_html.stat().st_size > 1_000_000  # plotly.js embedded

    missing = invoke("show", "ffffffff", "--db", db)
    assert missing.exit_code == 2 and "no run" in missing.output


def test_sim_serve_runs_a_plan_over_tcp(workdir):
    """`tonebench sim serve` in its own process; a short plan reaches it through pyvisa-py over TCP."""
    server = subprocess.Popen(
        [sys.executable, "-m", "tonebench", "sim", "serve", "--bench", str(SAMPLE_RUNS / "sim_bench.toml")],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        resources = {}
        while len(resources) < 3:
            line = server.stdout.readline()
            assert line, f"sim serve ended early: {server.stderr.read()}"
            role, _, resource = line.strip().partition(": ")
            if role in ("source1", "source2", "analyzer"):
                resources[role] = resource
        assert all(r.startswith("TCPIP0::127.0.0.1::") and r.endswith("::SOCKET") for r in resources.values())
        (workdir / "plan.toml").write_text(SHORT_PLAN)
        (workdir / "bench.toml").write_text(hardware_bench(resources, "verbose-analyzer"))
        db = f"sqlite:///{workdir}/served.db"
        result = invoke("run", "plan.toml", "--bench", "bench.toml", "--db", db)
        assert result.exit_code == 0, result.output
        assert "complete" in result.output
        shown = invoke("show", re.search(r"run ([0-9a-f-]{36})", result.output).group(1), "--db", db)
        assert "points:  6" in shown.output
    finally:
        server.terminate()
        server.wait(timeout=10)


def test_a_run_stores_spec_limit_verdicts(workdir):
    """analyze judges every stored result against the part's spec limits (pass here, fail there)."""
    from sqlalchemy import create_engine, select
    from sqlalchemy.orm import Session

    from tonebench.store.models import Result, Run

    db = f"sqlite:///{workdir}/verdicts.db"
    (workdir / "plan.toml").write_text(SHORT_PLAN)
    # The simulated DUT's IIP3 is about -2 dBm at 2.45 GHz: a -10 dBm minimum passes, +5 fails.
    added = invoke("limit", "add", "KLN-2417A", "iip3_dbm", "--min", "-10", "--freq-min-hz", "2.4e9",
                   "--freq-max-hz", "2.5e9", "--db", db)
    assert added.exit_code == 0, added.output
    assert invoke("run", "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", db).exit_code == 0
    engine = create_engine(db)
    with Session(engine) as session:
        assert session.scalars(select(Result.verdict)).all() == ["pass"]
    assert invoke("limit", "add", "KLN-2417A", "iip3_dbm", "--min", "5", "--freq-min-hz", "2.4e9",
                  "--freq-max-hz", "2.5e9", "--db", db).exit_code == 0
    with Session(engine) as session:
        guid = session.scalars(select(Run.guid)).one()
    assert invoke("analyze", guid, "--db", db).exit_code == 0
    with Session(engine) as session:
        assert session.scalars(select(Result.verdict)).all() == ["fail"]
    engine.dispose()
