"""Points committed on a writer thread (store/point_committer.py): the next point's commands
overlap the commit, yet every point handed over is committed before the sequencer returns or
raises (so before the run's end is stored), on every way out, and a commit's error reaches the
measuring thread as the same exception."""

from __future__ import annotations

import threading
import time

import pytest
from conftest import SAMPLE_RUNS

import tonebench.store.point_committer as committer_module
from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.instruments.open_bench import open_bench
from tonebench.plan.points import expand
from tonebench.run.sequencer import Sequencer
from tonebench.run.start import offsets_from_bench
from tonebench.sim.launch import start_sim_bench
from tonebench.store.database import DiskFull, open_database, session_factory
from tonebench.store.point_committer import PointCommitter
from tonebench.store.point_writer import store_point
from tonebench.store.records import RunRecorder

PLAN = """
[plan]
name = "commits"

[device]
part_number = "COM-1"
serial = "C-001"

[sweep]
center_freqs_hz = [2.40e9]
spacings_hz = [1.0e6]
tone_start_dbm = -30.0
tone_stop_dbm = -24.0
tone_step_dbm = 2.0

[analyzer]
rbw_hz = 1000.0
atten_db = 20.0
ref_level_dbm = 0.0
"""
SLOW_COMMIT_S = 0.3  # longer than a simulated point, so a commit is still running when it ends


class FakeStore:
    """Stands in for store_point: records what was committed and when, slowly, failing on request."""

    def __init__(self, delay_s: float = 0.0, fail_on: str | None = None):
        self.delay_s = delay_s
        self.fail_on = fail_on
        self.committed: list[str] = []
        self.running = threading.Event()
        self.error = DiskFull("disk full while storing point x")

    def __call__(self, sessions, run_id, record) -> None:
        self.running.set()
        time.sleep(self.delay_s)
        if record.point_key == self.fail_on:
            raise self.error
        self.committed.append(record.point_key)


class Record:
    def __init__(self, key: str):
        self.point_key = key


def test_submit_returns_while_the_commit_runs_and_waits_for_it_at_the_next(monkeypatch):
    fake = FakeStore(delay_s=SLOW_COMMIT_S)
    monkeypatch.setattr(committer_module, "store_point", fake)
    points = PointCommitter(None, 1)
    started_s = time.monotonic()
    points.submit(Record("a"))
    assert time.monotonic() - started_s < SLOW_COMMIT_S / 2, "the first submit waited for its commit"
    assert fake.running.wait(5)
    points.submit(Record("b"))  # at most one point uncommitted: waits for "a"
    assert fake.committed == ["a"]
    points.close()
    assert fake.committed == ["a", "b"]


def test_a_commit_error_is_raised_at_the_next_submit_and_that_point_is_not_handed_over(monkeypatch):
    fake = FakeStore(fail_on="a")
    monkeypatch.setattr(committer_module, "store_point", fake)
    points = PointCommitter(None, 1)
    points.submit(Record("a"))
    with pytest.raises(DiskFull) as raised:
        points.submit(Record("b"))
    assert raised.value is fake.error
    points.close()
    assert fake.committed == []


def test_close_raises_the_last_commits_error(monkeypatch):
    fake = FakeStore(delay_s=0.05, fail_on="b")
    monkeypatch.setattr(committer_module, "store_point", fake)
    points = PointCommitter(None, 1)
    points.submit(Record("a"))
    points.submit(Record("b"))
    with pytest.raises(DiskFull):
        points.close()
    assert fake.committed == ["a"]


def run_sequencer(tmp_path, monkeypatch, slow_store, on_progress=None):
    """The plan's four points on the simulated bench, with store_point wrapped by `slow_store`;
    returns (exception or None, stored point keys read after run() ended, the simulated bench)."""
    (tmp_path / "plan.toml").write_text(PLAN)
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")
    plan = load_plan(tmp_path / "plan.toml")
    engine = open_database(f"sqlite:///{tmp_path / 'c.db'}")
    sessions = session_factory(engine)
    recorder = RunRecorder.start(
        sessions, bench_name="sim", bench_description="", device={"part_number": "COM-1", "serial": "C-001"},
        plan_name="commits", plan_text=plan.text, plan_sha256=plan.sha256, simulated=True,
        instruments=[], offsets=[], metadata={},
    )
    monkeypatch.setattr(committer_module, "store_point", slow_store)
    raised = None
    with start_sim_bench(bench.scenario) as sim:
        instruments = open_bench(bench.settings, sim.resources)
        try:
            sequencer = Sequencer(instruments, offsets_from_bench(bench), bench.settings.limits,
                                  plan.settings.analyzer, recorder, unattended=bench.settings.unattended)
            try:
                sequencer.run(expand(plan.settings), on_progress)
            except BaseException as exc:  # noqa: BLE001 - the test looks at what came out
                raised = exc
            # Read at once, before anything else could finish a commit left running.
            keys = [k for (k,) in engine.connect().exec_driver_sql("SELECT point_key FROM points ORDER BY id")]
        finally:
            instruments.close()
        rf_on = [sim.bench.source(i).effective.rf_on for i in (1, 2)]
    engine.dispose()
    return raised, keys, rf_on


def slow(real=store_point, delay_s=SLOW_COMMIT_S, fail_at: int | None = None):
    calls = []

    def store(sessions, run_id, record):
        calls.append(record.point_key)
        time.sleep(delay_s)
        if fail_at is not None and len(calls) == fail_at:
            raise DiskFull(f"disk full while storing point {record.point_key}")
        real(sessions, run_id, record)

    store.calls = calls
    return store


def test_every_point_is_committed_when_the_run_returns(tmp_path, monkeypatch):
    store = slow()
    raised, keys, rf_on = run_sequencer(tmp_path, monkeypatch, store)
    assert raised is None
    assert len(keys) == 4 and keys == store.calls
    assert rf_on == [False, False]


@pytest.mark.parametrize("stop", [KeyboardInterrupt, RuntimeError])
def test_a_stop_after_a_point_still_commits_it_before_raising(tmp_path, monkeypatch, stop):
    """Ctrl-C (or an error) right after point 2 was handed over: it is committed before run()
    raises, though its commit was still running."""
    store = slow()

    def progress(done, total):
        if done == 2:
            raise stop("stop here")

    raised, keys, rf_on = run_sequencer(tmp_path, monkeypatch, store, progress)
    assert isinstance(raised, stop)
    assert len(keys) == 2 and keys == store.calls
    assert rf_on == [False, False]


def test_a_commit_error_reaches_the_measuring_thread_rf_off(tmp_path, monkeypatch):
    store = slow(delay_s=0.01, fail_at=2)
    raised, keys, rf_on = run_sequencer(tmp_path, monkeypatch, store)
    assert isinstance(raised, DiskFull) and "disk full while storing point" in str(raised)
    assert len(keys) == 1, "nothing after the point that could not be stored"
    assert len(store.calls) == 2, "no point handed over after the failed commit"
    assert rf_on == [False, False]
