"""Tone-spacing sweeps end to end: sample_runs/spacing_sweep_plan.toml measured by `tonebench run`
on the simulated bench with the DUT's baseband memory on (sim/memory.py), found by
`tonebench find --json`, and shown in the run report.

Truth: the memory model's closed form (sim/memory.py; the mechanism from Vuolevi and Rahkonen,
"Distortion in RF Power Amplifiers", 2003, from memory): upper minus lower IM3 at spacing df is
20 log10 |1 + rho e^(j theta) Z(df)| / |1 + rho e^(j theta) conj(Z(df))|, Z = 1 / (1 + j df / f_pole).
"""

from __future__ import annotations

import json

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS

from tonebench.sim import memory

PLAN = SAMPLE_RUNS / "spacing_sweep_plan.toml"
BENCH_TEXT = (SAMPLE_RUNS / "sim_bench.toml").read_text()
STRENGTH, POLE_HZ, PHASE_DEG = 0.4, 1.0e6, 90.0
ASYMMETRY_TOLERANCE_DB = 0.3  # issue 15 acceptance


def memory_bench(folder):
    assert "\nnf_db = 1.2\n" in BENCH_TEXT
    path = folder / "memory_bench.toml"
    path.write_text(BENCH_TEXT.replace("\nnf_db = 1.2\n", f"\nnf_db = 1.2\nmemory_strength = {STRENGTH}\n"
                                       f"memory_pole_hz = {POLE_HZ}\nmemory_phase_deg = {PHASE_DEG}\n"))
    return path


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    folder = tmp_path_factory.mktemp("spacing")
    db, report = folder / "t.db", folder / "report.html"
    result = invoke("run", PLAN, "--bench", memory_bench(folder), "--db", db, "--report", report)
    assert result.exit_code == 0, result.output
    found = invoke("find", "--part", "KDA-2405M", "--json", "--db", db)
    assert found.exit_code == 0, found.output
    return json.loads(found.output), report.read_text()


def test_the_asymmetry_against_spacing_follows_the_memory_model(measured):
    rows, _ = measured
    spacings = [r["spacing_hz"] for r in rows]
    assert sorted(spacings) == [1e4, 1e5, 1e6, 3e6, 1e7]
    truths = {}
    for row in rows:
        truth = float(memory.im3_asymmetry_db(row["spacing_hz"], STRENGTH, POLE_HZ, PHASE_DEG))
        truths[row["spacing_hz"]] = truth
        assert row["im3_asymmetry_db"] == pytest.approx(truth, abs=ASYMMETRY_TOLERANCE_DB), row["spacing_hz"]
        # Each product's intercept moves by minus half its IM3 change, apart from a shared offset.
        lower_db, upper_db = memory.im3_change_db(row["spacing_hz"], STRENGTH, POLE_HZ, PHASE_DEG)
        assert row["iip3_upper_dbm"] - row["iip3_lower_dbm"] == pytest.approx(-(upper_db - lower_db) / 2, abs=0.15)
    assert truths[1e6] > 3.0  # the model parts the products most near its pole: the test can fail


def test_the_report_tabulates_both_products_against_spacing(measured):
    rows, page = measured
    assert "IM3 against tone spacing" in page and 'id="spacing"' in page
    at_pole = next(r for r in rows if r["spacing_hz"] == 1e6)
    assert f"<td>{at_pole['im3_asymmetry_db']:+.2f}</td>" in page
