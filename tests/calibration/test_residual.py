"""The system residual: per-point intercepts and the attenuation-step split (numpy, exact cases), and
the measurement on a simulated thru with known source and analyzer intercepts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session
from calibration_benches import simulation_table, true_rows, truth, write_bench, write_plan
from typer.testing import CliRunner

from tonebench.calibration import workflow
from tonebench.calibration.residual import InterceptEstimate, split_shares, system_intercept
from tonebench.cli import app
from tonebench.store.models import SystemResidual

runner = CliRunner(env={"COLUMNS": "220"})


def in_phase_ip3_dbm(*ip3s_dbm: float) -> float:
    """Intercept of IM3 contributions adding in phase: amplitudes 10^(-IP3/10) add (design sec. 3/4)."""
    return -10 * math.log10(sum(10 ** (-ip3 / 10) for ip3 in ip3s_dbm))


def test_intercept_from_readings_on_the_slope_3_line():
    tone_dbm = np.array([-20.0, -15.0, -10.0, -5.0])
    ip3_dbm = 28.0
    # Design section 3: Pim3 = 3 P - 2 IP3 for equal tones.
    im3_dbm = 3 * tone_dbm - 2 * ip3_dbm
    noise_dbm = np.full(4, -200.0)
    estimate = system_intercept(tone_dbm, tone_dbm, im3_dbm, im3_dbm, noise_dbm, noise_dbm, np.zeros(4, bool))
    assert estimate.ip3_dbm == pytest.approx(ip3_dbm, abs=1e-9) and estimate.n_valid == 8
    # A reading 10 to 20 dB over the noise holds the noise power too; it is taken out (design sec. 3).
    near_noise_dbm = im3_dbm - 15.0
    reading_dbm = 10 * np.log10(10 ** (im3_dbm / 10) + 10 ** (near_noise_dbm / 10))
    corrected = system_intercept(tone_dbm, tone_dbm, reading_dbm, reading_dbm, near_noise_dbm, near_noise_dbm,
                                 np.zeros(4, bool))
    assert corrected.ip3_dbm == pytest.approx(ip3_dbm, abs=1e-9)
    # Unequal tones: lower ~ 2 P1 + P2, upper ~ P1 + 2 P2.
    p1, p2 = tone_dbm + 0.4, tone_dbm - 0.3
    lower, upper = 2 * p1 + p2 - 2 * ip3_dbm, p1 + 2 * p2 - 2 * ip3_dbm
    assert system_intercept(p1, p2, lower, upper, noise_dbm, noise_dbm, np.zeros(4, bool)).ip3_dbm == pytest.approx(ip3_dbm)
    # Readings within 10 dB of the noise are not used; overloaded ones neither.
    noisy = np.array([-200.0, -200.0, -90.0, -200.0])
    overload = np.array([False, False, False, True])
    partial = system_intercept(tone_dbm, tone_dbm, im3_dbm, im3_dbm, noisy, noisy, overload)
    assert partial.n_valid == 4 and partial.ip3_dbm == pytest.approx(ip3_dbm, abs=1e-9)


def test_nothing_readable_gives_a_lower_bound():
    tone_dbm = np.array([-10.0, -5.0])
    noise_dbm = np.array([-100.0, -100.0])
    estimate = system_intercept(tone_dbm, tone_dbm, noise_dbm + 2, noise_dbm + 2, noise_dbm, noise_dbm, np.zeros(2, bool))
    # The product is under noise + 10 dB; the strongest point bounds best: (3 * -5 - (-90)) / 2.
    assert estimate.ip3_dbm is None and estimate.ip3_min_dbm == pytest.approx((3 * -5.0 + 90.0) / 2)


@pytest.mark.parametrize(("source_dbm", "analyzer_dbm"), [(25.0, 40.0), (40.0, 25.0), (30.0, 31.0)])
def test_split_recovers_both_shares_exactly(source_dbm, analyzer_dbm):
    step_db = 10.0
    base = InterceptEstimate(in_phase_ip3_dbm(source_dbm, analyzer_dbm), None, 8)
    # The analyzer's intercept rises dB for dB with its attenuation; the sources' does not.
    stepped = InterceptEstimate(in_phase_ip3_dbm(source_dbm, analyzer_dbm + step_db), None, 8)
    split = split_shares(base, stepped, step_db)
    assert split.source_ip3_dbm == pytest.approx(source_dbm, abs=1e-9)
    assert split.analyzer_ip3_dbm == pytest.approx(analyzer_dbm, abs=1e-9)
    assert split.system_ip3_dbm == base.ip3_dbm


def test_a_share_below_the_resolution_is_a_bound():
    step_db = 10.0
    base = InterceptEstimate(in_phase_ip3_dbm(20.0, 45.0), None, 8)  # the sources' share is 0.3 % of the whole
    split = split_shares(base, InterceptEstimate(in_phase_ip3_dbm(20.0 + step_db, 45.0), None, 8), step_db)
    assert split.analyzer_ip3_dbm == pytest.approx(20.0, abs=1e-9)
    assert split.source_ip3_dbm is None and split.source_ip3_min_dbm == pytest.approx(base.ip3_dbm + 20.0)


def test_split_when_the_step_reading_is_lost_in_the_noise():
    base = InterceptEstimate(20.0, None, 8)
    split = split_shares(base, InterceptEstimate(None, 35.0, 0), 10.0)
    assert split.analyzer_ip3_dbm == 20.0 and split.source_ip3_dbm is None
    # k_src <= (10^-3.5 - 0.1 * 10^-2) / 0.9 < 0: nothing of the sources' share can be shown...
    assert split.source_ip3_min_dbm is None
    bounded = split_shares(base, InterceptEstimate(None, 22.0, 0), 10.0)
    # ...unless the bound is weak: k_src <= (10^-2.2 - 0.1 * 10^-2) / 0.9.
    assert bounded.source_ip3_min_dbm == pytest.approx(-10 * math.log10((10 ** -2.2 - 0.1 * 10 ** -2) / 0.9))
    nothing = split_shares(InterceptEstimate(None, 30.0, 0), InterceptEstimate(None, 35.0, 0), 10.0)
    assert (nothing.system_ip3_dbm, nothing.system_ip3_min_dbm, nothing.source_ip3_min_dbm) == (None, 30.0, 30.0)


def measure_on_thru(tmp_path, simulation, use_cli: bool = False) -> SystemResidual:
    """A set holding the true losses (the residual is what is tested here), then the thru sweep."""
    db = f"sqlite:///{tmp_path / 'r.db'}"
    bench = write_bench(tmp_path, simulation)
    plan = write_plan(tmp_path, centers_hz=(2.45e9,), atten_db=10.0, rbw_hz=100.0)
    files = {}
    for path, rows in true_rows(simulation, np.linspace(2.40e9, 2.50e9, 11)).items():
        files[path] = tmp_path / f"{path}.csv"
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss!r}" for f, loss in rows))
    workflow.import_tables(db, "thru-cal", files)
    if use_cli:
        result = runner.invoke(app, ["cal", "measure-residual", "thru-cal", "--bench", str(bench), "--plan", str(plan),
                                     "--db", db])
        assert result.exit_code == 0, result.output
        assert "residual 2.45 GHz" in result.output
    else:
        workflow.measure_residual(db, "thru-cal", bench, plan)
    with Session(create_engine(db)) as session:
        return session.scalars(select(SystemResidual)).one()


def analyzer_truth_dbm(simulation, atten_db: float) -> float:
    """The analyzer's share at the DUT input plane: its input intercept (TOI + attenuation, design
    section 4) moved back through the output loss."""
    return simulation["analyzer"]["mixer_toi_dbm"] + atten_db + truth(simulation).true_loss_db("out", 2.45e9)


def test_residual_dominated_by_the_sources(tmp_path):
    simulation = simulation_table(21, sources={"system_ip3_dbm": 25.0}, analyzer={"mixer_toi_dbm": 30.0})
    row = measure_on_thru(tmp_path, simulation, use_cli=True)
    analyzer_dbm = analyzer_truth_dbm(simulation, 10.0)
    assert row.atten_db == 10.0
    assert row.system_ip3_dbm == pytest.approx(in_phase_ip3_dbm(25.0, analyzer_dbm), abs=1.0)
    assert row.source_ip3_dbm == pytest.approx(25.0, abs=1.0)
    # The minor share: unresolved or well above the sources'.
    assert row.analyzer_ip3_dbm is None or row.analyzer_ip3_dbm > 25.0 + 8.0
    sweeps = row.sweep_json["sweeps"]
    assert [s["atten_db"] for s in sweeps] == [10.0, 20.0] and len(row.sweep_json["tone_dbm"]) == 4


def test_residual_dominated_by_the_analyzer(tmp_path):
    simulation = simulation_table(22, sources={"system_ip3_dbm": 70.0}, analyzer={"mixer_toi_dbm": 0.0})
    row = measure_on_thru(tmp_path, simulation)
    analyzer_dbm = analyzer_truth_dbm(simulation, 10.0)
    assert row.system_ip3_dbm == pytest.approx(analyzer_dbm, abs=1.0)
    assert row.analyzer_ip3_dbm == pytest.approx(analyzer_dbm, abs=1.0)
    assert row.source_ip3_dbm is None and row.sweep_json["source_ip3_min_dbm"] > analyzer_dbm + 15.0


def test_residual_needs_a_thru_confirmed_on_hardware(tmp_path):
    simulation = simulation_table(2)
    bench = write_bench(tmp_path, simulation)
    text = bench.read_text().split("[simulation]")[0]
    for role in ("source1", "source2", "analyzer", "power_meter"):
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "TCPIP0::127.0.0.1::1::SOCKET"\n')
    hardware = tmp_path / "hw.toml"
    hardware.write_text(text)
    plan = write_plan(tmp_path)
    db = f"sqlite:///{tmp_path / 'h.db'}"
    good = tmp_path / "t.csv"
    good.write_text("freq_hz,loss_db\n2.3e9,3\n2.6e9,3.5\n")
    assert runner.invoke(app, ["cal", "import-table", "hw", "--loss-in1", str(good), "--loss-in2", str(good), "--loss-out", str(good),
                               "--db", db]).exit_code == 0
    result = runner.invoke(app, ["cal", "measure-output", "hw2", "--bench", str(hardware), "--plan", str(plan), "--db", db])
    assert result.exit_code == 2 and "not in this database" in result.output
    result = runner.invoke(app, ["cal", "measure-residual", "hw", "--bench", str(hardware), "--plan", str(plan), "--db", db])
    assert result.exit_code == 2 and "--thru-in-place" in result.output
