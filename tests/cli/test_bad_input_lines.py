"""Bad input and a full disk end in one line, not a traceback (issue 9, items 2 and 7): exit 2,
the line's key words, and nothing written or replaced (no database, no rows, the file or folder
that was given left as it was). Every case goes through the command line in its own process,
as a person would meet it."""

from __future__ import annotations

import gzip
import json
import os
import platform
import shutil
import socket
import stat
import subprocess
import sys
import textwrap
from contextlib import contextmanager
from pathlib import Path

import pytest
import sqlalchemy as sa
from conftest import SAMPLE_RUNS
from typer.testing import CliRunner

import tonebench.run.bench_connection as bench_connection
from tonebench.cli import app

SIM_BENCH = SAMPLE_RUNS / "sim_bench.toml"
PLAN = textwrap.dedent(
    """
    [plan]
    name = "bad-input-check"
    [device]
    part_number = "KLN-2417A"
    serial = "KLN24031-0007"
    [sweep]
    center_freqs_hz = [2.45e9]
    spacings_hz = [1.0e6]
    tone_start_dbm = -30.0
    tone_stop_dbm = -24.0
    tone_step_dbm = 2.0
    [analyzer]
    rbw_hz = 1000.0
    atten_db = 20.0
    """
)


def tonebench(*args, cwd: Path, timeout_s: float = 300) -> subprocess.CompletedProcess:
    env = {**os.environ, "COLUMNS": "250"}
    return subprocess.run([sys.executable, "-m", "tonebench", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=timeout_s, env=env)


def error_line(proc: subprocess.CompletedProcess, *words: str) -> str:
    """Exit 2 and exactly one error line (a progress bar aside) holding every word; no traceback."""
    assert "Traceback" not in proc.stderr, proc.stderr
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    lines = [line for line in proc.stderr.splitlines() if line.strip() and not line.startswith("measuring")]
    assert len(lines) == 1 and lines[0].startswith("error: "), proc.stderr
    for word in words:
        assert word in lines[0], (word, lines[0])
    return lines[0]


def folder_listing(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


@pytest.fixture
def work(tmp_path) -> Path:
    (tmp_path / "plan.toml").write_text(PLAN)
    return tmp_path


def closed_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def hardware_bench(resources: dict[str, str]) -> str:
    """The simulated bench's offsets and limits with explicit resources and no [simulation] table."""
    text = SIM_BENCH.read_text().split("[simulation]")[0]
    for role, resource in resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    return text


# --- resource strings ------------------------------------------------------------------------------

@pytest.mark.parametrize("role", ["source1", "analyzer"])
def test_non_numeric_port_is_refused_when_the_bench_file_is_read(work, role):
    resources = {r: f"TCPIP0::127.0.0.1::{closed_port()}::SOCKET" for r in ("source1", "source2", "analyzer")}
    resources[role] = "TCPIP::127.0.0.1::abc::SOCKET"
    (work / "bench.toml").write_text(hardware_bench(resources))
    before = folder_listing(work)
    proc = tonebench("run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{work / 't.db'}", cwd=work)
    error_line(proc, f"instruments.{role}", "port 'abc'", "allowed forms", "TCPIP0::host::port::SOCKET")
    assert folder_listing(work) == before


# --- database URL ------------------------------------------------------------------------------------

@pytest.mark.parametrize("url", ["sqlite://", "sqlite:///:memory:"])
def test_in_memory_sqlite_is_refused(work, url):
    before = folder_listing(work)
    proc = tonebench("run", "plan.toml", "--bench", SIM_BENCH, "--db", url, cwd=work)
    error_line(proc, "in-memory", "outlive the process")
    assert folder_listing(work) == before


# --- report paths --------------------------------------------------------------------------------------

def special_files(folder: Path) -> dict[str, Path]:
    """A FIFO, and a character device like /dev/null (made here, never the system's own) when the
    test may create device nodes (root)."""
    made = {}
    fifo = folder / "pipe.html"
    os.mkfifo(fifo)
    made["fifo"] = fifo
    try:
        os.mknod(folder / "null.html", 0o666 | stat.S_IFCHR, os.makedev(1, 3))
        made["device"] = folder / "null.html"
    except PermissionError:
        pass
    return made


def kind_of(path: Path) -> str:
    mode = path.lstat().st_mode
    return "fifo" if stat.S_ISFIFO(mode) else "device" if stat.S_ISCHR(mode) else "dir" if stat.S_ISDIR(mode) else "file"


@pytest.mark.parametrize("kind", ["directory", "fifo", "device", "missing folder"])
def test_bad_report_path_is_refused_before_measuring(work, kind):
    targets = work / "targets"
    targets.mkdir()
    specials = special_files(targets)
    if kind == "device" and "device" not in specials:
        pytest.skip("creating a device node needs root")
    report = {"directory": targets, "missing folder": work / "no-such-folder" / "r.html"}.get(kind) or specials[kind]
    kinds_before = {p.name: kind_of(p) for p in targets.iterdir()}
    words = {"directory": "is a directory", "fifo": "not a regular file", "device": "not a regular file",
             "missing folder": "does not exist"}[kind]
    proc = tonebench("run", "plan.toml", "--bench", SIM_BENCH, "--db", f"sqlite:///{work / 't.db'}",
                     "--report", report, cwd=work)
    error_line(proc, "report path", words)
    assert not (work / "t.db").exists(), "the run must be refused before the database is written"
    assert {p.name: kind_of(p) for p in targets.iterdir()} == kinds_before


def test_unwritable_report_folder_is_refused_before_measuring(work):
    folder = work / "readonly"
    folder.mkdir()
    if os.geteuid() == 0:
        # Permission bits do not stop root; a read-only mount does.
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=64k", "tmpfs", str(folder)], capture_output=True)
        if done.returncode != 0:
            pytest.skip(f"cannot mount a read-only tmpfs here: {done.stderr.decode().strip()}")
    else:
        folder.chmod(0o555)
    try:
        proc = tonebench("run", "plan.toml", "--bench", SIM_BENCH, "--db", f"sqlite:///{work / 't.db'}",
                         "--report", folder / "r.html", cwd=work)
        error_line(proc, "report path", "cannot create a file in", "writable directory")
        assert not (work / "t.db").exists()
    finally:
        if os.geteuid() == 0:
            subprocess.run(["umount", str(folder)], check=True)
        else:
            folder.chmod(0o755)


@pytest.fixture(scope="module")
def measured(tmp_path_factory) -> tuple[Path, str, str]:
    """One short run on the simulated bench and a calibration set: (folder, database URL, run GUID)."""
    folder = tmp_path_factory.mktemp("measured")
    (folder / "plan.toml").write_text(PLAN)
    url = f"sqlite:///{folder / 'm.db'}"
    done = tonebench("run", "plan.toml", "--bench", SIM_BENCH, "--db", url, "--report", folder / "r.html", cwd=folder)
    assert done.returncode == 0, done.stderr
    (folder / "in1.csv").write_text("freq_hz,loss_db\n2.3e9,6.1\n2.6e9,6.4\n")
    done = tonebench("cal", "import-table", "cables", "--loss-in1", folder / "in1.csv", "--db", url, cwd=folder)
    assert done.returncode == 0, done.stderr
    with sa.create_engine(url).connect() as connection:
        guid = connection.exec_driver_sql("SELECT guid FROM runs").scalar_one()
    return folder, url, guid


@pytest.mark.parametrize("writer", ["report", "compare", "cal show"])
def test_every_html_writer_refuses_a_non_regular_file_and_a_directory(measured, tmp_path, writer):
    folder, url, guid = measured
    specials = special_files(tmp_path)
    command = {"report": ["report", guid[:8], "--out"], "compare": ["compare", "--out"],
               "cal show": ["cal", "show", "cables", "--html"]}[writer]
    for target in [*specials.values(), tmp_path]:
        before = kind_of(target)
        proc = tonebench(*command, target, "--db", url, cwd=tmp_path)
        words = "is a directory" if target == tmp_path else "not a regular file"
        error_line(proc, words)
        assert kind_of(target) == before, f"{writer} replaced {target}"
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.endswith((".tmp", ".probe"))) == []


# --- edited export files ----------------------------------------------------------------------------------

def edited_export(measured, tmp_path, edit) -> tuple[Path, int]:
    """The measured database's export with one record edited and the hash recomputed."""
    folder, url, _ = measured
    path = tmp_path / "edited.jsonl.gz"
    done = tonebench("export", path, "--db", url, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    lines = gzip.decompress(path.read_bytes()).decode().splitlines(keepends=True)
    records = [json.loads(line) for line in lines[:-1]]
    number = edit(records)
    body = [json.dumps(r, sort_keys=True, separators=(",", ":"), ensure_ascii=False) + "\n" for r in records]
    import hashlib

    digest = hashlib.sha256("".join(body).encode()).hexdigest()
    end = json.dumps({"kind": "end", "records": len(body), "sha256": digest}, sort_keys=True, separators=(",", ":"))
    path.write_bytes(gzip.compress(("".join(body) + end + "\n").encode()))
    return path, number


def run_line(records) -> int:
    return next(i for i, r in enumerate(records, start=1) if r["kind"] == "run")


def drop_status(records):
    del records[run_line(records) - 1]["status"]
    return run_line(records)


def text_seq(records):
    records[run_line(records) - 1]["points"][1]["seq"] = "two"
    return run_line(records)


def repeated_point(records):
    points = records[run_line(records) - 1]["points"]
    points[2]["point_key"] = points[1]["point_key"]
    return run_line(records)


def points_not_a_list(records):
    records[run_line(records) - 1]["points"] = {"seq": 1}
    return run_line(records)


def no_point_flags(records):
    del records[run_line(records) - 1]["points"][0]["flags"]
    return run_line(records)


@pytest.mark.parametrize("edit, words", [
    (drop_status, ["field 'status' is missing"]),
    (text_seq, ["points[1]", "field 'seq'", "whole number"]),
    (repeated_point, ["points[2]", "field 'point_key' repeats", "points[1]"]),
    (points_not_a_list, ["field 'points' must be a list"]),
    (no_point_flags, ["points[0]", "field 'flags' is missing"]),
])
def test_edited_export_names_the_record_and_field_and_imports_nothing(measured, tmp_path, edit, words):
    path, number = edited_export(measured, tmp_path, edit)
    target = f"sqlite:///{tmp_path / 'lab.db'}"
    assert tonebench("db", "upgrade", "--db", target, cwd=tmp_path).returncode == 0
    proc = tonebench("import", path, "--db", target, cwd=tmp_path)
    line = error_line(proc, f"line {number} (run record)", *words)
    assert "another writer" not in line
    with sa.create_engine(target).connect() as connection:
        counts = [connection.exec_driver_sql(f"SELECT count(*) FROM {t}").scalar()
                  for t in ("runs", "points", "benches", "plans", "devices", "calibration_sets")]
    assert counts == [0] * 6, "nothing may be imported"


# --- control characters in device fields ------------------------------------------------------------------

def plan_with_device(**fields) -> str:
    """PLAN with its [device] table replaced; strings as JSON strings, whose escapes TOML reads alike."""
    device = {"part_number": "KLN-2417A", "serial": "KLN24031-0007", **fields}
    table = "".join(f"{key} = {json.dumps(value)}\n" for key, value in device.items())
    head, rest = PLAN.split("[device]\n")
    return head + "[device]\n" + table + "[sweep]" + rest.split("[sweep]")[1]


@pytest.mark.parametrize("field, value", [("serial", "KLN\x1b[2J0007"), ("part_number", "KLN\x00"),
                                          ("lot", "L\x07"), ("tags", ["ok", "bad\x85"]), ("notes", "a\rb")])
def test_control_characters_in_device_fields_are_refused_when_the_plan_is_read(work, db_url, field, value):
    (work / "plan.toml").write_text(plan_with_device(**{field: value}))
    for command in (["run", "plan.toml"], ["queue", "add", "plan.toml"]):
        proc = tonebench(*command, "--bench", SIM_BENCH, "--db", db_url, cwd=work)
        error_line(proc, f"device.{field}", "control character")
    engine = sa.create_engine(db_url)
    with engine.connect() as connection:
        if sa.inspect(connection).has_table("devices"):
            assert connection.exec_driver_sql("SELECT count(*) FROM devices").scalar() == 0
            assert connection.exec_driver_sql("SELECT count(*) FROM jobs").scalar() == 0
    engine.dispose()


@pytest.mark.parametrize("option, value", [("serial", "SN\x1b[31m1"), ("--lot", "L\x7fT"), ("--tag", "a\x07")])
def test_device_add_refuses_control_characters(work, option, value):
    url = f"sqlite:///{work / 't.db'}"
    assert tonebench("db", "upgrade", "--db", url, cwd=work).returncode == 0
    args = ["device", "add", "KLN-2417A", value if option == "serial" else "SN-1", "--db", url]
    if option != "serial":
        args += [option, value]
    proc = tonebench(*args, cwd=work)
    error_line(proc, "control character")
    with sa.create_engine(url).connect() as connection:
        assert connection.exec_driver_sql("SELECT count(*) FROM devices").scalar() == 0


# --- a full disk -------------------------------------------------------------------------------------------

@pytest.fixture
def tiny_disk(tmp_path):
    """A 4 MiB tmpfs of our own (CI runs as root); skipped with the reason where mounting is refused."""
    mount_point = tmp_path / "disk"
    mount_point.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(mount_point)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({done.stderr.decode().strip()}); the full-disk test needs one")
    yield mount_point
    subprocess.run(["umount", "-l", str(mount_point)], check=False)


def fill_disk(mount_point: Path, leave_kib: int) -> Path:
    filler = mount_point / "filler"
    free_kib = shutil.disk_usage(mount_point).free // 1024
    with open(filler, "wb") as f:
        f.write(b"\0" * (max(free_kib - leave_kib, 0) * 1024))
    return filler


def test_full_disk_leaves_the_run_resumable_and_says_so(work, tiny_disk, monkeypatch):
    url = f"sqlite:///{tiny_disk / 't.db'}"
    (work / "plan.toml").write_text(PLAN.replace("tone_start_dbm = -30.0", "tone_start_dbm = -60.0")
                                    .replace("tone_stop_dbm = -24.0", "tone_stop_dbm = -10.0")
                                    .replace("tone_step_dbm = 2.0", "tone_step_dbm = 0.5"))
    assert tonebench("db", "upgrade", "--db", url, cwd=work).returncode == 0
    filler = fill_disk(tiny_disk, leave_kib=300)
    # In this process, so the simulated sources can be read back after the refusal.
    sims = []
    real_start = bench_connection.start_sim_bench

    @contextmanager
    def start_and_keep(scenario):
        with real_start(scenario) as sim:
            sims.append(sim)
            yield sim

    monkeypatch.setattr(bench_connection, "start_sim_bench", start_and_keep)  # where a run starts it
    monkeypatch.chdir(work)
    result = CliRunner().invoke(app, ["run", "plan.toml", "--bench", str(SIM_BENCH), "--db", url,
                                      "--report", str(work / "r.html")])
    assert isinstance(result.exception, SystemExit), result.exception
    proc = subprocess.CompletedProcess([], result.exit_code, result.stdout, result.stderr)
    line = error_line(proc, "disk full while storing", "the run is stored up to point", "free space and `tonebench resume")
    for index in (1, 2):
        source = sims[0].bench.source(index)
        assert not source.commanded.rf_on and not source.effective.rf_on, f"source {index} left on"
    guid8 = line.split("`tonebench resume ")[1].split("`")[0]
    stored = int(line.split("stored up to point ")[1].split(";")[0])
    assert not (work / "r.html").exists()
    engine = sa.create_engine(url)
    with engine.connect() as connection:
        assert connection.exec_driver_sql("SELECT count(*) FROM points").scalar() == stored > 0
    engine.dispose()
    filler.unlink()
    with engine.begin() as connection:
        if connection.exec_driver_sql("SELECT status FROM runs").scalar_one() == "running":
            # Its end did not fit on the disk either (how many pages the last writes needed
            # decides): the run stays 'running' under this test's process, which cannot end
            # here. Put the store where a real `tonebench run` leaves it: owned by a process
            # that has ended (a real one's pid, run and gone).
            gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], check=True,
                                  capture_output=True, text=True).stdout.strip()
            connection.exec_driver_sql(f"UPDATE runs SET owner = '{platform.node()}:{gone}'")
    engine.dispose()
    proc = tonebench("resume", guid8, "--db", url, "--report", work / "r.html", cwd=work)
    assert proc.returncode == 0, proc.stderr
    engine = sa.create_engine(url)
    with engine.connect() as connection:
        status = connection.exec_driver_sql("SELECT status FROM runs").scalar_one()
        keys = [k for (k,) in connection.exec_driver_sql("SELECT point_key FROM points")]
    engine.dispose()
    assert status == "complete"
    assert len(keys) == len(set(keys)) == 101, "every point stored once after the resume"


def test_plan_bench_and_dialect_files_share_one_wording(work):
    """An unknown key names the file, the field and the keys allowed; bad TOML says where, in
    the same words for a plan, a bench file and a dialect file (config/loading.py)."""
    (work / "typo.toml").write_text(PLAN.replace("[sweep]\n", "[sweep]\ntone_stepp_dbm = 2.0\n"))
    proc = tonebench("run", "typo.toml", "--bench", SIM_BENCH, "--db", f"sqlite:///{work / 't.db'}", cwd=work)
    error_line(proc, "plan typo.toml: field 'sweep.tone_stepp_dbm' is not a known setting; allowed: ",
               "tone_step_dbm")
    dialect = (SAMPLE_RUNS.parent / "drivers" / "generic-analyzer.toml").read_text()
    (work / "odd-analyzer.toml").write_text(dialect.replace("[io]\n", "[io]\nbaud = 9600\n"))
    (work / "bench.toml").write_text(SIM_BENCH.read_text().replace('dialect = "generic-analyzer"',
                                                                   f'dialect = "{work / "odd-analyzer.toml"}"'))
    proc = tonebench("run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{work / 't.db'}", cwd=work)
    error_line(proc, f"dialect file {work / 'odd-analyzer.toml'}: field 'io.baud' is not a known setting; allowed: ",
               "query_timeout_s")
    (work / "plan.toml").write_text("[plan]\nname = unquoted\n")
    proc = tonebench("run", "plan.toml", "--bench", SIM_BENCH, "--db", f"sqlite:///{work / 't.db'}", cwd=work)
    error_line(proc, "plan plan.toml: not valid TOML (", "line 2")
    (work / "bench.toml").write_text("[bench]\nname = unquoted\n")
    (work / "good.toml").write_text(PLAN)
    proc = tonebench("run", "good.toml", "--bench", "bench.toml", "--db", f"sqlite:///{work / 't.db'}", cwd=work)
    error_line(proc, "bench file bench.toml: not valid TOML (", "line 2")
    assert "t.db" not in folder_listing(work)
