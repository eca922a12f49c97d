"""The characterization catalog: device registry (devices), spec limits and verdicts (limits),
result queries (query), moving runs between databases (transfer: format, export, import), and
realistic synthetic rows for tests and benchmarks (synthetic).

May import store/, config/ and the top-level errors and units; never instruments, results, report, a run
or cli/. Its pages (the comparison report) are drawn in report/.
"""
