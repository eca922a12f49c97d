"""Detector and trace-averaging operations (instruments/detector_setup.py) and the plan keys that ask for them."""

from types import SimpleNamespace

import pytest

from tonebench.config.plan_file import AnalyzerSettings
from tonebench.errors import InputError
from tonebench.instruments.detector_setup import (
    DetectorSetup,
    point_extra,
    steps_for,
    use_detector,
)
from tonebench.instruments.dialect import load_dialect


def _analyzer(dialect):
    return SimpleNamespace(instrument=SimpleNamespace(dialect=dialect), detector_steps=[], sweeps_per_read=1)


def test_plan_keys_default_to_none_and_fill_each_other():
    assert AnalyzerSettings().detector_setup is None  # today's behaviour: nothing sent
    assert AnalyzerSettings(average_count=8).detector_setup == DetectorSetup("rms", "power", 8)
    with pytest.raises(ValueError):
        AnalyzerSettings(detector="quasi-peak")


def test_generic_analyzer_sets_detector_and_count():
    analyzer = _analyzer(load_dialect("generic-analyzer"))
    use_detector(analyzer, DetectorSetup("sample", "log", 16))
    assert analyzer.detector_steps == [("detector_sample", {}), ("average_log", {}),
                                       ("set_average_count", {"count": 16}), ("average_on", {})]
    assert analyzer.sweeps_per_read == 16
    assert point_extra(analyzer) == {"detector": "sample", "average_type": "log", "average_count": 16}
    assert steps_for(DetectorSetup("rms", "power", 1))[-1] == ("average_off", {})


def test_a_dialect_without_the_operations_is_refused_in_one_line():
    analyzer = _analyzer(load_dialect("verbose-analyzer"))
    with pytest.raises(InputError, match="has no operation detector_peak") as info:
        use_detector(analyzer, DetectorSetup("peak", "power", 1))
    assert "\n" not in str(info.value)
    assert point_extra(analyzer) == {}
