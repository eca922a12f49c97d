"""Flags that mean what they say (issue 9, item 9): a result is flagged only where the test system
may have limited it; points left out keep their reasons as point flags. Measured on the simulated
bench (demo over TCP, or simsweep straight on SimBench) and the real store.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from cleanruns import PATHS, loss_db
from flag_benches import run, write_bench, write_plan
from flag_sweeps import GAIN_DB, IIP3_DBM, power_sum, sweep
from simsweep import measure_sweep
from sqlalchemy import create_engine, func, select
from sqlalchemy.orm import Session
from typer.testing import CliRunner

from tonebench.analysis import AnalysisSettings, assess_sweep
from tonebench.cli import app
from tonebench.sim import physics
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import SimBench
from tonebench.store.models import PointFlag, Result, ResultFlag
from tonebench.units import dbm_to_vpeak

runner = CliRunner(env={"COLUMNS": "220"})


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo run once: (CLI output, database URL, database path)."""
    out_dir = tmp_path_factory.mktemp("demo")
    result = runner.invoke(app, ["demo", "--out", str(out_dir)])
    assert result.exit_code == 0, result.output
    db_path = Path(re.search(r"database:\s+(\S+)", result.output).group(1))
    return result.output, f"sqlite:///{db_path}", db_path


def test_point_flags_do_not_make_a_clean_result_flagged(demo, tmp_path):
    output, db, db_path = demo
    session = Session(create_engine(db))
    # The noisy low end and the compressed top are left out and say why (point flags) ...
    assert session.scalar(select(func.count()).select_from(PointFlag)) > 0
    # ... but nothing of the test system limited the fitted region: no result flag.
    assert session.scalar(select(func.count()).select_from(ResultFlag)) == 0
    n_results = session.scalar(select(func.count()).select_from(Result))
    assert n_results == 3
    before = db_path.read_bytes()

    flagged = runner.invoke(app, ["find", "--db", db, "--flagged"])
    assert flagged.exit_code == 0 and flagged.output.splitlines()[0] == "0 results (dB, dBm)", flagged.output
    unflagged = runner.invoke(app, ["find", "--db", db, "--unflagged"])
    assert unflagged.exit_code == 0 and unflagged.output.splitlines()[0] == "3 results (dB, dBm)", unflagged.output
    noisy = runner.invoke(app, ["find", "--db", db, "--flag", "analyzer-limited"])
    assert noisy.exit_code == 0 and noisy.output.splitlines()[0] == "0 results (dB, dBm)", noisy.output

    page_path = tmp_path / "compare.html"
    compared = runner.invoke(app, ["compare", "--db", db, "--out", str(page_path)])
    assert compared.exit_code == 0 and "(3 results)" in compared.output, compared.output
    page = page_path.read_text(encoding="utf-8")
    assert "No result in this selection is flagged." in page
    assert "flagged (test-system limited)" not in page  # no grey trace

    shown = runner.invoke(app, ["show", re.search(r"run (\S+):", output).group(1)[:8],
                                "--db", db])
    assert shown.exit_code == 0 and "flags: none" in shown.output
    assert "flagged points: analyzer-limited (noise)" in shown.output  # the reasons stay visible
    assert db_path.read_bytes() == before  # the queries wrote nothing


# --- the valid region keeps out points biased by higher-order terms -----------------------------

CENTER_HZ, SPACING_HZ = 2.45e9, 1e6


def test_fifth_order_im3_matches_the_two_tone_power_series():
    """Textbook two-tone expansion of y = a1 x + a3 x^3 + a5 x^5, tones A at f1, f2 (from memory,
    checked here with numpy's FFT): IM3 (3/4) a3 A^3 + (25/8) a5 A^5, 3f1-2f2 (5/8) a5 A^5."""
    n, k1 = 512, 16
    t = np.arange(n)
    a1, a3, a5, amp = 3.0, -0.8, -0.3, 0.4
    x = amp * np.cos(2 * np.pi * k1 * t / n) + amp * np.cos(2 * np.pi * (k1 + 1) * t / n)
    spectrum = np.fft.rfft(a1 * x + a3 * x**3 + a5 * x**5) * 2.0 / n
    im3 = spectrum[k1 - 1].real  # 2 f1 - f2
    assert im3 == pytest.approx(0.75 * a3 * amp**3 + 25.0 / 8.0 * a5 * amp**5, rel=1e-9)
    assert spectrum[k1 - 2].real == pytest.approx(5.0 / 8.0 * a5 * amp**5, rel=1e-9)  # 3 f1 - 2 f2

    # The simulated DUT's fifth-order term gives the same IM3, and meets its IIP5 as defined.
    model = physics.dut_nonlinearity(15.0, -2.0, None, None, iip5_dbm=-4.0)
    tone_v = float(dbm_to_vpeak(-30.0))
    products = physics.two_tone_products_v(model, tone_v, tone_v)
    cubic_only = physics.dut_nonlinearity(15.0, -2.0)
    expected = 0.75 * cubic_only.a3 * tone_v**3 + 25.0 / 8.0 * model.a5 * tone_v**5
    assert model.a5 < 0 and abs(products["im3_low"]) == pytest.approx(abs(expected), rel=1e-6)
    a_iip5 = float(dbm_to_vpeak(-4.0))
    assert 5.0 / 8.0 * abs(model.a5) * a_iip5**5 == pytest.approx(model.a1 * a_iip5, rel=1e-9)


def fifth_order_scenario(seed: int) -> Scenario:
    """The demo's DUT with a fifth-order term that biases the top points of a sweep low."""
    return Scenario(seed=seed, dut={"gain_db": 15.0, "iip3_dbm": -2.0, "p1db_dbm": -12.0, "iip5_dbm": -4.0},
                    analyzer={"level_error_db": 0.4})


def test_sweep_from_the_noise_to_compression_reads_iip3_within_0p2_db():
    for seed in range(4):
        sc = fifth_order_scenario(seed)
        # From the noise floor (the lowest IM3 is under it) to past 1 dB compression, 1 dB steps.
        data = measure_sweep(sc, CENTER_HZ, SPACING_HZ, np.arange(-44.0, -15.0, 1.0))
        a = assess_sweep(data, AnalysisSettings(mixer_toi_dbm=15.0, max_mixer_dbm=-10.0))
        truth = SimBench(sc).truth.true_iip3_dbm(CENTER_HZ)
        assert a.fit.p1db_in_dbm is not None and a.fit.p1db_in_dbm < -15.0  # compression reached
        assert abs(a.fit.iip3_dbm - truth) <= 0.2, (seed, a.fit.iip3_dbm - truth)
        assert abs(a.fit.iip3_dbm - truth) <= a.iip3_bound_db
        assert a.result_flags == []
        # The trimmed points say why, and sit above the fitted region.
        trimmed = np.array(["slope" in {f.flag for f in p} for p in a.point_flags])
        assert trimmed.any() and not (trimmed & a.fit.valid_mask).any()
        assert data.tone_dbm[trimmed].min() > a.fit.valid_tone_max_dbm


# --- the attenuation-step check allows for noise ------------------------------------------------


def test_a_noisy_step_comparison_does_not_condemn_the_analyzer():
    """A product 12 dB over the noise at the stepped attenuation moves 1.18 dB (noise, not the
    analyzer): before, it implied a mixer TOI 14 dB under the declared one and threw out the sweep."""
    tones = np.arange(-39.0, -22.0, 2.0)  # IM3 -98 dBm at the lowest tone, 22 dB over the noise
    data = sweep(tones=tones, noise_dbm=-120.0, true_toi_dbm=15.0, step_points=(0, len(tones) - 2, len(tones) - 1))
    step_noise_dbm = data.raw_noise_lower_step_dbm[0]
    moved = {}
    for side in ("lower", "upper"):
        raw = getattr(data, f"raw_{side}_step_dbm").copy()
        c1 = 10.0 * np.log10(10.0 ** (data.im3_lower_dbm[0] / 10.0) - 10.0 ** (-120.0 / 10.0))
        assert c1 - step_noise_dbm == pytest.approx(12.0, abs=0.1)
        raw[0] = power_sum(c1 + 1.18, step_noise_dbm)  # the noisy comparison
        moved[f"raw_{side}_step_dbm"] = raw
    data = type(data)(**{**data.__dict__, **moved})
    a = assess_sweep(data, AnalysisSettings(mixer_toi_dbm=15.0, max_mixer_dbm=0.0))
    assert not any(a.point_flags) and a.result_flags == [], [f.detail for p in a.point_flags for f in p]
    assert a.effective_mixer_toi_dbm == 15.0  # the declared figure stands
    assert np.isnan(a.step_change_db[0])  # neither the device's nor the analyzer's: not decisive
    assert a.step_change_db[-1] < 1.0  # the clean top points still vouch for the device
    assert abs(a.fit.iip3_dbm - IIP3_DBM) <= 0.1 and a.fit.n_valid == tones.size
    assert GAIN_DB == pytest.approx(a.fit.gain_db)


def test_a_clear_analyzer_product_at_low_snr_is_still_found():
    # A step reading 12 dB over its noise that moved 6 dB is beyond what noise does there.
    from tonebench.analysis import judge_step
    from tonebench.analysis.flags import step_limit_db

    limit = float(step_limit_db(22.0, 12.0))
    assert 1.18 < limit < 6.0
    j = judge_step(-98.0, -120.0, -104.0, -110.0, 10.0)
    assert bool(j.conclusive) and bool(j.analyzer_made)
    j = judge_step(-98.0, -120.0, power_sum(-98.0 + 1.18, -110.0), -110.0, 10.0)
    assert not bool(j.conclusive) and not bool(j.analyzer_made)


# --- the source-intermod check charges the residual at each point's attenuation ----------------


def residual_calibrated_run(tmp_path, dut_iip3_dbm: float, residual_atten_db: float):
    """A clean bench (sources' residual intercept +45 dBm); the thru run at residual_atten_db, where
    the analyzer's own IM3 dominates it; then a run of a DUT of that IIP3 with automatic attenuation."""
    from tonebench.calibration import workflow

    bench = write_bench(tmp_path, system_ip3_dbm=45.0)
    text = bench.read_text(encoding="utf-8")
    bench.write_text(text.replace("iip3_dbm = -2.0", f"iip3_dbm = {dut_iip3_dbm!r}")
                     .replace("p1db_dbm = -12.0", f"p1db_dbm = {dut_iip3_dbm - 10.0!r}"), encoding="utf-8")
    db = f"sqlite:///{tmp_path / 'runs.db'}"
    files = {}
    for path in PATHS:
        files[path] = tmp_path / f"{path}.csv"
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss_db(path, f)!r}" for f in (2.3e9, 2.6e9)))
    workflow.import_tables(db, "thru-cal", files)
    workflow.measure_residual(db, "thru-cal", bench,
                              write_plan(tmp_path, -34.0, -22.0, atten_db=residual_atten_db, name="residual.toml"))
    top = dut_iip3_dbm - 14.0
    return run(tmp_path, write_plan(tmp_path, top - 14.0, top), bench, cal_name="thru-cal")


def test_unresolved_sources_share_is_not_charged_the_whole_residual(tmp_path):
    outcome, session, db = residual_calibrated_run(tmp_path, 8.0, 0.0)
    from tonebench.store.models import SystemResidual

    residual = session.scalars(select(SystemResidual)).one()
    # The thru could not resolve the sources' share: the analyzer's own IM3 made the residual.
    assert residual.source_ip3_dbm is None and residual.system_ip3_dbm < 20.0
    assert residual.sweep_json["source_ip3_min_dbm"] > residual.system_ip3_dbm + 15.0
    result = session.scalars(select(Result)).one()
    assert session.scalar(select(func.count()).select_from(ResultFlag)) == 0
    assert not any(f.flag == "source-intermod-limited" for f in session.scalars(select(PointFlag)))
    assert result.details_json["bound_terms_db"]["source"] < 0.05
    truth = 8.0 + 1.0 * (2.45e9 - 2.45e9) / 1e9
    assert abs(result.iip3_dbm - truth) <= result.iip3_bound_db < 0.5
    shown = runner.invoke(app, ["show", outcome.guid[:8], "--db", db])
    assert shown.exit_code == 0 and "flags: none" in shown.output


def test_residual_carried_to_the_attenuation_of_each_point():
    from tonebench.analysis.attenuation import residual_ip3_at_atten_dbm
    from tonebench.calibration.residual import check_shares

    # Analyzer's share alone at 0 dB: its intercept rises dB for dB with attenuation.
    assert residual_ip3_at_atten_dbm(None, 16.0, 0.0, [0.0, 10.0, 24.0]) == pytest.approx([16.0, 26.0, 40.0])
    # Both in phase: equal shares give 3 dB less than either.
    assert float(residual_ip3_at_atten_dbm(30.0, 20.0, 0.0, 10.0)) == pytest.approx(30.0 - 10 * np.log10(2))
    shares = check_shares(16.3, None, 16.3, 0.0, source_ip3_min_dbm=36.3)
    assert (shares.source_ip3_dbm, shares.source_is_bound, shares.analyzer_ip3_dbm) == (36.3, True, 16.3)
    assert check_shares(None, None, None, 0.0) is None
    # A set without the split charges the whole residual to the sources, as before.
    whole = check_shares(16.3, None, None, 0.0, split_known=False)
    assert (whole.source_ip3_dbm, whole.analyzer_ip3_dbm) == (16.3, None)


# --- acceptance: clean runs carry no test-system flag ------------------------------------------


def test_seeded_clean_runs_with_automatic_attenuation_carry_no_system_flag(tmp_path):
    """A few seeds of tests/benchmarks/bench_clean_flags.py (which runs a hundred): random clean
    devices from the noise floor to compression, residual from a thru at 0 dB attenuation."""
    from cleanruns import clean_runs

    outcomes = clean_runs(tmp_path, range(8))
    assert [o.device.seed for o in outcomes if o.system_flagged] == []
    assert [o.device.seed for o in outcomes if o.result_flags] == []
    assert [o.device.seed for o in outcomes if o.iip3_dbm is None] == []
    # Every sweep still says why its ends were left out.
    assert all(("analyzer-limited", "noise") in o.point_flags for o in outcomes)
    assert all(abs(o.error_db) <= o.bound_db for o in outcomes)
