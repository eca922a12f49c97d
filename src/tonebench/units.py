"""Unit conversions used by every layer (50 ohm system, powers in dBm)."""

from __future__ import annotations

import numpy as np

SYSTEM_IMPEDANCE_OHM = 50.0
BOLTZMANN_J_PER_K = 1.380649e-23  # exact, SI definition (2019)
KELVIN_AT_0C = 273.15  # exact, by the definition of the Celsius scale
REFERENCE_TEMPERATURE_K = 290.0  # IEEE standard noise temperature


def dbm_to_watt(power_dbm):
    return 1e-3 * 10.0 ** (np.asarray(power_dbm, dtype=float) / 10.0)


def watt_to_dbm(power_w):
    return 10.0 * np.log10(np.asarray(power_w, dtype=float) / 1e-3)


def dbm_to_vpeak(power_dbm):
    """Peak voltage of a sine carrying power_dbm into 50 ohm: P = Vpeak^2 / (2 R)."""
    return np.sqrt(2.0 * SYSTEM_IMPEDANCE_OHM * dbm_to_watt(power_dbm))


def vpeak_to_dbm(vpeak_v):
    return watt_to_dbm(np.abs(np.asarray(vpeak_v)) ** 2 / (2.0 * SYSTEM_IMPEDANCE_OHM))


def thermal_noise_dbm_per_hz(temperature_k: float = REFERENCE_TEMPERATURE_K) -> float:
    """Available thermal noise density kT, in dBm/Hz (about -174 at 290 K)."""
    return float(watt_to_dbm(BOLTZMANN_J_PER_K * temperature_k))


def db_sum(*levels_dbm):
    """Power sum of incoherent contributions given in dBm (or any dB unit)."""
    return watt_to_dbm(sum(dbm_to_watt(x) for x in levels_dbm))


def format_freq(freq_hz: float, decimals: int | None = None) -> str:
    """Frequency in the largest unit that keeps the number >= 1, e.g. '2.450 GHz', '1 MHz'."""
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            value = freq_hz / scale
            break
    else:
        value, unit = freq_hz, "Hz"
    return f"{value:.{decimals}f} {unit}" if decimals is not None else f"{value:g} {unit}"


def format_duration(seconds: float) -> str:
    """A time span as one reads it: '25 ms', '7.2 s', '12 min 5 s', '3 h 20 min'."""
    if seconds < 1.0:
        return f"{seconds * 1e3:.3g} ms"
    if seconds < 60.0:
        return f"{seconds:.3g} s"
    minutes, rest_s = divmod(round(seconds), 60)
    if minutes < 60:
        return f"{minutes} min {rest_s} s" if rest_s else f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes} min" if minutes else f"{hours} h"
