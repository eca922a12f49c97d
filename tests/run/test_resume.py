"""Resume: a run process killed with SIGKILL at several points, then resumed, ends with every
planned point stored exactly once; the checks that refuse a resume; pause and abort policies."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import SAMPLE_RUNS
from sim_runs import write_bench, write_plan
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session
from stored_rows import count_points, stored
from typer.testing import CliRunner

from tonebench.cli import app
from tonebench.config.plan_file import load_plan
from tonebench.errors import InputError
from tonebench.plan.points import expand
from tonebench.run.resume import resume_run
from tonebench.run.start import execute_run
from tonebench.store.models import Point, Run

# A shorter plan than the demo: two centres, 9 powers each.
PLAN_TEXT = (SAMPLE_RUNS / "demo_plan.toml").read_text().replace(
    "center_freqs_hz = [2.40e9, 2.45e9, 2.48e9]", "center_freqs_hz = [2.40e9, 2.48e9]"
).replace("tone_start_dbm = -40.0", "tone_start_dbm = -24.0")


def kill_run_after(tmp_path: Path, points_before_kill: int) -> tuple[Path, Path, Path]:
    """Start `tonebench run` in its own process and SIGKILL it once that many points are stored."""
    plan, bench, db_path = write_plan(tmp_path, PLAN_TEXT), write_bench(tmp_path, fast=False), tmp_path / "t.db"
    process = subprocess.Popen([sys.executable, "-m", "tonebench", "run", str(plan), "--bench", str(bench),
                                "--db", f"sqlite:///{db_path}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    try:
        # 0: as soon as the run is stored, before its first point (RF may be going on).
        while count_points(db_path, Point if points_before_kill else Run) < max(1, points_before_kill):
            assert process.poll() is None, "the run ended before it could be killed"
            assert time.monotonic() < deadline, "the run did not get far enough"
            threading_wait(0.01)
        os.kill(process.pid, signal.SIGKILL)
    finally:
        process.wait(30)
    assert process.returncode == -signal.SIGKILL
    return plan, bench, db_path


def threading_wait(seconds: float) -> None:
    import threading

    threading.Event().wait(seconds)


# The kill lands at an uncontrolled instant inside the measurement of the point after these.
@pytest.mark.parametrize("points_before_kill", [0, 1, 6, 13])
def test_killed_run_resumes_with_every_point_once(tmp_path, points_before_kill):
    plan, bench, db_path = kill_run_after(tmp_path, points_before_kill)
    status, _reason, _points, keys_at_kill, _events = stored(db_path)
    assert status == "running"  # what the dead process left; resume finds out it is dead
    assert len(keys_at_kill) >= points_before_kill
    guid = _only_run_guid(db_path)
    outcome = resume_run(guid[:8], f"sqlite:///{db_path}", report_path=tmp_path / "r.html")
    assert outcome.status == "complete"
    status, end_reason, points, keys, events = stored(db_path)
    planned = [p.key for p in expand(load_plan(plan).settings)]
    assert status == "complete" and sorted(keys) == sorted(planned) and len(keys) == len(set(keys))
    assert all(p.status == "measured" for p in points.values())
    kinds = [kind for kind, _ in events]
    assert "owner-gone" in kinds and "resume" in kinds
    assert any("resumed by " in message and f"{len(set(keys_at_kill))} already stored" in message
               for kind, message in events if kind == "resume")


def _only_run_guid(db_path: Path) -> str:
    engine = create_engine(f"sqlite:///{db_path}")
    with Session(engine) as session:
        guid = session.scalars(select(Run.guid)).one()
    engine.dispose()
    return guid


def test_resume_checks_the_plan_and_refuses_a_complete_run(tmp_path):
    plan, bench = write_plan(tmp_path, PLAN_TEXT), write_bench(tmp_path)
    db_url = f"sqlite:///{tmp_path / 't.db'}"

    def ctrl_c_after_two(done: int, total: int) -> None:
        if done == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        execute_run(plan, bench, db_url, None, ctrl_c_after_two)
    guid = _only_run_guid(tmp_path / "t.db")
    changed = tmp_path / "changed.toml"
    changed.write_text(PLAN_TEXT.replace("tone_step_dbm = 2.0", "tone_step_dbm = 1.0"))
    with pytest.raises(InputError, match="plan .* differs from the plan run .* started with"):
        resume_run(guid, db_url, plan_path=changed)
    other_bench = tmp_path / "other" / "bench.toml"
    other_bench.parent.mkdir()
    other_bench.write_text(bench.read_text().replace('name = "sim-bench-1"', 'name = "sim-bench-2"'))
    with pytest.raises(InputError, match="is for bench 'sim-bench-2'"):
        resume_run(guid, db_url, bench_path=other_bench)
    assert resume_run(guid, db_url, plan_path=plan).status == "complete"  # the same plan file is fine
    with pytest.raises(InputError, match="is complete; nothing to resume"):
        resume_run(guid, db_url)


def test_pause_policy_stores_the_failed_point_and_resume_measures_it(tmp_path):
    plan = write_plan(tmp_path, PLAN_TEXT)
    bench = write_bench(tmp_path, unattended={"on_point_failure": "pause", "reconnects": 1, "retries": 0})
    db_url = f"sqlite:///{tmp_path / 't.db'}"
    sims = []

    def switch_off_after_three(done: int, total: int) -> None:
        if done == 3:
            sims[0].switch_off("analyzer")  # the analyzer goes away for good

    outcome = execute_run(plan, bench, db_url, None, switch_off_after_three, sims.append)
    assert outcome.status == "paused"
    assert not any(sims[0].bench.source(i).commanded.rf_on for i in (1, 2))
    status, end_reason, points, keys, events = stored(tmp_path / "t.db")
    assert status == "paused" and "analyzer" in end_reason
    failed = [p for p in points.values() if p.status == "failed"]
    assert len(keys) == 4 and len(failed) == 1 and failed[0].fail_reason
    assert "pause" in {kind for kind, _ in events}
    # The instrument is back (a new simulator): resume measures the failed point and the rest.
    resumed = resume_run(outcome.guid, db_url)
    assert resumed.status == "complete"
    status, _reason, points, keys, _events = stored(tmp_path / "t.db")
    planned = [p.key for p in expand(load_plan(plan).settings)]
    assert status == "complete" and sorted(keys) == sorted(planned)
    assert all(p.status == "measured" for p in points.values())


@pytest.mark.parametrize("policy, run_status", [("abort", "aborted"), ("continue", "failed")])  # failed points: never complete
def test_abort_and_continue_policies(tmp_path, policy, run_status):
    plan = write_plan(tmp_path, PLAN_TEXT)
    bench = write_bench(tmp_path, unattended={"on_point_failure": policy, "reconnects": 1, "retries": 0,
                                              "point_attempts": 2})
    sims = []

    def switch_off_after_three(done: int, total: int) -> None:
        if done == 3:
            sims[0].switch_off("analyzer")

    outcome = execute_run(plan, bench, f"sqlite:///{tmp_path / 't.db'}", None, switch_off_after_three, sims.append)
    assert outcome.status == run_status
    status, end_reason, points, keys, _events = stored(tmp_path / "t.db")
    failed = [p for p in points.values() if p.status == "failed"]
    assert status == run_status
    if policy == "abort":
        assert len(keys) == 4 and len(failed) == 1 and "analyzer" in end_reason
    else:  # every later point is stored as failed, with its reason, and the run says so
        assert len(keys) == 18 and len(failed) == 15 and all(p.fail_reason for p in failed)
        assert "15 failed" in end_reason
    assert not any(sims[0].bench.source(i).commanded.rf_on for i in (1, 2))


def test_cli_resume_of_an_unknown_run_is_one_line(tmp_path):
    result = CliRunner().invoke(app, ["resume", "ffffffff", "--db", f"sqlite:///{tmp_path / 'x.db'}"])
    assert result.exit_code == 2 and result.output.strip().count("\n") == 0
