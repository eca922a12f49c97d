"""The analyzer's detector and trace averaging: which optional dialect operations set them, and
what a point records of them (extra_json), so the analysis can correct noise by the mode in force.

A trace average of `count` sweeps is started by one INITiate and waited for by the *OPC? after it
(the analyzer's sweep timeout is scaled by the count). The operations are sent with the analyzer's
prepare(), so a restore after a reset or a reopened connection sends them again.
"""

from __future__ import annotations

from tonebench.config.detector_settings import DetectorSetup
from tonebench.errors import InputError

__all__ = ["DetectorSetup", "point_extra", "steps_for", "use_detector"]  # DetectorSetup re-exported


def steps_for(setup: DetectorSetup) -> list[tuple[str, dict]]:
    steps: list[tuple[str, dict]] = [(f"detector_{setup.detector}", {}), (f"average_{setup.average_type}", {})]
    if setup.count > 1:
        steps += [("set_average_count", {"count": setup.count}), ("average_on", {})]
    else:
        steps.append(("average_off", {}))
    return steps


def use_detector(analyzer, setup: DetectorSetup | None) -> None:
    """Have `analyzer` (SpectrumAnalyzer) send these settings with every prepare(); None leaves the
    instrument's own (today's behaviour). A dialect without an operation is refused in one line."""
    if setup is None:
        return
    dialect = analyzer.instrument.dialect
    steps = steps_for(setup)
    missing = [op for op, _ in steps if op not in dialect.operations]
    if missing:
        raise InputError(f"analyzer dialect {dialect.name} has no operation {missing[0]}, which the plan's "
                         f"detector '{setup.detector}', averaging '{setup.average_type}', average_count "
                         f"{setup.count} need; add it to the dialect or leave those [analyzer] keys out")
    analyzer.detector_steps = steps
    analyzer.sweeps_per_read = setup.count
    analyzer.detector_setup = setup


def point_extra(analyzer) -> dict:
    """The extra_json entries of a point read with `analyzer`: none when the plan set no detector."""
    setup = getattr(analyzer, "detector_setup", None)
    return {} if setup is None else setup.extra()
