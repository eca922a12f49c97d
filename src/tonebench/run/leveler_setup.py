"""The run's leveler: made when the bench has a power meter and leveling is on, after checking
the meter can read every tone where leveling reads it."""

from __future__ import annotations

from tonebench.calibration.leveling import Leveler
from tonebench.config.bench_file import LoadedBench
from tonebench.errors import InputError
from tonebench.units import format_freq


def make_leveler(bench: LoadedBench, open_instruments, points: list, plan_origin: str) -> Leveler | None:
    """A leveler when the bench has a power meter and leveling is on; checks the meter can read
    every tone at its sweep's highest power (where leveling reads it)."""
    settings = bench.settings.leveling
    meter = open_instruments.power_meter
    if meter is None or not settings.enabled:
        return None
    _check_meter_freqs(meter, points, plan_origin)
    _check_meter_powers(meter, points, plan_origin)
    return Leveler(meter, settings.tolerance_db, settings.max_iterations, settings.max_correction_db)


def _check_meter_freqs(meter, points: list, plan_origin: str) -> None:
    for point in points:
        for freq_hz in (point.f1_hz, point.f2_hz):
            if not meter.min_freq_hz <= freq_hz <= meter.max_freq_hz:
                raise InputError(
                    f"{plan_origin}: tone {format_freq(freq_hz)} outside the power meter's {format_freq(meter.min_freq_hz)} to "
                    f"{format_freq(meter.max_freq_hz)}; set [leveling] enabled = false to run without leveling"
                )


def _check_meter_powers(meter, points: list, plan_origin: str) -> None:
    tops: dict[tuple, float] = {}
    for point in points:
        key = (point.center_hz, point.spacing_hz, point.bias_v)
        tops[key] = max(tops.get(key, point.tone_dbm), point.tone_dbm)
    for (center_hz, _, _), top_dbm in tops.items():
        if not meter.min_power_dbm <= top_dbm <= meter.max_power_dbm:
            raise InputError(
                f"{plan_origin}: leveling reads each tone at its sweep's highest power, {top_dbm:.2f} dBm at "
                f"{format_freq(center_hz)}; the power meter reads {meter.min_power_dbm:.2f} to {meter.max_power_dbm:.2f} dBm "
                "(or set [leveling] enabled = false)"
            )
