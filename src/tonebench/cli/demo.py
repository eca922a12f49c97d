"""The one-command demo: the sample plan on the simulated bench, checked against the simulated truth."""

from __future__ import annotations

from pathlib import Path

from rich.console import Console

from tonebench.packaged import data_dir


def demo_files() -> tuple[Path, Path]:
    samples = data_dir("sample_runs")
    return samples / "demo_plan.toml", samples / "sim_bench.toml"


def run_demo(out_dir: Path, run_with_progress, console: Console):
    plan, bench = demo_files()
    out_dir.mkdir(parents=True, exist_ok=True)
    db_path = (out_dir / "tonebench.db").resolve()
    captured = {}
    outcome = run_with_progress(
        plan, bench, f"sqlite:///{db_path}", None, on_sim_started=lambda sim: captured.update(sim=sim)
    )
    console.print(f"run {outcome.guid}: {outcome.status}", highlight=False)
    console.print(f"database: {db_path}", highlight=False)
    console.print(f"report:   {outcome.report_path}", highlight=False)
    truth = captured["sim"].bench.truth
    for result in outcome.results:
        true_iip3_dbm = truth.true_iip3_dbm(result.center_hz)
        measured = "no intercept" if result.iip3_dbm is None else f"{result.iip3_dbm:+.2f} dBm"
        console.print(
            f"{result.center_hz / 1e9:.3f} GHz: IIP3 measured {measured}, simulated truth {true_iip3_dbm:+.2f} dBm",
            highlight=False,
        )
    console.print("next, to look at what was measured:", highlight=False)
    for command in (f"tonebench show {outcome.guid[:8]} --db {db_path}", f"tonebench find --db {db_path}",
                    f"tonebench analyze {outcome.guid[:8]} --db {db_path}"):
        console.print(f"  {command}", highlight=False)
    return outcome
