"""Seeded runs of a clean bench end to end (runner, simulated bench over TCP, SQLite, analysis):
how many carry an analyzer or source flag, how many intercepts are refused, and the IIP3 errors.

    python tests/benchmarks/bench_clean_flags.py [runs]     (default 100)

The suite runs a few of the same seeds (tests/test_flag_meaning.py); this prints the full figures.
"""

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from cleanruns import clean_runs  # noqa: E402


def main() -> None:
    count = int(sys.argv[1]) if len(sys.argv) > 1 else 100
    started_s = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder:
        outcomes = clean_runs(Path(folder), range(count))
    elapsed_s = time.perf_counter() - started_s
    flagged = [o for o in outcomes if o.system_flagged]
    refused = [o for o in outcomes if o.iip3_dbm is None]
    errors = np.array([o.error_db for o in outcomes if o.error_db is not None])
    covered = sum(1 for o in outcomes if o.error_db is not None and o.bound_db is not None
                  and abs(o.error_db) <= o.bound_db)
    print(f"clean runs: {count} in {elapsed_s:.1f} s")
    print(f"  with an analyzer or source flag (result, or point other than noise): {len(flagged)}"
          + (f" (seeds {[o.device.seed for o in flagged]})" if flagged else ""))
    print(f"  with any result flag: {sum(1 for o in outcomes if o.result_flags)}")
    print(f"  intercepts refused: {len(refused)}" + (f" (seeds {[o.device.seed for o in refused]})" if refused else ""))
    if errors.size:
        print(f"  IIP3 error: median {np.median(errors):+.3f} dB, worst {errors[np.argmax(np.abs(errors))]:+.3f} dB; "
              f"within the bound {covered} of {errors.size}")


if __name__ == "__main__":
    main()
