"""Flags per point and per result, on sweeps built here from closed forms.

Readings are made as the bench makes them: the device's IM3 (3P - 2 IIP3 + G for a cubic), the
analyzer's own (3 Pout - 2 (TOI + A)) and the sources' residual (3P - 2 IP3sys + G) added as
phasors with numpy's complex arithmetic, then the noise added in power.
"""

import numpy as np
import pytest
from flag_sweeps import GAIN_DB, IIP3_DBM, TONES, reading, sweep

from tonebench.analysis import AnalysisSettings, SweepData, assess_sweep, judge_step
from tonebench.store.models import ANALYZER_CAUSES, FLAGS


def labels(flags):
    return sorted(f.label for f in flags)


def check_vocabulary(assessment):
    for flag in [f for point in assessment.point_flags for f in point] + assessment.result_flags:
        assert flag.flag in FLAGS
        assert flag.cause is None or flag.cause in ANALYZER_CAUSES
        assert flag.detail


# --- the attenuation-step judgement -----------------------------------------------------------

def test_step_keeps_a_real_product():
    j = judge_step(-80.0, -120.0, -80.3, -110.0, 10.0)
    assert bool(j.conclusive) and not bool(j.analyzer_made)
    assert float(j.change_db) == pytest.approx(-0.3, abs=0.01)


@pytest.mark.parametrize("phase_deg, direction", [(0.0, -1), (180.0, +1)])
def test_step_finds_the_analyzer_product_and_its_size(phase_deg, direction):
    device, analyzer = -80.0, -85.0  # the analyzer's own 5 dB below, in or out of phase
    r1 = reading(device, [(analyzer, phase_deg)])
    r2 = reading(device, [(analyzer - 20.0, phase_deg)])  # 10 dB more attenuation: 20 dB less
    j = judge_step(r1, -150.0, r2, -140.0, 10.0)
    assert bool(j.analyzer_made) and np.sign(float(j.change_db)) == direction
    assert abs(float(j.change_db)) > 1.0
    # Collinear phasors: |v1 - v2| = |M| (1 - 10^-1) gives the analyzer's share exactly.
    assert float(j.analyzer_dbm) == pytest.approx(analyzer, abs=1e-6)


def test_step_drop_into_the_noise_still_counts():
    r1 = reading(-100.0, [(-80.0, 0.0)], -130.0)  # the analyzer's own product dominates
    r2 = reading(-100.0, [(-100.0, 0.0)], -95.0)  # the step read sits near its raised floor
    j = judge_step(r1, -130.0, r2, -95.0, 10.0)
    assert bool(j.conclusive) and bool(j.analyzer_made)


def test_step_is_inconclusive_on_noise():
    # The first reading 5 dB over its floor: no comparison, no flag either way.
    j = judge_step(-115.0, -120.0, -108.0, -110.0, 10.0)
    assert not bool(j.conclusive) and not bool(j.analyzer_made)
    # No step made: NaN stays inconclusive.
    j = judge_step(-80.0, -120.0, np.nan, np.nan, np.nan)
    assert not bool(j.conclusive)


# --- assess_sweep -------------------------------------------------------------------------------

def test_clean_sweep_has_no_flags_and_a_tight_bound():
    a = assess_sweep(sweep(step_points=(6, 7)), AnalysisSettings(mixer_toi_dbm=60.0, system_ip3_dbm=80.0))
    assert not any(a.point_flags) and a.result_flags == []
    assert a.fit.iip3_dbm == pytest.approx(IIP3_DBM, abs=1e-6)
    # Only the level accuracy (halved) is left, plus the far-off system products' phasor terms.
    assert a.iip3_bound_db == pytest.approx(0.1, abs=0.01)
    assert a.bound_terms_db["level"] == pytest.approx(0.1)
    assert a.notes == []


@pytest.mark.parametrize("phase_deg", [0.0, 90.0, 180.0, -45.0])
def test_source_intermod_flagged_and_bounded(phase_deg):
    system_ip3 = IIP3_DBM + 7.0  # residual 14 dB under the device's product
    data = sweep(system_ip3_dbm=system_ip3, phase_deg=phase_deg)
    a = assess_sweep(data, AnalysisSettings(system_ip3_dbm=system_ip3))
    check_vocabulary(a)
    assert all(labels(p) == ["source-intermod-limited"] for p in a.point_flags)
    assert labels(a.result_flags) == ["source-intermod-limited"]
    assert abs(a.fit.iip3_dbm - IIP3_DBM) <= a.iip3_bound_db
    # The point error is the phasor bound (halved) of a product 14 dB down, from the reading.
    err = a.point_flags[0][0].error_db
    assert 0.5 * -20 * np.log10(1 - 10 ** (-16 / 20)) < err < 0.5 * -20 * np.log10(1 - 10 ** (-12 / 20))


def test_source_intermod_skipped_with_reason():
    a = assess_sweep(sweep(), AnalysisSettings(system_note="the run has no calibration set"))
    assert "source intermod not checked: the run has no calibration set" in a.notes


def test_analyzer_distortion_predicted_leaves_points_out():
    # Declared TOI 15 dBm at 0 dB attenuation: the analyzer's own IM3 is 2(15 - 13) = 4 dB under.
    a = assess_sweep(sweep(atten_db=0.0, true_toi_dbm=15.0), AnalysisSettings(mixer_toi_dbm=15.0))
    check_vocabulary(a)
    assert all("analyzer-limited (distortion)" in labels(p) for p in a.point_flags)
    assert a.fit.iip3_dbm is None and "analyzer's own IM3" in a.fit.reason
    assert labels(a.result_flags) == ["analyzer-limited (distortion)"]


def test_step_check_reveals_a_worse_analyzer_than_declared():
    # Declared 25 dBm, really 3 dBm: the prediction sees nothing, the step at the two top points
    # shows it, and the effective TOI it implies then condemns the other points too.
    data = sweep(atten_db=10.0, true_toi_dbm=3.0, step_points=(6, 7))
    a = assess_sweep(data, AnalysisSettings(mixer_toi_dbm=25.0))
    assert a.effective_mixer_toi_dbm == pytest.approx(3.0, abs=0.05)
    assert np.all(a.step_change_db[[6, 7]] > 1.0)
    assert all("analyzer-limited (distortion)" in labels(p) for p in a.point_flags)
    flag = a.result_flags[0]
    assert flag.label == "analyzer-limited (distortion)" and "step check" in flag.detail


def test_analyzer_far_down_enters_the_bound_only():
    # 0 dB attenuation but a very linear mixer: 2(40 - 13) = 54 dB under, no flag, a small term.
    a = assess_sweep(sweep(atten_db=0.0, true_toi_dbm=40.0, phase_deg=0.0), AnalysisSettings(mixer_toi_dbm=40.0))
    assert not any(a.point_flags)
    expected = 0.5 * -20 * np.log10(1 - 10 ** (-54 / 20))
    assert a.bound_terms_db["analyzer"] == pytest.approx(expected, rel=0.05)
    assert abs(a.fit.iip3_dbm - IIP3_DBM) <= a.iip3_bound_db


def test_tone_imbalance_flagged_but_intercept_exact():
    a = assess_sweep(sweep(pin2_offset_db=0.8))
    assert all(labels(p) == ["tone-imbalance"] for p in a.point_flags)
    assert a.point_flags[0][0].error_db == pytest.approx(0.2)
    assert a.fit.iip3_dbm == pytest.approx(IIP3_DBM, abs=1e-6)  # the unequal-tone forms
    assert labels(a.result_flags) == ["tone-imbalance"]


def test_slope_flag_with_the_free_slope_gap_as_error():
    a = assess_sweep(sweep(im3_slope=2.5))
    flag = next(f for f in a.result_flags if f.flag == "slope")
    assert "2.50" in flag.detail
    assert flag.error_db == pytest.approx(abs(a.fit.iip3_free_dbm - a.fit.iip3_dbm))
    assert a.fit.slope_im3_lower == pytest.approx(2.5, abs=1e-6)


def test_noise_refuses_and_gives_a_lower_bound():
    # IM3 at -36 dBm in: 3(-36) + 4 + 15 = -89 dBm; a floor at -92 dBm buries every product.
    a = assess_sweep(sweep(noise_dbm=-92.0 + 3 * (TONES - TONES[0])))
    check_vocabulary(a)
    assert a.fit.iip3_dbm is None and a.iip3_bound_db is None
    assert all(p[0].label == "analyzer-limited (noise)" for p in a.point_flags)
    assert labels(a.result_flags) == ["analyzer-limited (noise)"]
    assert a.iip3_at_least_dbm is not None and a.iip3_at_least_dbm <= IIP3_DBM
    assert f"IIP3 >= {a.iip3_at_least_dbm:.2f} dBm" in a.result_flags[0].detail


def test_overload_flags_and_excludes():
    over = np.zeros(TONES.size, bool)
    over[-1] = True
    a = assess_sweep(sweep(overload=over))
    assert labels(a.point_flags[-1]) == ["analyzer-limited (overload)"]
    assert not a.fit.valid_mask[-1] and a.fit.n_valid == TONES.size - 1
    assert a.result_flags == []  # the fit stands on the other points
    # The mixer level above the declared limit counts as overload too.
    a = assess_sweep(sweep(atten_db=0.0), AnalysisSettings(max_mixer_dbm=-20.0))
    flagged = [i for i, p in enumerate(a.point_flags) if "analyzer-limited (overload)" in labels(p)]
    mixer_dbm = TONES + GAIN_DB + 10 * np.log10(2.0)
    assert flagged == list(np.flatnonzero(mixer_dbm > -20.0))


def test_compressed_points_flagged_and_excluded():
    data = sweep()
    pout = np.asarray(data.pout_f1_dbm).copy()
    pout[-2:] -= [0.6, 1.4]
    data = SweepData(**{**data.__dict__, "pout_f1_dbm": pout, "pout_f2_dbm": pout, "raw_f1_dbm": pout, "raw_f2_dbm": pout})
    a = assess_sweep(data)
    assert [labels(p) for p in a.point_flags[-2:]] == [["compressed"], ["compressed"]]
    assert a.point_flags[-1][0].error_db == pytest.approx(0.7)
    assert not a.fit.valid_mask[-2:].any() and a.result_flags == []
