"""Analysis stage: per-point intercepts, noise correction, sweep fits, P1dB.

Reference data are built here from closed forms with numpy, never from the code under test.
"""

import numpy as np
import pytest
from fifty_ohm import dbm_to_volts, volts_to_dbm
from hypothesis import given
from hypothesis import strategies as st

from tonebench.analysis import fit_sweep, noise_corrected_dbm, p1db, point_intercepts
from tonebench.errors import InputError


def true_iip3_dbm(a1, a3):
    # Textbook (Razavi, RF Microelectronics): extrapolated a1*A = (3/4)|a3|*A^3 at A^2 = (4/3)|a1/a3|.
    return float(volts_to_dbm(np.sqrt(4.0 / 3.0 * abs(a1 / a3))))


def two_tone_cubic(p1_dbm, p2_dbm, a1, a3):
    """Output powers (dBm) of y = a1 x + a3 x^3 for x = A1 cos(w1 t) + A2 cos(w2 t).

    Expanding x^3 (trigonometric identities): at f1 a1 A1 + a3 (3/4 A1^3 + 3/2 A1 A2^2), at f2 the
    same with 1 and 2 swapped, at 2f1-f2 (3/4) a3 A1^2 A2, at 2f2-f1 (3/4) a3 A1 A2^2.
    """
    amp1, amp2 = dbm_to_volts(p1_dbm), dbm_to_volts(p2_dbm)
    f1 = a1 * amp1 + a3 * (0.75 * amp1**3 + 1.5 * amp1 * amp2**2)
    f2 = a1 * amp2 + a3 * (0.75 * amp2**3 + 1.5 * amp2 * amp1**2)
    lower = 0.75 * a3 * amp1**2 * amp2
    upper = 0.75 * a3 * amp1 * amp2**2
    return volts_to_dbm(f1), volts_to_dbm(f2), volts_to_dbm(lower), volts_to_dbm(upper)


def power_sum_dbm(*levels_dbm):
    """Incoherent power sum, done in milliwatts with numpy."""
    return 10.0 * np.log10(sum(10.0 ** (np.asarray(x) / 10.0) for x in levels_dbm))


# --- per-point intercepts -------------------------------------------------------------------

def test_worked_example():
    # Textbook two-tone arithmetic (design.md sec 3): -30 dBm per tone, 20 dB gain, IM3 at
    # -70 dBm out: OIP3 = -10 + (-10 - -70)/2 = +20 dBm, IIP3 = 20 - 20 = 0 dBm.
    r = point_intercepts(-30.0, -30.0, -10.0, -10.0, -70.0, -70.0)
    assert r.gain_db == pytest.approx(20.0)
    assert r.oip3_lower_dbm == pytest.approx(20.0)
    assert r.oip3_upper_dbm == pytest.approx(20.0)
    assert r.iip3_lower_dbm == pytest.approx(0.0)
    assert r.iip3_upper_dbm == pytest.approx(0.0)


def test_unequal_tones_recover_true_iip3():
    a1, a3 = 10.0, -2000.0  # 20 dB voltage gain, compressive cubic
    iip3_true = true_iip3_dbm(a1, a3)
    p1 = np.array([-60.0, -55.0, -50.0])
    p2 = p1 + 1.0  # 1 dB imbalance at the DUT input
    f1, f2, lower, upper = two_tone_cubic(p1, p2, a1, a3)
    r = point_intercepts(p1, p2, f1, f2, lower, upper)
    # The only error left is the tiny gain compression at >= 38 dB below IIP3 (< 0.003 dB).
    np.testing.assert_allclose(r.iip3_lower_dbm, iip3_true, atol=0.01)
    np.testing.assert_allclose(r.iip3_upper_dbm, iip3_true, atol=0.01)
    np.testing.assert_allclose(r.oip3_lower_dbm - r.iip3_lower_dbm, r.gain_db)

    # The equal-tone formula on the mean tone output is off by (P2 - P1)/4 = 0.25 dB, with
    # opposite signs for the two products (derived from 2P1+P2 and P1+2P2).
    pout_mean = (f1 + f2) / 2.0
    gain_mean = pout_mean - (p1 + p2) / 2.0
    naive_iip3_lower = pout_mean + (pout_mean - lower) / 2.0 - gain_mean
    naive_iip3_upper = pout_mean + (pout_mean - upper) / 2.0 - gain_mean
    np.testing.assert_allclose(naive_iip3_lower - iip3_true, +0.25, atol=0.01)
    np.testing.assert_allclose(naive_iip3_upper - iip3_true, -0.25, atol=0.01)


@given(
    pin_dbm=st.floats(-120, 30),
    gain_db=st.floats(-30, 50),
    im3_below_db=st.floats(0, 150),
)
def test_equal_tones_reduce_to_simple_formula(pin_dbm, gain_db, im3_below_db):
    # design.md sec 3: with P1 = P2, OIP3 = Pout + (Pout - Pim3)/2 and IIP3 = OIP3 - G.
    pout = pin_dbm + gain_db
    im3 = pout - im3_below_db
    r = point_intercepts(pin_dbm, pin_dbm, pout, pout, im3, im3)
    oip3_simple = pout + (pout - im3) / 2.0
    assert r.oip3_lower_dbm == pytest.approx(oip3_simple, abs=1e-9)
    assert r.oip3_upper_dbm == pytest.approx(oip3_simple, abs=1e-9)
    assert r.iip3_lower_dbm == pytest.approx(oip3_simple - gain_db, abs=1e-9)


# --- noise correction -----------------------------------------------------------------------

def test_noise_correction_matches_power_subtraction():
    noise = np.array([-120.0, -95.5, -60.0])[:, None]
    excess = np.arange(3.25, 20.0, 0.25)[None, :]  # strictly inside (3, 20) dB
    reading = noise + excess
    corrected, upper = noise_corrected_dbm(reading, noise)
    # Direct subtraction in milliwatts with numpy.
    expected = 10.0 * np.log10(10.0 ** (reading / 10.0) - 10.0 ** (noise / 10.0))
    np.testing.assert_allclose(corrected, expected, atol=1e-9)
    assert not upper.any()


def test_noise_correction_boundaries():
    noise = np.full(6, -100.0)
    reading = np.array([-97.0, -96.999, -80.001, -80.0, -60.0, -105.0])
    corrected, upper = noise_corrected_dbm(reading, noise)
    # Exactly 3 dB over: only an upper bound, left as read (design.md sec 3).
    assert corrected[0] == -97.0 and upper[0]
    # Just above 3 dB: corrected by about -3 dB (10log10(1 - 10^-0.3) = -3.02 dB).
    assert corrected[1] == pytest.approx(-96.999 + 10 * np.log10(1 - 10 ** -0.3001), abs=1e-9)
    assert not upper[1]
    # Just below 20 dB corrected (by -0.043 dB), at and above 20 dB left alone.
    assert corrected[2] == pytest.approx(-80.001 + 10 * np.log10(1 - 10 ** -1.9999), abs=1e-9)
    assert corrected[3] == -80.0 and corrected[4] == -60.0
    assert not upper[2:5].any()
    # Below the floor: an upper bound, left as read.
    assert corrected[5] == -105.0 and upper[5]


# --- sweep fits -----------------------------------------------------------------------------

def _sweep(tone_dbm, pout_f1, pout_f2, lower, upper, noise, overload=None, pin2_offset_db=0.0):
    tone = np.asarray(tone_dbm, dtype=float)
    n = tone.size
    noise = np.broadcast_to(np.asarray(noise, dtype=float), (n,))
    return fit_sweep(
        tone_dbm=tone, pin1_dbm=tone, pin2_dbm=tone + pin2_offset_db,
        pout_f1_dbm=pout_f1, pout_f2_dbm=pout_f2, im3_lower_dbm=lower, im3_upper_dbm=upper,
        noise_lower_dbm=noise, noise_upper_dbm=noise,
        overload=np.zeros(n, bool) if overload is None else overload,
    )


def test_fit_exact_power_law_excludes_compressed_points():
    # Exact dB-linear data: slope 1 and 3, IIP3 +3 dBm, gain 15 dB; the top three points are
    # compressed by 0.5, 1.2 and 2.5 dB and must be left out. Noise is negligible here.
    tone = np.arange(-40.0, 2.0, 2.0)
    gain_db, iip3_dbm = 15.0, 3.0
    compression_db = np.zeros_like(tone)
    compression_db[-3:] = [0.5, 1.2, 2.5]
    pout = tone + gain_db - compression_db
    im3 = 3.0 * tone - 2.0 * iip3_dbm + gain_db  # input-referred 3P - 2 IIP3, plus gain
    r = _sweep(tone, pout, pout, im3, im3 - 1.0, noise=-250.0)
    assert r.n_points == tone.size and r.n_valid == tone.size - 3
    assert not r.valid_mask[-3:].any() and r.valid_mask[:-3].all()
    assert r.gain_db == pytest.approx(gain_db, abs=1e-12)
    assert r.iip3_lower_dbm == pytest.approx(iip3_dbm, abs=1e-9)
    assert r.iip3_upper_dbm == pytest.approx(iip3_dbm + 0.5, abs=1e-9)  # 1 dB lower IM3
    assert r.iip3_dbm == pytest.approx(iip3_dbm + 0.25, abs=1e-9)
    assert r.oip3_dbm == pytest.approx(iip3_dbm + 0.25 + gain_db, abs=1e-9)
    assert r.slope_fundamental == pytest.approx(1.0, abs=1e-9)
    assert r.slope_im3_lower == pytest.approx(3.0, abs=1e-9)
    assert r.slope_im3_upper == pytest.approx(3.0, abs=1e-9)
    assert (r.valid_tone_min_dbm, r.valid_tone_max_dbm) == (-40.0, tone[-4])
    assert r.reason is None
    # P1dB between the 0.5 and 1.2 dB points: linear interpolation by hand.
    assert r.p1db_in_dbm == pytest.approx(tone[-3] + 2.0 * 0.5 / 0.7, abs=1e-9)
    assert r.p1db_out_dbm == pytest.approx(r.p1db_in_dbm + gain_db - 1.0, abs=1e-9)


def test_fit_memoryless_cubic_with_noise_floor():
    a1, a3 = 10.0, -2000.0
    iip3_true = true_iip3_dbm(a1, a3)  # about -11.8 dBm
    tone = np.arange(-60.0, -19.0, 1.0)  # stops before the cubic folds over
    f1, f2, lower, upper = two_tone_cubic(tone, tone, a1, a3)
    noise_dbm = -110.0
    # What the analyzer reads: the product plus its own noise, powers adding.
    lower_read, upper_read = power_sum_dbm(lower, noise_dbm), power_sum_dbm(upper, noise_dbm)
    r = _sweep(tone, f1, f2, lower_read, upper_read, noise=noise_dbm)

    im3_clear = lower_read - noise_dbm >= 10.0
    gain = (f1 + f2) / 2.0 - tone
    not_compressed = gain >= 20.0 * np.log10(a1) - 0.3 + 1e-6
    expected_valid = im3_clear & not_compressed
    np.testing.assert_array_equal(r.valid_mask, expected_valid)
    assert (~im3_clear).sum() >= 5 and (~not_compressed).sum() >= 3  # both kinds were excluded

    assert r.slope_fundamental == pytest.approx(1.0, abs=0.05)
    assert r.slope_im3_lower == pytest.approx(3.0, abs=0.05)
    assert r.slope_im3_upper == pytest.approx(3.0, abs=0.05)
    # Bias bound: gain compressed by d (< 0.3 dB) moves a point's IIP3 by d/2, and readings
    # >= 20 dB over the floor keep up to 10log10(1.01) = 0.043 dB of noise (/2 in IIP3).
    assert r.iip3_dbm == pytest.approx(iip3_true, abs=0.15 + 0.022)

    # The fixed-slope fit is least squares: check against numpy's lstsq with the slopes fixed.
    v = r.valid_mask
    lower_corr = 10 * np.log10(10 ** (lower_read / 10) - 10 ** (noise_dbm / 10))
    lower_corr = np.where(lower_read - noise_dbm < 20.0, lower_corr, lower_read)
    b1 = np.linalg.lstsq(np.ones((v.sum(), 1)), (f1 + f2)[v] / 2 - tone[v], rcond=None)[0][0]
    b3 = np.linalg.lstsq(np.ones((v.sum(), 1)), lower_corr[v] - 3 * tone[v], rcond=None)[0][0]
    assert r.iip3_lower_dbm == pytest.approx((b1 - b3) / 2.0, abs=1e-9)
    assert r.oip3_lower_dbm == pytest.approx((b1 - b3) / 2.0 + b1, abs=1e-9)

    # Two-tone P1dB, per tone: 1 + (9/4)(a3/a1) A^2 = 10^(-1/20) (closed form).
    amp_1db = np.sqrt((1 - 10 ** (-1 / 20)) / (2.25 * abs(a3 / a1)))
    assert r.p1db_in_dbm == pytest.approx(float(volts_to_dbm(amp_1db)), abs=0.02)


def test_fit_too_few_valid_points_gives_reason():
    tone = np.arange(-50.0, -38.0, 2.0)  # 6 points
    pout = tone + 20.0
    im3 = 3 * tone + 20.0  # IIP3 0 dBm
    noise = np.full(6, -200.0)
    noise[:3] = im3[:3] - 5.0  # first three IM3 only 5 dB over the floor
    overload = np.zeros(6, bool)
    overload[5] = True
    r = _sweep(tone, pout, pout, im3, im3, noise=noise, overload=overload)
    assert r.n_valid == 2
    assert r.iip3_dbm is None and r.oip3_dbm is None and r.iip3_lower_dbm is None
    assert r.slope_im3_lower is None
    assert r.gain_db == pytest.approx(20.0)
    assert "only 2 of 6 points" in r.reason and "need 3" in r.reason
    assert "3 IM3 within 10 dB of the noise floor" in r.reason
    assert "1 overloaded" in r.reason


def test_small_signal_gain_ignores_overloaded_lowest_point():
    tone = np.arange(-40.0, -20.0, 2.0)
    pout = tone + 12.0
    pout[0] += 5.0  # an overloaded reading would otherwise set the reference gain
    overload = np.zeros(tone.size, bool)
    overload[0] = True
    im3 = 3 * tone + 12.0 - 10.0
    r = _sweep(tone, pout, pout, im3, im3, noise=-250.0, overload=overload)
    assert r.gain_db == pytest.approx(12.0)
    assert r.n_valid == tone.size - 1 and not r.valid_mask[0]


def test_fit_rejects_mismatched_arrays():
    tone = np.arange(-40.0, -30.0, 2.0)
    with pytest.raises(InputError, match="im3_upper_dbm"):
        fit_sweep(tone, tone, tone, tone, tone, tone, tone[:-1], tone, tone, np.zeros(5, bool))


# --- P1dB -----------------------------------------------------------------------------------

def _compression_sweep(a1, a3, cubic_factor):
    pin = np.arange(-40.0, 0.0, 0.05)
    amp = dbm_to_volts(pin)
    gain_db = 20 * np.log10(np.abs(a1 * amp + cubic_factor * a3 * amp**3) / amp)
    return pin, gain_db


def test_p1db_single_tone_is_9_6_db_below_iip3():
    a1, a3 = 10.0, -2000.0
    pin, gain_db = _compression_sweep(a1, a3, 0.75)  # single tone: a1 A + (3/4) a3 A^3
    p_in, p_out = p1db(pin, gain_db, 20 * np.log10(a1))
    # IIP3 - P1dB(single tone) = -10log10(1 - 10^-0.05) = 9.64 dB; "about 9.6 dB" (Razavi,
    # RF Microelectronics, from memory). This is the single-tone input P1dB.
    assert true_iip3_dbm(a1, a3) - p_in == pytest.approx(-10 * np.log10(1 - 10**-0.05), abs=0.01)
    assert true_iip3_dbm(a1, a3) - p_in == pytest.approx(9.6, abs=0.05)
    assert p_out == pytest.approx(p_in + 20 * np.log10(a1) - 1.0)


def test_p1db_two_equal_tones_is_4_77_db_lower():
    a1, a3 = 10.0, -2000.0
    pin, gain_single = _compression_sweep(a1, a3, 0.75)
    _, gain_two = _compression_sweep(a1, a3, 2.25)  # per tone with two: a1 A + (9/4) a3 A^3
    single, _ = p1db(pin, gain_single, 20 * np.log10(a1))
    two, _ = p1db(pin, gain_two, 20 * np.log10(a1))
    # Closed form: the A^2 term is 3x larger with two tones, so A_1dB^2 is 3x smaller:
    # 10log10(3) = 4.77 dB.
    assert single - two == pytest.approx(10 * np.log10(3.0), abs=0.01)


def test_p1db_none_when_not_reached_or_no_headroom():
    pin = np.arange(-30.0, -20.0, 1.0)
    assert p1db(pin, np.full(pin.size, 10.0), 10.0) == (None, None)
    assert p1db(pin, np.full(pin.size, 8.0), 10.0) == (None, None)  # compressed from the start
