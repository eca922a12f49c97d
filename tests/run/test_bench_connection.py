"""A run's bench connection: the sources carry the run's power guard from their construction, so
no source power command, the first included, reaches an instrument past the bench file's limits."""

from __future__ import annotations

from contextlib import ExitStack

import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.errors import LimitError
from tonebench.run.bench_connection import connect_bench
from tonebench.run.calibration_choice import offsets_from_bench

FREQ_HZ = 2.45e9


def test_sources_refuse_a_tone_over_the_bench_limit_from_their_first_command():
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")  # [limits] max_tone_dbm = 0 dBm at the DUT input
    offsets = offsets_from_bench(bench)
    started = []
    with ExitStack() as stack:
        instruments, _relay, _supervision = connect_bench(stack, bench, started.append, lambda line: None, offsets)
        sim = started[0]
        lines_before = len(sim.bench.command_log)
        # 2 dB over the limit at the DUT input: the source setting adds the input loss back.
        over_dbm = 2.0 + offsets["in1"].loss_db(FREQ_HZ)
        with pytest.raises(LimitError, match="source1"):
            instruments.source1.set_tone(FREQ_HZ, over_dbm)
        assert len(sim.bench.command_log) == lines_before  # refused before any line left
        assert sim.bench.source(1).commanded.power_dbm != pytest.approx(over_dbm)
        instruments.source1.set_tone(FREQ_HZ, over_dbm - 4.0)  # 2 dB under the limit: sent
        assert sim.bench.source(1).commanded.power_dbm == pytest.approx(over_dbm - 4.0)


def test_without_offsets_no_guard_is_armed():
    # Calibration jobs and `bench` commands connect without a run's losses: only the dialect's range holds.
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")
    with ExitStack() as stack:
        instruments, _relay, _supervision = connect_bench(stack, bench, lambda sim: None, lambda line: None)
        assert instruments.source1.power_guard is None
