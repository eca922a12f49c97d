"""Time the README's demo end to end (simulated bench over TCP, SQLite, report) and print it.

    python tests/benchmarks/bench_demo.py [repeats]
"""

import subprocess
import sys
import tempfile
import time


def main() -> None:
    repeats = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    durations_s = []
    for _ in range(repeats):
        with tempfile.TemporaryDirectory() as folder:
            started_s = time.perf_counter()
            subprocess.run([sys.executable, "-m", "tonebench", "demo", "--out", folder], check=True, capture_output=True)
            durations_s.append(time.perf_counter() - started_s)
    durations_s.sort()
    print(f"tonebench demo: {repeats} runs, median {durations_s[len(durations_s) // 2]:.2f} s, "
          f"fastest {durations_s[0]:.2f} s, slowest {durations_s[-1]:.2f} s")


if __name__ == "__main__":
    main()
