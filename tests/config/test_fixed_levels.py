"""Fixed tone levels in a plan's [sweep] and the [results] choice of plan and bench file."""

from __future__ import annotations

import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.config.results_choice import results_choice
from tonebench.errors import InputError

PLAN_TEXT = (SAMPLE_RUNS / "demo_plan.toml").read_text()
BENCH_TEXT = (SAMPLE_RUNS / "sim_bench.toml").read_text()
RAMP = "tone_start_dbm = -40.0       # per tone, at the DUT input plane\ntone_stop_dbm = -8.0\ntone_step_dbm = 2.0\n"


def plan_with(tmp_path, sweep_lines: str, extra: str = ""):
    assert RAMP in PLAN_TEXT
    path = tmp_path / "plan.toml"
    path.write_text(PLAN_TEXT.replace(RAMP, sweep_lines) + extra)
    return path


def test_fixed_levels_are_iterated_rising(tmp_path):
    sweep = load_plan(plan_with(tmp_path, "tone_levels_dbm = [-20.0, -30.0]\n")).settings.sweep
    assert sweep.tone_levels() == [-30.0, -20.0] and sweep.tone_level_count() == 2


@pytest.mark.parametrize("lines, expected", [
    ("tone_levels_dbm = [-20.0]\ntone_start_dbm = -30.0\n", "tone_levels_dbm is given with tone_start_dbm"),
    ("tone_start_dbm = -30.0\n", "[sweep] has tone_start_dbm; give tone_start_dbm, tone_stop_dbm and tone_step_dbm"),
    ("", "[sweep] has no tone powers"),
    ("tone_levels_dbm = [-20.0, -20.0]\n", "tone_levels_dbm repeats a level"),
    ("tone_levels_dbm = [-20.0, 40.0]\n", "tone_levels_dbm value 40 dBm outside -150..30 dBm"),
])
def test_tone_forms_are_refused_in_one_line(tmp_path, lines, expected):
    with pytest.raises(InputError) as caught:
        load_plan(plan_with(tmp_path, lines))
    assert expected in str(caught.value) and "\n" not in str(caught.value)


def bench_with(tmp_path, extra: str = ""):
    path = tmp_path / "bench.toml"
    path.write_text(BENCH_TEXT + extra)
    return load_bench(path).settings


def test_plan_choice_wins_over_the_bench_and_the_defaults(tmp_path):
    ramp = load_plan(plan_with(tmp_path, RAMP)).settings
    fixed = load_plan(plan_with(tmp_path, "tone_levels_dbm = [-25.0]\n")).settings
    worse_plan = load_plan(plan_with(tmp_path, RAMP, '\n[results]\nintercept = "worse"\nper_level = true\n')).settings
    plain_bench = bench_with(tmp_path)
    worse_bench = bench_with(tmp_path, '\n[results]\nintercept = "worse"\n')
    assert results_choice(ramp, plain_bench) == {"intercept": "mean", "per_level": False}
    assert results_choice(fixed, plain_bench) == {"intercept": "mean", "per_level": True}
    assert results_choice(ramp, worse_bench) == {"intercept": "worse", "per_level": False}
    assert results_choice(worse_plan, plain_bench) == {"intercept": "worse", "per_level": True}
    mean_plan = load_plan(plan_with(tmp_path, RAMP, '\n[results]\nintercept = "mean"\n')).settings
    assert results_choice(mean_plan, worse_bench)["intercept"] == "mean"


def test_unknown_convention_is_refused(tmp_path):
    with pytest.raises(InputError) as caught:
        load_plan(plan_with(tmp_path, RAMP, '\n[results]\nintercept = "best"\n'))
    assert "results.intercept" in str(caught.value) and "'mean' or 'worse'" in str(caught.value)
