"""Transconductance coefficients from a DC transfer sweep, and the IIP3 they predict.

For a drain current Id(Vgs) expanded about a bias point, i = g1 v + g2 v^2 + g3 v^3 with
g1 = dId/dVgs, g2 = (1/2) d2Id/dVgs2, g3 = (1/6) d3Id/dVgs3. The derivatives come from a
Savitzky-Golay smoothed derivative (scipy.signal.savgol_filter, deriv=1, 2, 3).

Noise. The SG derivative of order k is a linear filter: at every interior point
    d^k Id/dV^k  ~=  sum_j c_j Id[i+j],   c = savgol_coeffs(window, polyorder, deriv=k, delta=step)
(scipy's coefficients already carry the factor k!/step^k). With independent current noise of
standard deviation sigma on every reading, Var(sum c_j Id_j) = sigma^2 sum c_j^2, so
    sigma_gk = sigma * sqrt(sum c_j^2) / k!
which, written with the step-1 coefficients c1 = c * step^k, is sigma sqrt(sum c1^2) / step^k / k!.

Ends. Only interior points (half a window in from each end) are returned: there the filter is
the same symmetric one everywhere, so the uncertainty above holds exactly. mode="interp" would
give values at the ends too, from a one-sided fit with a different (larger) noise gain; we leave
them out rather than report them with the wrong uncertainty.

Method error. The filter is exact for every polynomial of degree < m0 (m0 > polyorder; for a
symmetric window one more moment can vanish by symmetry). Taylor's theorem with the Lagrange
remainder at order m0 then bounds the error of the k-th derivative by
    sum_j |c_j| |j step|^m0 / m0!  *  max over the window |f^(m0)|
(method_error_bound returns m0 and the factor in front of the max).
"""

from __future__ import annotations

from dataclasses import dataclass
from math import factorial

import numpy as np
from scipy.signal import savgol_coeffs, savgol_filter

from tonebench.errors import InputError
from tonebench.units import SYSTEM_IMPEDANCE_OHM, watt_to_dbm

DEFAULT_WINDOW_POINTS = 11
DEFAULT_POLYORDER = 5  # >= 4 needed for a third derivative with some smoothing margin
STEP_RELATIVE_TOLERANCE = 1e-6


@dataclass(frozen=True)
class TransconductanceResult:
    """g1 (A/V), g2 (A/V^2), g3 (A/V^3) and their 1-sigma noise uncertainties, at gate_v.

    gate_v holds only the interior points (the ends are left out, see the module docstring);
    method, window_points, polyorder and step_v state how the values were made.
    """

    gate_v: np.ndarray
    g1: np.ndarray
    g2: np.ndarray
    g3: np.ndarray
    sigma_g1: float
    sigma_g2: float
    sigma_g3: float
    method: str
    window_points: int
    polyorder: int
    step_v: float


def _uniform_step(gate_v: np.ndarray) -> float:
    if gate_v.ndim != 1 or gate_v.size < 2:
        raise InputError("gate_v: need a 1-D sweep of at least two points")
    steps = np.diff(gate_v)
    step = float(np.mean(steps))
    if step <= 0 or np.max(np.abs(steps - step)) > STEP_RELATIVE_TOLERANCE * abs(step):
        raise InputError("gate_v: the sweep must rise in equal steps")
    return step


def _check_window(n_points: int, window_points: int, polyorder: int) -> None:
    if window_points % 2 == 0 or window_points < 3:
        raise InputError(f"window_points: must be odd and >= 3, got {window_points}")
    if polyorder < 4 or polyorder >= window_points:
        raise InputError(f"polyorder: need 4 <= polyorder < window ({window_points}) for g3")
    if n_points < window_points:
        raise InputError(f"sweep of {n_points} points is shorter than the window ({window_points})")


def noise_gain(window_points: int, polyorder: int, deriv: int, step_v: float) -> float:
    """sqrt(sum c^2) / deriv!: sigma_gk = sigma_a * noise_gain (see the module docstring)."""
    coeffs = savgol_coeffs(window_points, polyorder, deriv=deriv, delta=step_v, use="dot")
    return float(np.sqrt(np.sum(coeffs**2)) / factorial(deriv))


def method_error_bound(window_points: int, polyorder: int, deriv: int, step_v: float):
    """(m0, K): |SG k-th derivative - exact| <= K * max_window |d^m0 f / dV^m0|.

    m0 is the lowest order whose moment sum c_j j^m does not vanish (the filter is exact below it);
    K = sum |c_j| |j step|^m0 / m0! is the Lagrange-remainder bound of the module docstring.
    """
    coeffs = savgol_coeffs(window_points, polyorder, deriv=deriv, delta=step_v, use="dot")
    offsets = np.arange(window_points) - window_points // 2
    m0 = polyorder + 1
    while True:
        moment = np.sum(coeffs * offsets.astype(float) ** m0)
        scale = np.sum(np.abs(coeffs) * np.abs(offsets.astype(float)) ** m0)
        if abs(moment) > 1e-9 * scale:
            break
        m0 += 1
    bound = np.sum(np.abs(coeffs) * np.abs(offsets * step_v) ** m0) / factorial(m0)
    return m0, float(bound)


def transconductance(
    gate_v,
    drain_a,
    sigma_a: float,
    window_points: int = DEFAULT_WINDOW_POINTS,
    polyorder: int = DEFAULT_POLYORDER,
) -> TransconductanceResult:
    """g1, g2, g3 from an equal-step DC transfer sweep by Savitzky-Golay derivatives.

    sigma_a is the standard deviation of the current reading (A), independent from point to point.
    """
    gate_v = np.asarray(gate_v, dtype=float)
    drain_a = np.asarray(drain_a, dtype=float)
    if drain_a.shape != gate_v.shape:
        raise InputError("drain_a: must have one reading per gate voltage")
    step = _uniform_step(gate_v)
    _check_window(gate_v.size, window_points, polyorder)
    half = window_points // 2
    inner = slice(half, gate_v.size - half)
    gks = []
    for k in (1, 2, 3):
        deriv = savgol_filter(drain_a, window_points, polyorder, deriv=k, delta=step, mode="interp")
        gks.append(deriv[inner] / factorial(k))
    sigmas = [sigma_a * noise_gain(window_points, polyorder, k, step) for k in (1, 2, 3)]
    return TransconductanceResult(
        gate_v=gate_v[inner],
        g1=gks[0],
        g2=gks[1],
        g3=gks[2],
        sigma_g1=sigmas[0],
        sigma_g2=sigmas[1],
        sigma_g3=sigmas[2],
        method="savitzky-golay (scipy.signal.savgol_filter), interior points only",
        window_points=window_points,
        polyorder=polyorder,
        step_v=step,
    )


def predicted_iip3_w(g1, g3, source_ohm: float = SYSTEM_IMPEDANCE_OHM):
    """Available-power IIP3 (W) = (2/3) |g1/g3| / Rs, for a gate terminated in Rs.

    Derivation (classic power series, e.g. Razavi, RF Microelectronics, ch. 2; from memory):
    two tones of amplitude A at the gate, v = A cos w1 t + A cos w2 t, give at w1 the current
    g1 A (+ higher order) and at 2 w1 - w2 the current (3/4) g3 A^3. They are equal at
    A_IP3^2 = (4/3) |g1/g3|. A source of EMF amplitude E and resistance Rs has available power
    E^2 / (8 Rs). With the gate terminated in Rs (matched input, the two-tone bench's case) the
    gate sees A = E/2, so the available power at the intercept is (2 A)^2 / (8 Rs) = A^2/(2 Rs)
    = (4/3)|g1/g3| / (2 Rs) = (2/3) |g1/g3| / Rs: the issue's formula holds for this case.
    For an unterminated (open) gate driven straight from the source, A = E and the same power
    would be A^2 / (8 Rs) = (1/6)|g1/g3|/Rs, 6 dB lower; that case is not what this returns.
    g3 == 0 gives inf (the power series predicts no third-order product there).
    """
    g1 = np.asarray(g1, dtype=float)
    g3 = np.abs(np.asarray(g3, dtype=float))
    with np.errstate(divide="ignore"):
        return (2.0 / 3.0) * np.abs(g1) / g3 / source_ohm


def predicted_iip3_dbm(g1, g3, source_ohm: float = SYSTEM_IMPEDANCE_OHM):
    """predicted_iip3_w in dBm."""
    with np.errstate(divide="ignore"):
        return watt_to_dbm(predicted_iip3_w(g1, g3, source_ohm))


@dataclass(frozen=True)
class SweetSpot:
    """A zero of g3 (V) by linear interpolation, with its 1-sigma uncertainty from sigma_g3."""

    gate_v: float
    sigma_v: float
    slope_g3_per_v: float


def sweet_spots(result: TransconductanceResult) -> list[SweetSpot] | None:
    """Every sign change of g3, interpolated linearly; None when g3 never changes sign.

    sigma_v = sigma_g3 / |dg3/dV|, the local slope taken between the two points around the zero
    (a first-order propagation: an error dg3 in g3 shifts the zero by dg3 / slope).
    """
    v, g3 = result.gate_v, result.g3
    found = []
    for i in range(v.size - 1):
        a, b = g3[i], g3[i + 1]
        if a == 0.0 and (i == 0 or g3[i - 1] != 0.0):
            slope = (b - g3[i - 1]) / (v[i + 1] - v[i - 1]) if i > 0 else (b - a) / (v[1] - v[0])
            found.append(_spot(v[i], slope, result.sigma_g3))
        elif a * b < 0.0:
            slope = (b - a) / (v[i + 1] - v[i])
            found.append(_spot(v[i] - a / slope, slope, result.sigma_g3))
    return found or None


def _spot(gate_v: float, slope: float, sigma_g3: float) -> SweetSpot:
    sigma_v = sigma_g3 / abs(slope) if slope != 0.0 else float("inf")
    return SweetSpot(gate_v=float(gate_v), sigma_v=float(sigma_v), slope_g3_per_v=float(slope))


def capped_iip3_dbm(result: TransconductanceResult, source_ohm: float = SYSTEM_IMPEDANCE_OHM):
    """Predicted IIP3 (dBm) per point with |g3| floored at its noise uncertainty sigma_g3.

    Why this cap: at the g3 zero the formula diverges, and the real limit there (fifth-order
    terms, finite drive) is outside a DC power-series prediction. Within +-sigma_g3 of zero the
    data cannot tell g3 from 0, so the largest IIP3 the data support is the one at |g3| =
    sigma_g3; this also does not depend on where the grid happens to fall against the zero.
    With noise-free data (sigma_g3 == 0) no floor applies and a grid point exactly on the zero
    gives inf.
    """
    g3 = np.maximum(np.abs(result.g3), result.sigma_g3)
    return predicted_iip3_dbm(result.g1, g3, source_ohm)


@dataclass(frozen=True)
class IIP3Window:
    """Gate-voltage interval (V) around a sweet spot where the predicted IIP3 >= threshold_dbm."""

    low_v: float
    high_v: float
    threshold_dbm: float
    peak_dbm: float


def iip3_window(
    result: TransconductanceResult,
    sweet_spot_v: float,
    threshold_dbm: float | None = None,
    below_peak_db: float | None = None,
    source_ohm: float = SYSTEM_IMPEDANCE_OHM,
) -> IIP3Window | None:
    """The interval around sweet_spot_v where capped IIP3 stays >= a threshold.

    Give threshold_dbm, or below_peak_db (the threshold is the peak less that many dB; the peak is
    the capped maximum next to the sweet spot). Edges are interpolated linearly in dBm between grid
    points; an edge that reaches the end of the sweep is reported at the last interior point.
    None when the IIP3 at the sweet spot does not reach the threshold.
    """
    if (threshold_dbm is None) == (below_peak_db is None):
        raise InputError("give exactly one of threshold_dbm and below_peak_db")
    v = result.gate_v
    iip3 = capped_iip3_dbm(result, source_ohm)
    centre = int(np.argmin(np.abs(v - sweet_spot_v)))
    lo_i, hi_i = max(centre - 1, 0), min(centre + 1, v.size - 1)
    peak = float(np.max(iip3[lo_i : hi_i + 1]))
    threshold = threshold_dbm if threshold_dbm is not None else peak - below_peak_db
    if peak < threshold:
        return None
    start = lo_i + int(np.argmax(iip3[lo_i : hi_i + 1]))
    return IIP3Window(
        low_v=_edge(v, iip3, start, -1, threshold),
        high_v=_edge(v, iip3, start, +1, threshold),
        threshold_dbm=float(threshold),
        peak_dbm=peak,
    )


def _edge(v: np.ndarray, iip3: np.ndarray, start: int, direction: int, threshold: float) -> float:
    i = start
    while 0 <= i + direction < v.size and iip3[i + direction] >= threshold:
        i += direction
    j = i + direction
    if not 0 <= j < v.size:
        return float(v[i])
    if not np.isfinite(iip3[i]):
        return float(v[i])
    frac = (iip3[i] - threshold) / (iip3[i] - iip3[j])
    return float(v[i] + frac * (v[j] - v[i]))
