"""Sweeps of a cubic device built from closed forms, as the bench reads them.

Readings are made as the bench makes them: the device's IM3 (3P - 2 IIP3 + G for a cubic), the
analyzer's own (3 Pout - 2 (TOI + A)) and the sources' residual (3P - 2 IP3sys + G) added as
phasors with numpy's complex arithmetic, then the noise added in power.
"""

import numpy as np

from tonebench.analysis import SweepData

GAIN_DB, IIP3_DBM = 15.0, -2.0
TONES = np.arange(-36.0, -21.0, 2.0)


def dbm_to_v(dbm):
    return 10.0 ** (np.asarray(dbm, dtype=float) / 20.0)


def v_to_dbm(v):
    return 20.0 * np.log10(np.abs(v))


def power_sum(*dbm):
    return 10.0 * np.log10(sum(10.0 ** (np.asarray(x) / 10.0) for x in dbm))


def reading(dut_dbm, others=(), noise_dbm=-200.0):
    """|dut + sum(other e^{j phase})| then + noise in power; others = [(level_dbm, phase_deg)]."""
    v = dbm_to_v(dut_dbm).astype(complex)
    for level, phase in others:
        v = v + dbm_to_v(level) * np.exp(1j * np.radians(phase))
    return power_sum(v_to_dbm(v), noise_dbm)


def sweep(tones=TONES, gain_db=GAIN_DB, iip3_dbm=IIP3_DBM, atten_db=20.0, true_toi_dbm=None, phase_deg=0.0,
          system_ip3_dbm=None, noise_dbm=-200.0, step_points=(), pin2_offset_db=0.0, im3_slope=3.0,
          overload=None):
    """A sweep of a cubic device (raw = DUT-referred: no output loss) with optional system products."""
    tones = np.asarray(tones, dtype=float)
    p1, p2 = tones, tones + pin2_offset_db
    pout1, pout2 = p1 + gain_db, p2 + gain_db
    # Unequal-tone forms: lower 2P1 + P2 - 2 IIP3 + G, upper P1 + 2P2 - 2 IIP3 + G; a slope other
    # than 3 is made by scaling the distance from the top point.
    lower_dut = 2 * p1 + p2 - 2 * iip3_dbm + gain_db + (im3_slope - 3.0) * (tones - tones[-1])
    upper_dut = p1 + 2 * p2 - 2 * iip3_dbm + gain_db + (im3_slope - 3.0) * (tones - tones[-1])
    n = tones.size
    atten = np.full(n, float(atten_db))

    def read(atten_now, side, noise):
        dut = lower_dut if side == "lower" else upper_dut
        others = []
        if true_toi_dbm is not None:
            a, b = (pout1, pout2) if side == "lower" else (pout2, pout1)
            others.append((2 * a + b - 2 * (true_toi_dbm + atten_now), phase_deg))
        if system_ip3_dbm is not None:
            a, b = (p1, p2) if side == "lower" else (p2, p1)
            others.append((2 * a + b - 2 * system_ip3_dbm + gain_db, phase_deg))
        return np.array([reading(dut[i], [(lvl[i], ph) for lvl, ph in others], noise[i]) for i in range(n)])

    noise = np.broadcast_to(np.asarray(noise_dbm, dtype=float), (n,))
    lower, upper = read(atten, "lower", noise), read(atten, "upper", noise)
    step = np.full(n, np.nan)
    lower_step = np.full(n, np.nan)
    upper_step = np.full(n, np.nan)
    step_noise = noise + 10.0
    for i in step_points:
        step[i] = 10.0
        lower_step[i] = read(atten + 10.0, "lower", step_noise)[i]
        upper_step[i] = read(atten + 10.0, "upper", step_noise)[i]
    return SweepData(
        tone_dbm=tones, pin1_dbm=p1, pin2_dbm=p2, pout_f1_dbm=pout1, pout_f2_dbm=pout2,
        im3_lower_dbm=lower, im3_upper_dbm=upper, noise_lower_dbm=noise, noise_upper_dbm=noise,
        overload=np.zeros(n, bool) if overload is None else overload, atten_db=atten,
        raw_f1_dbm=pout1, raw_f2_dbm=pout2, raw_lower_dbm=lower, raw_upper_dbm=upper,
        raw_noise_lower_dbm=noise, raw_noise_upper_dbm=noise, step_atten_db=step,
        raw_lower_step_dbm=lower_step, raw_upper_step_dbm=upper_step,
        raw_noise_lower_step_dbm=np.where(np.isnan(step), np.nan, step_noise),
        raw_noise_upper_step_dbm=np.where(np.isnan(step), np.nan, step_noise),
    )
