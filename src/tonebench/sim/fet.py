"""A simulated small-signal FET: drain current against gate voltage and temperature, and the truth
(g1, g2, g3, the g3 zero, the IIP3 window, the zero's drift) that tests compare measurements with.

Model: the EKV forward-saturation interpolation (Enz, Krummenacher and Vittoz, "An analytical MOS
transistor model valid in all regions of operation...", Analog Integrated Circuits and Signal
Processing 8, 1995; cited from memory), valid from weak to strong inversion with one smooth
function, with the drain voltage assumed high enough for saturation:

    x = (Vgs - Vt) / (2 n Ut),   s = ln(1 + exp(x)),   Id = Is s^2 / (1 + theta * 2 n Ut s)

2 n Ut s is the softplus overdrive: Vgs - Vt in strong inversion, exponentially small in weak
inversion, so mobility degradation (the 1 / (1 + theta Vov) factor) acts only in strong inversion
and the model stays smooth. Weak inversion expands (g3 > 0), strong inversion with degradation
compresses (g3 < 0), so g3 crosses zero once in between: the linearity sweet spot.

Temperature: Ut = kT/q; Vt(T) = vt0_v + dvt_dt_v_per_k (T - T0) (about -1 to -2 mV/K for common
processes, from memory); mobility mu ~ (T/T0)^-1.5 (phonon scattering, textbook exponent, from
memory). The specific current is Is = 2 n mu Cox (W/L) Ut^2 in EKV, so it scales as mu(T) Ut(T)^2.
A scale factor on Id cannot move the g3 zero: only Vt, Ut and theta do.

Derivatives in closed form (chain rule through s(x(Vgs)); checked against sympy in the tests):
with w = 1/(1 + b s), b = theta 2 n Ut, a = 1/(2 n Ut), sigma the logistic function,
    s' = sigma, s'' = sigma (1 - sigma), s''' = -s'' tanh(x/2)
    F' = Is s w^2 (2 + b s), F'' = 2 Is w^3, F''' = -6 Is b w^4      (F(s) = Is s^2 w)
    dId/dV = a F' s',  d2Id/dV2 = a^2 (F'' s'^2 + F' s''),  d3Id/dV3 = a^3 (F''' s'^3 + 3 F'' s' s'' + F' s''')
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from scipy.special import expit

from tonebench.units import BOLTZMANN_J_PER_K, watt_to_dbm

ELEMENTARY_CHARGE_C = 1.602176634e-19  # exact, SI definition (2019)


@dataclass(frozen=True)
class FetParameters:
    """One FET's model parameters; the defaults are an invented part, the TBF-77 test FET
    (enhancement mode, small signal): its g3 zero sits near 0.57 V at 300 K."""

    vt0_v: float = 0.45  # threshold at ref_temp_k
    dvt_dt_v_per_k: float = -1.5e-3  # threshold temperature coefficient (typical, from memory)
    n: float = 1.3  # subthreshold slope factor (dimensionless)
    is_a: float = 2e-3  # specific current at ref_temp_k
    theta_per_v: float = 1.0  # mobility degradation / velocity saturation
    ref_temp_k: float = 300.0
    mobility_exponent: float = -1.5  # mu ~ (T/T0)^exponent (phonon scattering, from memory)


@dataclass(frozen=True)
class PowerSeries:
    """Id and its power-series coefficients at one bias: g1 = dId/dV, g2 = (1/2) d2Id/dV2,
    g3 = (1/6) d3Id/dV3 (A, S, A/V^2, A/V^3)."""

    drain_a: np.ndarray
    g1_s: np.ndarray
    g2_a_per_v2: np.ndarray
    g3_a_per_v3: np.ndarray


@dataclass(frozen=True)
class TwoToneDrain:
    """The drain current's lines for two equal gate tones (peak amplitudes, A)."""

    gate_v: float
    tone_v: float  # peak amplitude of each gate tone
    fundamental_a: float  # mean of the lines at f1 and f2
    im3_lower_a: float  # at 2 f1 - f2
    im3_upper_a: float  # at 2 f2 - f1

    @property
    def iip3_amplitude_v(self) -> float:
        """Input intercept amplitude extrapolated from this drive: A = v sqrt(fund / IM3)."""
        im3_a = 0.5 * (self.im3_lower_a + self.im3_upper_a)
        return self.tone_v * math.sqrt(self.fundamental_a / im3_a)


def iip3_dbm_from_amplitude(amplitude_v, source_ohm: float = 50.0):
    """Available-power IIP3 (dBm) from the intercept gate amplitude, the gate matched to source_ohm:
    P = A^2 / (2 Rs), so A^2 = (4/3)|g1/g3| gives P = (2/3)|g1/g3| / Rs."""
    return watt_to_dbm(np.asarray(amplitude_v, dtype=float) ** 2 / (2.0 * source_ohm))


class SimFet:
    """The device: drain current and its truth at any gate voltage and temperature."""

    def __init__(self, params: FetParameters | None = None):
        self.params = params or FetParameters()

    def thermal_voltage_v(self, temp_k: float) -> float:
        return BOLTZMANN_J_PER_K * temp_k / ELEMENTARY_CHARGE_C

    def threshold_v(self, temp_k: float) -> float:
        p = self.params
        return p.vt0_v + p.dvt_dt_v_per_k * (temp_k - p.ref_temp_k)

    def specific_current_a(self, temp_k: float) -> float:
        # Is = 2 n mu Cox W/L Ut^2: mobility's power law times Ut^2 (Ut ~ T).
        ratio = temp_k / self.params.ref_temp_k
        return self.params.is_a * ratio**self.params.mobility_exponent * ratio**2

    def series(self, gate_v, temp_k: float) -> PowerSeries:
        """Id, g1, g2, g3 in closed form (see the module docstring)."""
        p = self.params
        ut_v = self.thermal_voltage_v(temp_k)
        a_per_v = 1.0 / (2.0 * p.n * ut_v)
        b = p.theta_per_v * 2.0 * p.n * ut_v
        is_a = self.specific_current_a(temp_k)
        x = (np.asarray(gate_v, dtype=float) - self.threshold_v(temp_k)) * a_per_v
        s = np.logaddexp(0.0, x)  # ln(1 + e^x) without overflow
        s1 = expit(x)
        s2 = s1 * expit(-x)  # sigma (1 - sigma), accurate in both tails
        s3 = -s2 * np.tanh(0.5 * x)  # sigma (1 - sigma)(1 - 2 sigma)
        w = 1.0 / (1.0 + b * s)
        f0 = is_a * s * s * w
        f1 = is_a * s * w * w * (2.0 + b * s)
        f2 = 2.0 * is_a * w**3
        f3 = -6.0 * is_a * b * w**4
        d1 = a_per_v * f1 * s1
        d2 = a_per_v**2 * (f2 * s1 * s1 + f1 * s2)
        d3 = a_per_v**3 * (f3 * s1**3 + 3.0 * f2 * s1 * s2 + f1 * s3)
        return PowerSeries(f0, d1, d2 / 2.0, d3 / 6.0)

    def drain_a(self, gate_v, temp_k: float):
        return self.series(gate_v, temp_k).drain_a

    def iip3_dbm(self, gate_v, temp_k: float, source_ohm: float = 50.0):
        """Small-signal IIP3 from the power series: (2/3)|g1/g3| / Rs, in dBm."""
        ser = self.series(gate_v, temp_k)
        amplitude_sq_v2 = (4.0 / 3.0) * np.abs(ser.g1_s / ser.g3_a_per_v3)
        return iip3_dbm_from_amplitude(np.sqrt(amplitude_sq_v2), source_ohm)

    def g3_zero_v(self, temp_k: float) -> float:
        """The gate voltage where g3 crosses from expansion (+) to compression (-)."""
        vt_v = self.threshold_v(temp_k)
        span_v = 40.0 * self.params.n * self.thermal_voltage_v(temp_k)
        grid_v = np.linspace(vt_v - span_v, vt_v + span_v, 801)
        g3 = self.series(grid_v, temp_k).g3_a_per_v3
        falls = np.nonzero((g3[:-1] > 0.0) & (g3[1:] <= 0.0))[0]
        if falls.size == 0:
            raise ValueError(f"no g3 zero within {span_v:.3f} V of the threshold at {temp_k} K")
        lo_v, hi_v = grid_v[falls[0]], grid_v[falls[0] + 1]
        g3_of = lambda v: float(self.series(v, temp_k).g3_a_per_v3)  # noqa: E731
        return brentq(g3_of, lo_v, hi_v, xtol=1e-14, rtol=1e-15)

    def iip3_window_v(self, threshold_dbm: float, temp_k: float, source_ohm: float = 50.0):
        """The gate-voltage interval around the g3 zero where the small-signal IIP3 stays at or
        above threshold_dbm: (low_v, high_v), each edge root-found."""
        zero_v = self.g3_zero_v(temp_k)
        excess = lambda v: float(self.iip3_dbm(v, temp_k, source_ohm)) - threshold_dbm  # noqa: E731
        return (self._edge_v(excess, zero_v, -1.0), self._edge_v(excess, zero_v, +1.0))

    @staticmethod
    def _edge_v(excess, zero_v: float, direction: float) -> float:
        # Step outward from the zero (where IIP3 is unbounded) until the excess turns negative.
        inner_v = zero_v + direction * 1e-9
        for step_v in np.geomspace(1e-6, 0.5, 120):
            outer_v = zero_v + direction * step_v
            if excess(outer_v) < 0.0:
                return brentq(excess, inner_v, outer_v, xtol=1e-13)
            inner_v = outer_v
        raise ValueError("IIP3 stays above the threshold 0.5 V from the g3 zero")

    def g3_zero_drift_mv_per_k(self, temp_k: float, delta_k: float = 1.0) -> float:
        """d(g3 zero)/dT at temp_k by a central difference of root-found zeros (mV/K)."""
        upper_v = self.g3_zero_v(temp_k + delta_k)
        lower_v = self.g3_zero_v(temp_k - delta_k)
        return 1e3 * (upper_v - lower_v) / (2.0 * delta_k)

    def two_tone_drain(
        self, gate_v: float, tone_v: float, temp_k: float, points: int = 1024, tone_bin: int = 32
    ) -> TwoToneDrain:
        """Direct simulation: Id(Vgs0 + v cos w1 t + v cos w2 t) over one period on integer FFT
        bins (tone_bin, tone_bin + 1); products p f1 + q f2 land on bin (p + q) tone_bin + q, so
        the IM3 bins hold no other product below order 2 * tone_bin / 1 (far above what a smooth
        Id at small drive puts out)."""
        t = np.arange(points) / points
        upper_bin = tone_bin + 1
        gate = gate_v + tone_v * (np.cos(2 * np.pi * tone_bin * t) + np.cos(2 * np.pi * upper_bin * t))
        # Remove the DC before the FFT so the small lines are not rounded against a large Id.
        lines = np.abs(np.fft.rfft(self.drain_a(gate, temp_k) - self.drain_a(gate_v, temp_k))) * 2.0 / points
        return TwoToneDrain(
            gate_v=gate_v,
            tone_v=tone_v,
            fundamental_a=float(0.5 * (lines[tone_bin] + lines[upper_bin])),
            im3_lower_a=float(lines[2 * tone_bin - upper_bin]),
            im3_upper_a=float(lines[2 * upper_bin - tone_bin]),
        )
