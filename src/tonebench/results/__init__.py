"""Between the store and the analysis: stored points to analysis inputs (re-referred when asked),
and the analysis outputs back to stored results, flags and verdicts.

May import store/, plan/, planes/, calibration/, catalog/limits and analysis/; never instruments, a run or report/.
"""
