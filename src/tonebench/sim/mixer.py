"""A simulated frequency-translating device (mixer) and its LO drive: `[simulation.mixer]`.

Behavioural model, not a circuit: the RF port is a memoryless nonlinearity (physics.Nonlinearity)
with the conversion gain as its gain and an IIP3 set by the LO drive; every product near the
tones is then moved to the IF, |f - f_LO| (difference) or f + f_LO (sum). Products far from the
tones (harmonics, second order, DC) and LO leakage are not modelled.

LO drive: a mixer whose switching devices are starved of LO no longer switches hard, and its
IIP3 falls by several dB per dB of LO below its nominal drive (common practice, from memory);
above nominal it saturates (no further gain in linearity). The closed form used here is a
model, not a measurement of any part:

    IIP3_dBm = iip3_nominal_dbm - starvation_db_per_db * max(0, lo_nominal_dbm - lo_dbm)
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from tonebench.sim import physics

LO_SOURCE_INDEX = 3  # the LO is the bench's third source (sources 1 and 2 are the tones)
LO_ROLE = "lo"
# Product families of physics.bin_frequencies_hz kept at the IF: the one around the tones
# (m = 1: f1, f2, 2f1-f2, 2f2-f1, ...). Others are not modelled for a mixer.
_TONE_FAMILY = 1


class MixerScenario(BaseModel):
    """The mixer in place of the DUT (LO by the bench's simulated "lo" source, index 3)."""

    model_config = ConfigDict(extra="forbid")

    conversion_gain_db: float = Field(-7.0, ge=-40.0, le=40.0)
    iip3_nominal_dbm: float = Field(15.0, ge=-40.0, le=60.0)
    lo_nominal_dbm: float = Field(7.0, ge=-30.0, le=30.0)
    starvation_db_per_db: float = Field(3.0, ge=0.0, le=20.0)
    # Loss from the LO source's connector to the mixer's LO port (positive dB).
    lo_loss_db: float = Field(0.0, ge=0.0, le=40.0)
    nf_db: float = Field(7.0, ge=0.0, le=40.0)
    output: Literal["difference", "sum"] = "difference"


def iip3_at_lo_dbm(mixer: MixerScenario, lo_port_dbm: float) -> float:
    """RF-input-referred IIP3 (dBm) at this LO drive at the mixer's LO port (the module's closed form)."""
    starved_db = max(0.0, mixer.lo_nominal_dbm - lo_port_dbm)
    return mixer.iip3_nominal_dbm - mixer.starvation_db_per_db * starved_db


def rf_model(mixer: MixerScenario, lo_port_dbm: float) -> physics.Nonlinearity:
    """The RF-port nonlinearity: conversion gain as its gain, the LO-dependent IIP3 (pure cubic)."""
    return physics.dut_nonlinearity(mixer.conversion_gain_db, iip3_at_lo_dbm(mixer, lo_port_dbm))


def if_freq_hz(rf_freq_hz, lo_freq_hz: float, output: str):
    """IF of each RF frequency: |f - f_LO| for the difference output, f + f_LO for the sum."""
    rf_freq_hz = np.asarray(rf_freq_hz, dtype=float)
    return np.abs(rf_freq_hz - lo_freq_hz) if output == "difference" else rf_freq_hz + lo_freq_hz


def translated_spectrum(mixer: MixerScenario, lo_freq_hz: float, lo_port_dbm: float, f_low_hz: float,
                        f_high_hz: float, tone_low_v: complex, tone_high_v: complex,
                        im3_low_in_v: complex = 0j, im3_high_in_v: complex = 0j) -> tuple[np.ndarray, np.ndarray]:
    """(IF frequency per bin, output phasors V) for two RF tones; bins outside the tone family are 0.

    The bins are those of physics.dut_output_spectrum_v, so physics.product_bin still names each
    product (its IF frequency is if_freq_hz of its RF frequency)."""
    amp_v = physics.dut_output_spectrum_v(rf_model(mixer, lo_port_dbm), tone_low_v, tone_high_v,
                                          im3_low_in_v, im3_high_in_v)
    rf_hz = physics.bin_frequencies_hz(f_low_hz, f_high_hz - f_low_hz)
    family = np.rint(np.arange(amp_v.size) / physics.TONE_BIN)
    freq_hz = if_freq_hz(rf_hz, lo_freq_hz, mixer.output)
    keep = (family == _TONE_FAMILY) & (freq_hz > 0.0)
    return np.where(keep, freq_hz, 0.0), np.where(keep, amp_v, 0j)
