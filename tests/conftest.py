from pathlib import Path

import pytest

from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario

PROJECT_ROOT = Path(__file__).resolve().parent.parent
SAMPLE_RUNS = PROJECT_ROOT / "sample_runs"


@pytest.fixture(autouse=True)
def _no_user_database_settings(monkeypatch, tmp_path_factory):
    """Tests never pick up the machine's TONEBENCH_DB or per-user config file."""
    monkeypatch.delenv("TONEBENCH_DB", raising=False)
    monkeypatch.setenv("TONEBENCH_CONFIG", str(tmp_path_factory.getbasetemp() / "no-user-config.toml"))


@pytest.fixture
def demo_plan_text() -> str:
    return (SAMPLE_RUNS / "demo_plan.toml").read_text()


@pytest.fixture
def sim_bench_text() -> str:
    return (SAMPLE_RUNS / "sim_bench.toml").read_text()


@pytest.fixture
def sim():
    """A default simulated bench served from this process, for hardware bench files to point at."""
    with start_sim_bench(Scenario()) as running:
        yield running


# --- A real PostgreSQL server for the tests that need one ---------------------------------------
# Started once per test session in a temporary folder, listening only on a Unix socket there.
# CI installs Debian's postgresql package and sets TONEBENCH_REQUIRE_POSTGRES=1 so that a missing
# server fails the run instead of skipping those tests.

import glob
import os
import shutil
import socket
import subprocess
import tempfile
import uuid


def _postgres_bin() -> str | None:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    if found:
        return os.path.dirname(found[-1])
    initdb = shutil.which("initdb")
    return os.path.dirname(initdb) if initdb else None


def _as_server_user(args: list[str]) -> list[str]:
    # initdb and postgres refuse to run as root; Debian's package creates the 'postgres' user.
    if os.geteuid() == 0:
        return ["runuser", "-u", "postgres", "--", *args]
    return args


@pytest.fixture(scope="session")
def postgres_server():
    """Base URL of a throwaway PostgreSQL server, e.g. postgresql+psycopg://postgres@/postgres?host=..."""
    bin_dir = _postgres_bin()
    if bin_dir is None:
        if os.environ.get("TONEBENCH_REQUIRE_POSTGRES") == "1":
            pytest.fail("PostgreSQL server binaries not found (apt-get install postgresql)")
        pytest.skip("PostgreSQL server binaries not found")
    folder = tempfile.mkdtemp(prefix="tonebench-pg-")
    os.chmod(folder, 0o777)
    data_dir = os.path.join(folder, "data")
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
    subprocess.run(_as_server_user([f"{bin_dir}/initdb", "-D", data_dir, "-U", "postgres", "--auth=trust", "-E", "UTF8"]),
                   check=True, capture_output=True)
    with socket.socket() as probe:  # a free TCP port number, also used to name the socket file
        probe.bind(("127.0.0.1", 0))
        port = str(probe.getsockname()[1])
    subprocess.run(
        _as_server_user([f"{bin_dir}/pg_ctl", "-D", data_dir, "-w", "-l", os.path.join(folder, "log"), "-o",
                         f"-k {folder} -p {port} -c listen_addresses='' -c fsync=off", "start"]),
        check=True, capture_output=True,
    )
    try:
        yield f"postgresql+psycopg://postgres@/postgres?host={folder}&port={port}"
    finally:
        subprocess.run(_as_server_user([f"{bin_dir}/pg_ctl", "-D", data_dir, "-m", "fast", "stop"]), capture_output=True)
        shutil.rmtree(folder, ignore_errors=True)


@pytest.fixture
def postgres_url(postgres_server):
    """A fresh, empty database on the session's PostgreSQL server, dropped after the test."""
    import sqlalchemy as sa

    name = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(postgres_server, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.exec_driver_sql(f'CREATE DATABASE "{name}"')
    yield postgres_server.replace("/postgres?", f"/{name}?")
    with admin.connect() as connection:
        connection.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
    admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request, tmp_path) -> str:
    """An empty database on each backend in turn: an SQLite file, then a real PostgreSQL database."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'tonebench.db'}"
    return request.getfixturevalue("postgres_url")


@pytest.fixture
def engine(db_url):
    """The database of `db_url`, migrated to this code's schema."""
    from tonebench.store.database import open_database

    engine = open_database(db_url)
    yield engine
    engine.dispose()
