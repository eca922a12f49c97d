from pathlib import Path

import pytest

PROJECT_ROOT = Path(__file__).resolve().parent.parent
SAMPLE_RUNS = PROJECT_ROOT / "sample_runs"


@pytest.fixture
def demo_plan_text() -> str:
    return (SAMPLE_RUNS / "demo_plan.toml").read_text()


@pytest.fixture
def sim_bench_text() -> str:
    return (SAMPLE_RUNS / "sim_bench.toml").read_text()
