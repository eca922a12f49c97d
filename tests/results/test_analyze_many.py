"""`tonebench analyze --all`: every finished run re-analysed in one process, filtered by part and
lot, a run still being measured left alone, and the bad combinations refused in one line."""

from __future__ import annotations

import sqlalchemy as sa
from cli_invoke import invoke
from conftest import SAMPLE_RUNS

from tonebench.run.start import execute_run


def test_analyze_all_goes_through_the_finished_runs(tmp_path):
    db_url = f"sqlite:///{tmp_path / 'tb.db'}"
    guids = [execute_run(SAMPLE_RUNS / "demo_plan.toml", SAMPLE_RUNS / "sim_bench.toml", db_url, None).guid
             for _ in range(3)]
    engine = sa.create_engine(db_url)
    with engine.begin() as connection:  # one run as if a bench were still measuring it
        connection.execute(sa.text("UPDATE runs SET status = 'running' WHERE guid = :guid"), {"guid": guids[2]})
        connection.execute(sa.text("DELETE FROM results WHERE run_id = (SELECT id FROM runs WHERE guid = :guid)"),
                           {"guid": guids[0]})
    done = invoke("analyze", "--all", "--db", db_url)
    assert done.exit_code == 0, done.output
    assert "2 runs analysed" in done.output and "6 results stored" in done.output
    with engine.connect() as connection:
        per_run = dict(connection.execute(sa.text(
            "SELECT runs.guid, count(results.id) FROM runs LEFT JOIN results ON results.run_id = runs.id GROUP BY runs.guid")).all())
    assert per_run[guids[0]] == 3  # analysed again: its results are back
    assert invoke("analyze", "--all", "--part", "KLN-2417A", "--db", db_url).output.count("2 runs analysed") == 1
    assert "0 runs analysed" in invoke("analyze", "--all", "--lot", "NO-SUCH-LOT", "--db", db_url).output
    for args in ((), (guids[0][:8], "--all")):
        refused = invoke("analyze", *args, "--db", db_url)
        assert refused.exit_code == 2 and "give a RUN, or --all" in refused.output
        assert len(refused.output.strip().splitlines()) == 1
