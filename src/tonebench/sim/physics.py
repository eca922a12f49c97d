"""Physics of the simulated bench: pure numpy functions, no state.

Voltages are peak phasors in volts (complex) in 50 ohm, P = |V|^2 / (2 * 50); powers in dBm or W
as the name says; frequencies in Hz.

The DUT is a memoryless nonlinearity y = f(x). Its two-tone response comes from a time-domain
simulation: the input phasors sit on integer FFT bins (lower tone at bin TONE_BIN, upper tone at
TONE_BIN + 1, so a product p*f1 + q*f2 lands on bin (p + q)*TONE_BIN + q), y = f(x) is sampled
over one period and numpy's FFT returns the output phasors. Coherent contributions at one
frequency (for example the sources' residual IM3 passing through the DUT, and the DUT's own IM3)
therefore add as phasors without any special case.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from tonebench.units import (
    SYSTEM_IMPEDANCE_OHM,
    dbm_to_vpeak,
    thermal_noise_dbm_per_hz,
    vpeak_to_dbm,
)

# Bins 16 and 17 for the tones: products up to order 15 stay below N/2 (15 * 17 = 255 < 256), and
# the product families m*f1 + i*(f2 - f1) keep |i| <= 8, so each bin maps to one product.
SIM_POINTS = 512
TONE_BIN = 16
_FAMILY_HALF_WIDTH = TONE_BIN // 2

# Rapp limiter z / (1 + |z|^(2p))^(1/(2p)): its Taylor series is z - z^(2p+1)/(2p) + ..., so no
# cubic term for p >= 2. p = 3 keeps the first deviation at 7th order, so IM3 well below P1dB
# stays the cubic's (within 0.02 dB at 20 dB below P1dB).
RAPP_SMOOTHNESS = 3
# Turning point of u - u^3: the cubic is held flat beyond it so the output saturates, not folds back.
_CUBIC_TURN = 1.0 / math.sqrt(3.0)
# Pure cubic, single tone: 1 - (3/4) u^2 = 10^(-1/20) at P1dB, IIP3 at u^2 = 4/3.
PURE_CUBIC_IIP3_ABOVE_P1DB_DB = -10.0 * math.log10(1.0 - 10.0 ** (-1.0 / 20.0))
_DESCRIBING_POINTS = 1024

MIN_SWEEP_TIME_S = 1e-3
_GAUSS_K = 4.0 * math.log(2.0)  # |H(df)|^2 = exp(-4 ln2 (df/RBW)^2): 3 dB down at df = RBW/2
# A line further than this many RBW outside the span adds exp(-4 ln2 * 64) ~ 1e-77 of its power.
_LINE_REACH_RBW = 8.0


def linear_in_db(value_at_ref, slope_db_per_ghz: float, ref_freq_hz: float, freq_hz):
    """A dB quantity varying linearly with frequency: value_at_ref + slope * (f - f_ref) / 1 GHz."""
    return value_at_ref + slope_db_per_ghz * (np.asarray(freq_hz, dtype=float) - ref_freq_hz) / 1e9


def vpeak_to_watt(vpeak_v):
    """Power in W of a sine with peak phasor vpeak_v (any complex array) in 50 ohm."""
    return np.abs(np.asarray(vpeak_v)) ** 2 / (2.0 * SYSTEM_IMPEDANCE_OHM)


# --- DUT ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Nonlinearity:
    """Memoryless DUT transfer in volts: y = a1 * s * g(x / s) + a2 * x^2, with s = sqrt(a1 / |a3|).

    g(u) = c(u) = u - u^3 (u held at the turning point 1/sqrt(3) beyond it) for the pure cubic;
    with a compression point, g(u) = v * R(c(u) / v), R the Rapp limiter of smoothness 3, which
    has no cubic Taylor term, so the small-signal a1 and a3 stay exactly as given. v (the output
    saturation in units of a1 * s) is solved numerically for the wanted IIP3 - P1dB distance.
    The second-order term is added outside the odd part, so it makes no odd-order products and
    leaves a1, a3 and the compression as they are; x is held at the same turning point there.
    The fifth-order term a5 x^5 is added the same way (same turning point): with two equal tones
    of amplitude A it puts (25/8) a5 A^5 on each IM3 product beside the cubic's (3/4) a3 A^3, and
    (5/8) a5 A^5 at 3f1-2f2 (the standard two-tone power-series expansion; tests check it with an FFT).
    """

    a1: float  # small-signal voltage gain, V/V
    a3: float  # cubic coefficient, 1/V^2; negative (compressive)
    sat_norm: float | None  # v above; None = pure cubic
    a2: float = 0.0  # second-order coefficient, 1/V: adds a2 x^2 (even-order products only)
    a5: float = 0.0  # fifth-order coefficient, 1/V^4: adds a5 x^5 (same sign as a3: compressive)

    @property
    def scale_v(self) -> float:
        """s = sqrt(a1 / |a3|) in V: the intercept amplitude is s * sqrt(4/3)."""
        return math.sqrt(self.a1 / abs(self.a3))

    @property
    def vsat_v(self) -> float:
        """Output saturation amplitude of the Rapp stage in V (inf for the pure cubic)."""
        return math.inf if self.sat_norm is None else self.a1 * self.scale_v * self.sat_norm

    def output_v(self, x_v):
        """Instantaneous output voltage (V) for input voltage x_v (V), any real array."""
        scale_v = self.scale_v
        u = np.asarray(x_v, dtype=float) / scale_v
        y_v = self.a1 * scale_v * _normalized_transfer(u, self.sat_norm)
        if self.a2:
            y_v = y_v + self.a2 * (scale_v * np.clip(u, -_CUBIC_TURN, _CUBIC_TURN)) ** 2
        if self.a5:
            y_v = y_v + self.a5 * (scale_v * np.clip(u, -_CUBIC_TURN, _CUBIC_TURN)) ** 5
        return y_v


def _normalized_transfer(u, sat_norm: float | None):
    u = np.clip(u, -_CUBIC_TURN, _CUBIC_TURN)
    c = u - u**3
    if sat_norm is None:
        return c
    z = c / sat_norm
    return sat_norm * z / (1.0 + np.abs(z) ** (2 * RAPP_SMOOTHNESS)) ** (1.0 / (2 * RAPP_SMOOTHNESS))


def dut_nonlinearity(gain_db: float, iip3_dbm: float, iip3_above_p1db_db: float | None = None,
                     iip2_dbm: float | None = None, iip5_dbm: float | None = None) -> Nonlinearity:
    """Coefficients for small-signal gain_db and input intercept iip3_dbm (A_IIP3^2 = (4/3)|a1/a3|).

    iip3_above_p1db_db=None gives the pure cubic (about 9.64 dB); a larger value adds saturation.
    iip2_dbm sets the second-order term: with equal tones A the products at f2-f1 and f1+f2 are
    a2 A^2 each against a1 A at the fundamental, meeting at A_IIP2 = a1/a2; None: no such term.
    iip5_dbm sets the fifth-order term: the product at 3f1-2f2, (5/8)|a5| A^5, meets a1 A at
    A_IIP5^4 = (8/5) a1/|a5|; a5 takes a3's sign, so it adds to the IM3 and the per-point IIP3
    reads low by (1/2) 20log10(1 + 5 A_IIP3^2 A^2 / A_IIP5^4) dB at tones A; None: no such term.
    """
    a1 = 10.0 ** (gain_db / 20.0)
    a3 = -(4.0 / 3.0) * a1 / float(dbm_to_vpeak(iip3_dbm)) ** 2
    sat_norm = None if iip3_above_p1db_db is None else _saturation_norm(round(float(iip3_above_p1db_db), 9))
    a2 = 0.0 if iip2_dbm is None else a1 / float(dbm_to_vpeak(iip2_dbm))
    a5 = 0.0 if iip5_dbm is None else -(8.0 / 5.0) * a1 / float(dbm_to_vpeak(iip5_dbm)) ** 4
    return Nonlinearity(a1=a1, a3=a3, sat_norm=sat_norm, a2=a2, a5=a5)


def _normalized_fundamental_gain(u_amp, sat_norm: float | None) -> np.ndarray:
    """Describing function: fundamental out / in for single tones of normalized amplitude u_amp."""
    u_amp = np.atleast_1d(np.asarray(u_amp, dtype=float))
    cos_theta = np.cos(2.0 * np.pi * np.arange(_DESCRIBING_POINTS) / _DESCRIBING_POINTS)
    out = _normalized_transfer(u_amp[:, None] * cos_theta, sat_norm)
    fundamental = 2.0 * np.mean(out * cos_theta, axis=1)
    return fundamental / u_amp


def _bisect(func, low: float, high: float, steps: int = 80) -> float:
    """Root of a function that is negative at low and positive at high."""
    for _ in range(steps):
        mid = 0.5 * (low + high)
        if func(mid) < 0.0:
            low = mid
        else:
            high = mid
    return 0.5 * (low + high)


@functools.lru_cache(maxsize=256)
def _saturation_norm(iip3_above_p1db_db: float) -> float:
    """Rapp saturation v placing single-tone 1 dB compression iip3_above_p1db_db below the IIP3."""
    if iip3_above_p1db_db <= PURE_CUBIC_IIP3_ABOVE_P1DB_DB:
        raise ValueError(
            f"IIP3 - P1dB = {iip3_above_p1db_db} dB: a memoryless stage needs more than "
            f"{PURE_CUBIC_IIP3_ABOVE_P1DB_DB:.2f} dB (the pure cubic)"
        )
    u_1db = math.sqrt((4.0 / 3.0) * 10.0 ** (-iip3_above_p1db_db / 10.0))
    target = 10.0 ** (-1.0 / 20.0)
    # Less saturation (larger v) means less compression at u_1db: monotonic in log v.
    log_v = _bisect(lambda lv: _normalized_fundamental_gain(u_1db, 10.0**lv)[0] - target, -6.0, 6.0)
    return 10.0**log_v


@functools.lru_cache(maxsize=256)
def _normalized_p1db(sat_norm: float | None) -> float:
    target = 10.0 ** (-1.0 / 20.0)
    # Gain falls monotonically with amplitude, so find where it crosses -1 dB.
    return _bisect(lambda u: target - _normalized_fundamental_gain(u, sat_norm)[0], 1e-6, 10.0)


def single_tone_gain_db(model: Nonlinearity, amp_v) -> np.ndarray:
    """Large-signal gain (fundamental out / in, dB) for single tones of peak amplitude amp_v (V)."""
    u_amp = np.asarray(amp_v, dtype=float) / model.scale_v
    return 20.0 * np.log10(model.a1 * _normalized_fundamental_gain(u_amp, model.sat_norm))


def p1db_input_dbm(model: Nonlinearity) -> float:
    """Input power (dBm) of a single tone compressed by 1 dB, found numerically."""
    return float(vpeak_to_dbm(model.scale_v * _normalized_p1db(model.sat_norm)))


def product_bin(order_low: int, order_high: int) -> int:
    """FFT bin of the product order_low*f1 + order_high*f2 in dut_output_spectrum_v."""
    return (order_low + order_high) * TONE_BIN + order_high


def bin_frequencies_hz(f_low_hz: float, spacing_hz: float) -> np.ndarray:
    """Real frequency of every bin of dut_output_spectrum_v: bin m*TONE_BIN + i is m*f1 + i*(f2 - f1)."""
    bins = np.arange(SIM_POINTS // 2 + 1)
    family = np.rint(bins / TONE_BIN)
    return family * f_low_hz + (bins - family * TONE_BIN) * spacing_hz


def input_waveform_v(tone_low_v: complex, tone_high_v: complex = 0j, im3_low_in_v: complex = 0j,
                     im3_high_in_v: complex = 0j) -> np.ndarray:
    """The DUT input over one period (V, SIM_POINTS samples) for these phasors on their bins."""
    spectrum_in = np.zeros(SIM_POINTS // 2 + 1, dtype=complex)
    spectrum_in[product_bin(1, 0)] = tone_low_v
    spectrum_in[product_bin(0, 1)] = tone_high_v
    spectrum_in[product_bin(2, -1)] = im3_low_in_v
    spectrum_in[product_bin(-1, 2)] = im3_high_in_v
    # irfft of (N/2) * phasor at bin k is |phasor| cos(2 pi k n / N + angle): numpy's FFT scaling.
    return np.fft.irfft(spectrum_in * (SIM_POINTS / 2), n=SIM_POINTS)


def dut_output_spectrum_v(
    model: Nonlinearity,
    tone_low_v: complex,
    tone_high_v: complex = 0j,
    im3_low_in_v: complex = 0j,
    im3_high_in_v: complex = 0j,
) -> np.ndarray:
    """Complex peak output phasors (V) on bins 0..SIM_POINTS/2 for these input phasors (V).

    Inputs: the tones at f1 < f2 and whatever already sits at 2f1 - f2 and 2f2 - f1 at the DUT
    input (the sources' residual IM3). Bin 0 holds the DC output.
    """
    x_v = input_waveform_v(tone_low_v, tone_high_v, im3_low_in_v, im3_high_in_v)
    spectrum_out = np.fft.rfft(model.output_v(x_v)) * (2.0 / SIM_POINTS)
    spectrum_out[0] *= 0.5
    return spectrum_out


def two_tone_products_v(
    model: Nonlinearity,
    tone_low_v: complex,
    tone_high_v: complex,
    im3_low_in_v: complex = 0j,
    im3_high_in_v: complex = 0j,
) -> dict[str, complex]:
    """Output phasors (V) at f1, f2, 2f1-f2 (im3_low), 2f2-f1 (im3_high), f2-f1 and f1+f2."""
    spectrum = dut_output_spectrum_v(model, tone_low_v, tone_high_v, im3_low_in_v, im3_high_in_v)
    orders = {"f1": (1, 0), "f2": (0, 1), "im3_low": (2, -1), "im3_high": (-1, 2),
              "f2_minus_f1": (-1, 1), "f1_plus_f2": (1, 1)}
    return {name: complex(spectrum[product_bin(*pq)]) for name, pq in orders.items()}


def dut_output_noise_dbm_per_hz(nf_db, gain_db):
    """Noise density at the DUT output: kT (290 K) + NF + G, in dBm/Hz."""
    return thermal_noise_dbm_per_hz() + np.asarray(nf_db, dtype=float) + np.asarray(gain_db, dtype=float)


# --- third-order products made by the test system ----------------------------------------------


def source_residual_im3_dbm(p1_dbm: float, p2_dbm: float, system_ip3_dbm: float) -> tuple[float, float]:
    """Sources' residual IM3 (lower, upper) at the DUT input plane for tones p1 at f1 and p2 at f2 there."""
    return 2.0 * p1_dbm + p2_dbm - 2.0 * system_ip3_dbm, p1_dbm + 2.0 * p2_dbm - 2.0 * system_ip3_dbm


def mixer_im3_dbm(p1_dbm: float, p2_dbm: float, atten_db: float, mixer_toi_dbm: float) -> tuple[float, float]:
    """Analyzer-made IM3 (lower, upper) referred to its input, for tones p1, p2 at its input.

    At the mixer the tones are p - atten and the products 2*Pm1 + Pm2 - 2*TOI; adding atten back
    refers them to the input: the input intercept is TOI + atten.
    """
    pm1_dbm, pm2_dbm = p1_dbm - atten_db, p2_dbm - atten_db
    lower_dbm = 2.0 * pm1_dbm + pm2_dbm - 2.0 * mixer_toi_dbm + atten_db
    upper_dbm = pm1_dbm + 2.0 * pm2_dbm - 2.0 * mixer_toi_dbm + atten_db
    return lower_dbm, upper_dbm


def im3_phasor_v(level_dbm: float, tone_low_v: complex, tone_high_v: complex, lower: bool, phase_deg: float) -> complex:
    """Phasor (V) of an IM3 product of power level_dbm made from these tones.

    Its angle is the one a compressive cubic gives (2*angle(f1) - angle(f2) + 180 deg for the lower
    product) turned by phase_deg, so phase_deg = 0 adds in phase with the DUT's own product.
    """
    first, second = (tone_low_v, tone_high_v) if lower else (tone_high_v, tone_low_v)
    angle_rad = 2.0 * np.angle(first) - np.angle(second) + np.pi + np.radians(phase_deg)
    return complex(float(dbm_to_vpeak(level_dbm)) * np.exp(1j * angle_rad))


# --- analyzer -----------------------------------------------------------------------------------


def rbw_power_response(offset_hz, rbw_hz: float):
    """Gaussian RBW filter power response |H(df)|^2 = exp(-4 ln2 (df/RBW)^2); 3 dB bandwidth = RBW."""
    return np.exp(-_GAUSS_K * (np.asarray(offset_hz, dtype=float) / rbw_hz) ** 2)


def noise_bandwidth_hz(rbw_hz: float) -> float:
    """Equivalent noise bandwidth of the Gaussian RBW filter: RBW * sqrt(pi / (4 ln2)), about 1.065 RBW."""
    return rbw_hz * math.sqrt(math.pi / _GAUSS_K)


def analyzer_noise_dbm_per_hz(danl_dbm_per_hz: float, atten_db: float, arriving_dbm_per_hz):
    """Noise density read by the analyzer: its DANL (rising dB for dB with attenuation) plus what arrives."""
    own_w = 10.0 ** ((danl_dbm_per_hz + atten_db) / 10.0)
    arriving_w = 10.0 ** (np.asarray(arriving_dbm_per_hz, dtype=float) / 10.0)
    return 10.0 * np.log10(own_w + arriving_w)


def sweep_time_s(span_hz: float, rbw_hz: float, sweep_time_factor: float, vbw_hz: float | None = None) -> float:
    """Swept analyzer: factor * span / (RBW * min(RBW, VBW)), at least MIN_SWEEP_TIME_S. A video
    filter narrower than the RBW settles RBW/VBW times slower, so the sweep lengthens by that
    much (common practice, from memory); one at the RBW or wider costs nothing."""
    video_hz = rbw_hz if vbw_hz is None else min(rbw_hz, vbw_hz)
    return max(MIN_SWEEP_TIME_S, sweep_time_factor * span_hz / (rbw_hz * video_hz))


def video_averages(noise_averages: int, rbw_hz: float, vbw_hz: float) -> float:
    """Independent noise samples behind one trace point: the scenario's noise_averages with the
    video filter at the RBW or wider, RBW/VBW times more below it. A video filter that much
    narrower than the noise's bandwidth averages about RBW/VBW independent samples, so the
    reading's scatter falls as sqrt(VBW/RBW) (common practice, from memory)."""
    return noise_averages * max(1.0, rbw_hz / vbw_hz)


def overload_compression_db(mixer_total_dbm: float, overload_mixer_dbm: float) -> float:
    """How much an overloaded mixer reads low: 0 below the limit, then 1 dB growing to 3 dB."""
    excess_db = mixer_total_dbm - overload_mixer_dbm
    return 0.0 if excess_db <= 0.0 else min(3.0, 1.0 + 0.2 * excess_db)


def amplitude_error_db(freq_hz, level_error_db: float, flatness_db_per_ghz: float):
    """Analyzer amplitude error: a fixed offset plus a flatness term growing linearly from 0 Hz."""
    return level_error_db + flatness_db_per_ghz * np.asarray(freq_hz, dtype=float) / 1e9


def trace_power_w(
    trace_freq_hz: np.ndarray,
    line_freq_hz: np.ndarray,
    line_power_w: np.ndarray,
    rbw_hz: float,
    noise_dbm_per_hz,
    noise_averages: float,
    rng: np.random.Generator,
) -> np.ndarray:
    """Power (W) read at each trace frequency: lines through the RBW filter plus fluctuating noise.

    Lines at one frequency must already be summed as phasors. The averaged noise reading is a
    Gamma(k, 1/k) multiple of the mean noise power in the noise bandwidth, k = noise_averages
    (video_averages for a video filter narrower than the RBW). Trace points are drawn
    independently: the correlation a narrow video filter gives neighbouring points is not modelled.
    """
    trace_freq_hz = np.asarray(trace_freq_hz, dtype=float)
    noise_mean_w = 1e-3 * 10.0 ** (np.asarray(noise_dbm_per_hz, dtype=float) / 10.0) * noise_bandwidth_hz(rbw_hz)
    power_w = noise_mean_w * rng.gamma(noise_averages, 1.0 / noise_averages, size=trace_freq_hz.shape)
    line_freq_hz = np.asarray(line_freq_hz, dtype=float)
    line_power_w = np.asarray(line_power_w, dtype=float)
    low_hz, high_hz = trace_freq_hz.min(), trace_freq_hz.max()
    near = (line_freq_hz > low_hz - _LINE_REACH_RBW * rbw_hz) & (line_freq_hz < high_hz + _LINE_REACH_RBW * rbw_hz)
    near &= line_power_w > 0.0
    if near.any():
        response = rbw_power_response(trace_freq_hz[:, None] - line_freq_hz[near][None, :], rbw_hz)
        power_w = power_w + response @ line_power_w[near]
    return power_w
