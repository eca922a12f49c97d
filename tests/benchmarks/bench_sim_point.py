"""Time the simulated bench's physics for one point (six sweeps) and print it.

    python tests/benchmarks/bench_sim_point.py
"""

import statistics
import time

from tonebench.sim.signal_chain import SimBench
from tonebench.sim.scenario import Scenario

CENTER_HZ, SPACING_HZ = 2.45e9, 1e6


def main(repeats: int = 200) -> None:
    bench = SimBench(Scenario())
    f1_hz, f2_hz = CENTER_HZ - SPACING_HZ / 2, CENTER_HZ + SPACING_HZ / 2
    for index, freq_hz in ((1, f1_hz), (2, f2_hz)):
        bench.set_source(index, freq_hz=freq_hz, power_dbm=-20.0, rf_on=True)
        bench.settle_source(index)
    reads_hz = (f1_hz, f2_hz, 2 * f1_hz - f2_hz, 2 * f2_hz - f1_hz, 2 * f1_hz - f2_hz, 2 * f2_hz - f1_hz)
    analyzer = bench.analyzer
    analyzer.span_hz, analyzer.rbw_hz = 10e3, 1e3
    durations_s = []
    for _ in range(repeats):
        started_s = time.perf_counter()
        for freq_hz in reads_hz:
            analyzer.center_hz = freq_hz
            bench.sweep()
        durations_s.append(time.perf_counter() - started_s)
    print(f"simulated point (6 sweeps): median {statistics.median(durations_s) * 1e3:.2f} ms, "
          f"95th percentile {sorted(durations_s)[int(0.95 * repeats)] * 1e3:.2f} ms over {repeats} points")


if __name__ == "__main__":
    main()
