"""The one prediction of the power at the analyzer input, for the plan check and the run-time guard.

A loss table whose output loss differs between f1 and f2 tells the definitions apart: each tone
arrives through the output loss at its OWN frequency, and the check takes the higher arrival (plus
10 log10 2 = 3.0103 dB for the two tones together). Predicting from the loss at f1 only, or from
the larger of the two losses, gives 4 dB less here and would let a point through that overdrives
the analyzer. Expected values are worked by hand in the comments.
"""

from __future__ import annotations

import pytest

from tonebench.config.bench_file import BenchLimits
from tonebench.errors import InputError, LimitError
from tonebench.plan.limits import (
    SourceRange,
    analyzer_limit_dbm,
    check_plan,
    power_guard,
    predict_levels,
    predicted_analyzer_input_dbm,
)
from tonebench.plan.points import PlannedPoint
from tonebench.planes.loss_table import LossTable

F1_HZ, F2_HZ = 2.4995e9, 2.5005e9  # centre 2.5 GHz, 1 MHz spacing
TWO_TONES_DB = 3.0103  # 10 log10(2), to 4 decimals


def _offsets() -> dict[str, LossTable]:
    out = LossTable.from_rows("out", [[F1_HZ, 6.0], [F2_HZ, 2.0]], "test")  # 6 dB at f1, 2 dB at f2
    flat = [[2.4e9, 5.0], [2.6e9, 5.0]]
    return {"in1": LossTable.from_rows("in1", flat, "test"), "in2": LossTable.from_rows("in2", flat, "test"), "out": out}


def _limits(max_analyzer_input_dbm: float) -> BenchLimits:
    return BenchLimits(max_tone_dbm=0.0, max_analyzer_input_dbm=max_analyzer_input_dbm, expected_gain_db=20.0)


POINT = PlannedPoint(0, 2.5e9, 1.0e6, -10.0)
SOURCES = (SourceRange("source1", -60.0, 20.0), SourceRange("source2", -60.0, 20.0))


def test_each_tone_arrives_through_the_output_loss_at_its_own_frequency():
    out = _offsets()["out"]
    # f1: -10 + 20 - 6 = 4 dBm; f2: -10 + 20 - 2 = 8 dBm; the higher, 8, plus 3.0103 dB.
    both = predicted_analyzer_input_dbm(((-10.0, F1_HZ), (-10.0, F2_HZ)), 20.0, out)
    assert both == pytest.approx(8.0 + TWO_TONES_DB, abs=1e-4)
    assert predicted_analyzer_input_dbm(((-10.0, F1_HZ),), 20.0, out) == pytest.approx(4.0 + TWO_TONES_DB, abs=1e-4)
    assert predict_levels(POINT, _offsets(), _limits(30.0)).analyzer_input_dbm == pytest.approx(both, abs=1e-12)


def test_the_plan_check_refuses_what_the_higher_arrival_would_overdrive():
    # 11.01 dBm predicted: refused under a 10 dBm limit (a prediction from f1's 6 dB loss, 7.01 dBm, would pass).
    with pytest.raises(InputError, match=r"would put 11\.01 dBm into the analyzer .* the limit is 10\.00 dBm"):
        check_plan([POINT], _offsets(), _limits(10.0), SOURCES, None, "plan")
    check_plan([POINT], _offsets(), _limits(11.5), SOURCES, None, "plan")


def test_the_run_time_guard_refuses_the_same_point_at_the_same_limit():
    guard = power_guard(_offsets(), _limits(10.0), None)
    # Source settings: -10 dBm at the plane + 5 dB input loss = -5 dBm each.
    guard("source1", F1_HZ, -5.0)  # its own tone through 6 dB: 4 + 3.01 = 7.01 dBm, under 10
    with pytest.raises(LimitError, match=r"source2: -5\.00 dBm .* would put 11\.01 dBm into the analyzer"):
        guard("source2", F2_HZ, -5.0)  # through 2 dB: 8 + 3.01 = 11.01 dBm
    power_guard(_offsets(), _limits(11.5), None)("source2", F2_HZ, -5.0)


def test_the_limit_is_the_lower_of_the_bench_file_and_the_analyzer_damage_level():
    assert analyzer_limit_dbm(_limits(10.0), None) == 10.0
    assert analyzer_limit_dbm(_limits(10.0), 7.0) == 7.0
    assert analyzer_limit_dbm(_limits(10.0), 25.0) == 10.0
    # The damage level is checked too: 11.01 dBm under a 30 dBm bench limit but an 11 dBm damage level.
    with pytest.raises(InputError, match=r"the limit is 11\.00 dBm"):
        check_plan([POINT], _offsets(), _limits(30.0), SOURCES, 11.0, "plan")
