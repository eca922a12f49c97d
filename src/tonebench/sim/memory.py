"""Baseband memory of the simulated DUT: spacing-dependent, asymmetric IM3.

The textbook mechanism for asymmetric IMD in amplifiers (Vuolevi and Rahkonen, "Distortion in RF
Power Amplifiers", Artech House 2003, from memory; also Carvalho and Pedro, 1999): the device's
second-order current at the difference frequency f2 - f1 flows into the bias network, whose
impedance Z(df) depends on the spacing; the baseband voltage it makes modulates the gain, so it
re-mixes with the tones and lands on 2f1 - f2 (with conj(Z): f1 - df) and 2f2 - f1 (with Z:
f2 + df). The two products turn by opposite angles with spacing. Added to the memoryless cubic's
product with a phase between them (the RF side of the re-mixing, e.g. the second-harmonic
termination, turns it by memory_phase_deg), their magnitudes differ: the IM3 asymmetry.

Model (feed-forward, exactly third order): v_b = Z_n(df) * [x^2]_baseband (DC left out: the
supply holds the quiescent point, whose drift with drive is the gain's compression, already in the
nonlinearity), Z_n = 1 / (1 + j df / memory_pole_hz) (one pole, normalised to 1 at 0 Hz), and
y_mem = (3/2) a3 rho e^(j theta) [v_b x]_RF. Then, for any tones (closed form below):
    IM3 upper = C_upper (1 + rho e^(j theta) Z_n(df)),  IM3 lower = C_lower (1 + rho e^(j theta) conj(Z_n(df)))
with C the cubic's own product (3/4) a3 A1 A2^2 (upper) and (3/4) a3 A1^2 A2 (lower): the
product of two cosines with phasors P at f_a and Q at f_b gives PQ/2 at f_a + f_b and P conj(Q)/2 at
f_a - f_b, and [x^2] holds A1 A2 at df.
"""

from __future__ import annotations

import math

import numpy as np

from tonebench.sim import physics


def pole_response(spacing_hz, pole_hz: float):
    """Z_n(df) = 1 / (1 + j df / f_pole): the bias network's normalised impedance at df."""
    return 1.0 / (1.0 + 1j * np.asarray(spacing_hz, dtype=float) / pole_hz)


def im3_factors(spacing_hz, strength: float, pole_hz: float, phase_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper) complex factors on the cubic's IM3 products at this spacing (closed form)."""
    z = pole_response(spacing_hz, pole_hz)
    turn = strength * np.exp(1j * math.radians(phase_deg))
    return 1.0 + turn * np.conj(z), 1.0 + turn * z


def im3_change_db(spacing_hz, strength: float, pole_hz: float, phase_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper) change of each IM3 product (dB) against the memoryless cubic's; the per-product
    input intercept moves by minus half of it (slope 3 against slope 1)."""
    lower, upper = im3_factors(spacing_hz, strength, pole_hz, phase_deg)
    return 20.0 * np.log10(np.abs(lower)), 20.0 * np.log10(np.abs(upper))


def im3_asymmetry_db(spacing_hz, strength: float, pole_hz: float, phase_deg: float) -> np.ndarray:
    """Upper minus lower IM3 (dB) for equal tones: the memory model's truth."""
    lower_db, upper_db = im3_change_db(spacing_hz, strength, pole_hz, phase_deg)
    return upper_db - lower_db


def memory_output_v(x_v: np.ndarray, a3: float, spacing_hz: float, strength: float, pole_hz: float,
                    phase_deg: float) -> np.ndarray:
    """Output phasors (V, bins 0..SIM_POINTS/2, physics' scaling) of the memory term for the input
    waveform x_v sampled as physics.dut_output_spectrum_v samples it."""
    n = physics.SIM_POINTS
    bins = np.arange(n // 2 + 1)
    family = np.rint(bins / physics.TONE_BIN)
    offset = bins - family * physics.TONE_BIN  # bin m*TONE_BIN + i is m*f1 + i*df
    square = np.fft.rfft(x_v * x_v)
    baseband = (family == 0) & (offset > 0)  # DC left out (see the module docstring)
    square = np.where(baseband, square * pole_response(offset * spacing_hz, pole_hz), 0j)
    v_b = np.fft.irfft(square, n=n)
    mixed = np.fft.rfft(v_b * x_v) * (2.0 / n)
    rf = family >= 1
    return np.where(rf, 1.5 * a3 * strength * np.exp(1j * math.radians(phase_deg)) * mixed, 0j)


def dut_memory_spectrum_v(dut, a3: float, spacing_hz: float, tone_low_v: complex, tone_high_v: complex,
                          im3_low_in_v: complex = 0j, im3_high_in_v: complex = 0j) -> np.ndarray:
    """The memory term's output phasors for a DutScenario's memory_* fields (zeros when off)."""
    if dut.memory_strength == 0.0 or spacing_hz <= 0.0:
        return np.zeros(physics.SIM_POINTS // 2 + 1, dtype=complex)
    x_v = physics.input_waveform_v(tone_low_v, tone_high_v, im3_low_in_v, im3_high_in_v)
    return memory_output_v(x_v, a3, spacing_hz, dut.memory_strength, dut.memory_pole_hz, dut.memory_phase_deg)
