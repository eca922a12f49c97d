"""The simulated parts' true values, for tests (never reachable through SCPI)."""

from __future__ import annotations

import numpy as np

from tonebench.sim import memory, physics
from tonebench.sim import mixer as sim_mixer
from tonebench.sim.scenario import Scenario

PATHS = ("in1", "in2", "out")


class BenchTruth:
    """True values of the simulated parts, for tests (never reachable through SCPI)."""

    def __init__(self, scenario: Scenario):
        self._scenario = scenario

    def true_gain_db(self, freq_hz):
        dut = self._scenario.dut
        return _float_or_array(physics.linear_in_db(dut.gain_db, dut.gain_slope_db_per_ghz, dut.ref_freq_hz, freq_hz))

    def true_iip3_dbm(self, freq_hz):
        dut = self._scenario.dut
        return _float_or_array(physics.linear_in_db(dut.iip3_dbm, dut.iip3_slope_db_per_ghz, dut.ref_freq_hz, freq_hz))

    def true_iip2_dbm(self, freq_hz):
        """Second-order input intercept (dBm); the scenario keeps it flat with frequency."""
        return _float_or_array(np.full(np.shape(freq_hz), float(self._scenario.dut.iip2_dbm)))

    def true_oip3_dbm(self, freq_hz):
        return _float_or_array(np.asarray(self.true_iip3_dbm(freq_hz)) + np.asarray(self.true_gain_db(freq_hz)))

    def true_mixer_iip3_dbm(self, lo_dbm: float) -> float:
        """RF-referred IIP3 (dBm) of the simulated mixer with the LO source at lo_dbm (its connector)."""
        mixer = self._scenario.mixer
        return sim_mixer.iip3_at_lo_dbm(mixer, lo_dbm - mixer.lo_loss_db)

    def true_p1db_dbm(self, freq_hz: float) -> float:
        """Input-referred single-tone 1 dB compression point, found numerically from the model."""
        return physics.p1db_input_dbm(self.dut_model(freq_hz))

    def true_loss_db(self, path: str, freq_hz):
        """Loss (positive dB) of path "in1", "in2" or "out"; a passive path never turns into gain."""
        if path not in PATHS:
            raise ValueError(f"true_loss_db: path {path!r} is not one of {', '.join(PATHS)}")
        paths = self._scenario.paths
        loss_db = getattr(paths, f"{path}_loss_db")
        slope_db_per_ghz = getattr(paths, f"{path}_slope_db_per_ghz")
        loss_db = physics.linear_in_db(loss_db, slope_db_per_ghz, paths.ref_freq_hz, freq_hz)
        return _float_or_array(np.maximum(0.0, loss_db))

    def true_im3_change_db(self, spacing_hz) -> tuple:
        """(lower, upper) change (dB) of each IM3 product against the memoryless cubic's at this
        spacing, from the memory model's closed form (sim/memory.py); zeros without memory."""
        dut = self._scenario.dut
        lower, upper = memory.im3_change_db(spacing_hz, dut.memory_strength, dut.memory_pole_hz, dut.memory_phase_deg)
        return _float_or_array(lower), _float_or_array(upper)

    def true_im3_asymmetry_db(self, spacing_hz):
        """Upper minus lower IM3 (dB) at this spacing for equal tones: the memory model's truth."""
        lower, upper = self.true_im3_change_db(spacing_hz)
        return _float_or_array(np.asarray(upper) - np.asarray(lower))

    def dut_model(self, freq_hz: float) -> physics.Nonlinearity:
        """The DUT nonlinearity at freq_hz (a two-tone point uses its centre frequency)."""
        dut = self._scenario.dut
        backoff_db = None if dut.p1db_dbm is None else dut.iip3_dbm - dut.p1db_dbm
        return physics.dut_nonlinearity(self.true_gain_db(freq_hz), self.true_iip3_dbm(freq_hz), backoff_db,
                                        dut.iip2_dbm, dut.iip5_dbm)


def _float_or_array(value):
    value = np.asarray(value, dtype=float)
    return float(value) if value.ndim == 0 else value
