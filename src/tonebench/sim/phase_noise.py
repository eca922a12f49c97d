"""The simulated analyzer's LO phase noise and the reciprocal mixing it causes.

The first LO's phase noise L(f) (dBc/Hz at offset f) is copied onto every line the mixer converts:
a line of power P leaves a noise skirt of density P L(|f - f_line|) around itself, so a weak product
at offset df from a strong tone reads that skirt through the RBW filter as noise: P + L(df) +
10 log10(noise bandwidth) (reciprocal mixing; common practice, from memory). Both the line and its
skirt see the input attenuation, so the skirt referred to the input is the line's input power + L.

Profile: phase_noise_dbc_per_hz at phase_noise_offset_hz, falling 20 dB per decade beyond it (the
1/f^2 region of an oscillator outside its loop bandwidth, Leeson's model, from memory) and flat
inside it (the synthesizer's loop plateau).
"""

from __future__ import annotations

import numpy as np


def lo_phase_noise_dbc_per_hz(offset_hz, dbc_per_hz: float, at_offset_hz: float) -> np.ndarray:
    """L(offset) in dBc/Hz: flat up to at_offset_hz, then -20 dB per decade."""
    offset_hz = np.abs(np.asarray(offset_hz, dtype=float))
    return dbc_per_hz - 20.0 * np.log10(np.fmax(offset_hz, at_offset_hz) / at_offset_hz)


def with_reciprocal_mixing(noise_dbm_per_hz, trace_freq_hz, line_freq_hz, line_power_w, analyzer) -> np.ndarray:
    """The trace's noise density (dBm/Hz) with every line's phase-noise skirt added in power;
    unchanged when the AnalyzerScenario gives no phase_noise_dbc_per_hz (an ideal LO)."""
    noise_dbm_per_hz = np.asarray(noise_dbm_per_hz, dtype=float)
    if analyzer.phase_noise_dbc_per_hz is None:
        return noise_dbm_per_hz
    line_power_w = np.asarray(line_power_w, dtype=float)
    strong = line_power_w > 0.0
    trace_freq_hz = np.asarray(trace_freq_hz, dtype=float)
    offsets_hz = trace_freq_hz[:, None] - np.asarray(line_freq_hz, dtype=float)[strong][None, :]
    skirt_w_per_hz = 10.0 ** (lo_phase_noise_dbc_per_hz(offsets_hz, analyzer.phase_noise_dbc_per_hz,
                                                        analyzer.phase_noise_offset_hz) / 10.0) @ line_power_w[strong]
    total_mw_per_hz = 10.0 ** (noise_dbm_per_hz / 10.0) + 1e3 * skirt_w_per_hz
    return 10.0 * np.log10(total_mw_per_hz)
