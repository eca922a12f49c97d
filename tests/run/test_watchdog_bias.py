"""A watchdog trip on a biased bench: with the run's thread stuck in an instrument call, the
watchdog's own thread switches RF off and then brings the bias down in its order, read from the
simulated supplies while the run is still stuck (issue 11: bias off on every way out)."""

from __future__ import annotations

import subprocess
import sys
import time

from sim_runs import rf_is_off
from test_chamber import chamber_lab
from test_rf_off_paths import both_on, finish, stored_run, wait_for

from tonebench.sim.faults import FaultSpec

# The analyzer answers again only after this: well after the watchdog trips (its limit is
# watchdog_s = 1 s raised to cover the analyzer's own query timeout and retry, about 10 s).
STALL_S = 20.0


def _outputs_on(sim) -> list[bool]:
    return [supply.channel(1).output_on for supply in sim.bench.supplies.values()]


def test_the_watchdog_brings_the_bias_down_while_the_run_is_stuck(tmp_path):
    sim = chamber_lab(tmp_path, 25.0)
    bench = tmp_path / "bench.toml"
    assert "[unattended]" not in bench.read_text()
    bench.write_text(bench.read_text() + "\n[unattended]\nwatchdog_s = 1.0\n")
    try:
        sim.faults.add(FaultSpec(instrument="analyzer", kind="stall", on="CALC:MARK1:Y?", nth=6, duration_s=STALL_S))
        proc = subprocess.Popen([sys.executable, "-m", "tonebench", "run", "plan.toml", "--bench", "bench.toml",
                                 "--db", "t.db"], cwd=tmp_path, text=True, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE)
        wait_for(lambda: both_on(sim) and all(_outputs_on(sim)), proc, "RF and bias on")
        wait_for(lambda: sim.faults.fired, proc, "the analyzer stalled")
        stalled_s = time.monotonic()
        # While the analyzer is still silent, the run's thread waits in its read: only the
        # watchdog's thread can have switched RF and bias off.
        wait_for(lambda: rf_is_off(sim) and not any(_outputs_on(sim)), proc, "RF and bias off by the watchdog")
        off_after_s = time.monotonic() - stalled_s
        assert off_after_s < STALL_S - 2.0 and proc.poll() is None, off_after_s
        drain = sim.bench.supplies["drain"]
        assert drain.channel(1).set_voltage_v == 0.0  # ramped down before its output went off
        code, _stdout, stderr = finish(proc)
        assert code == 1, stderr
        _guid, status, reason, events, _points = stored_run(f"sqlite:///{tmp_path / 't.db'}")
        assert status == "aborted" and reason.startswith("watchdog: no progress for")
        watchdog = [message for kind, message in events if kind == "watchdog"]
        assert len(watchdog) == 1 and watchdog[0].endswith("RF off at source1, source2 (read back); "
                                                           "bias switched off in order"), events
        assert not any(_outputs_on(sim)) and rf_is_off(sim)
    finally:
        sim.close()
