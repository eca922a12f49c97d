"""The simulated bench as a whole: readings, virtual clock, truth, SCPI front panels, TCP serving."""

import math
import tomllib

import numpy as np
import pydantic
import pytest

from conftest import PROJECT_ROOT
from tonebench.sim.signal_chain import SimBench
from tonebench.sim.instruments import SimAnalyzer, SimSource
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario

DRIVERS = PROJECT_ROOT / "drivers"
F1_HZ, F2_HZ = 2.449e9, 2.451e9
LOW_IM3_HZ, HIGH_IM3_HZ = 2 * F1_HZ - F2_HZ, 2 * F2_HZ - F1_HZ


def scenario(**tables) -> Scenario:
    """Scenario with the given overrides, e.g. analyzer={"mixer_toi_dbm": 300}."""
    return Scenario.model_validate(tables)


QUIET = {"sources": {"system_ip3_dbm": 300.0}, "analyzer": {"mixer_toi_dbm": 300.0, "danl_dbm_per_hz": -170.0}}


def quiet(**more) -> Scenario:
    """No test-system distortion, low analyzer noise: readings show the DUT alone."""
    tables = {name: dict(values) for name, values in QUIET.items()}
    for name, values in more.items():
        if isinstance(values, dict):
            tables.setdefault(name, {}).update(values)
        else:
            tables[name] = values
    return scenario(**tables)


def tones_at_dut(bench: SimBench, tone_dbm: float) -> None:
    """Both tones at tone_dbm at the DUT input plane (source powers raised by the true input losses), settled."""
    for index, path, freq_hz in ((1, "in1", F1_HZ), (2, "in2", F2_HZ)):
        power_dbm = tone_dbm + bench.truth.true_loss_db(path, freq_hz)
        bench.set_source(index, freq_hz=freq_hz, power_dbm=power_dbm, rf_on=True)
        bench.settle_source(index)


def read(bench: SimBench, freq_hz: float, span_hz: float = 1e3, rbw_hz: float = 10.0, atten_db: float = 0.0) -> float:
    state = bench.analyzer
    state.continuous = False
    state.center_hz = state.marker_freq_hz = freq_hz
    state.span_hz, state.rbw_hz, state.atten_db = span_hz, rbw_hz, atten_db
    bench.sweep()
    return bench.marker_power_dbm()


def noise_mean_dbm(bench: SimBench, rbw_hz: float, atten_db: float) -> float:
    """Mean (in power) of a whole trace with the sources off."""
    read(bench, 1e9, span_hz=100 * rbw_hz, rbw_hz=rbw_hz, atten_db=atten_db)
    return 10 * np.log10(np.mean(10 ** (bench.analyzer.trace_dbm / 10)))


# --- scenario ------------------------------------------------------------------------------------


def test_scenario_defaults_and_validation():
    default = Scenario()
    assert default.dut.gain_db == 15.0 and default.analyzer.noise_averages == 16 and default.dut.p1db_dbm is None
    for bad in ({"dut": {"nf_db": -1.0}}, {"analyzer": {"noise_averages": 0}}, {"dut": {"colour": 1}},
                {"dut": {"iip3_dbm": -2.0, "p1db_dbm": -8.0}},
                {"sources": {"min_power_dbm": 0.0, "max_power_dbm": -10.0}}):
        with pytest.raises(pydantic.ValidationError):
            Scenario.model_validate(bad)
    assert Scenario.model_validate({"dut": {"p1db_dbm": -14.0}}).dut.p1db_dbm == -14.0


# --- truth and readings --------------------------------------------------------------------------


def test_truth_values_follow_slopes():
    truth = SimBench(scenario(dut={"p1db_dbm": -14.0})).truth
    # Linear in dB: 15 dB - 2 dB/GHz * 0.55 GHz; IIP3 -2 + 1 * 0.55.
    assert truth.true_gain_db(3.0e9) == pytest.approx(15.0 - 2.0 * 0.55)
    assert truth.true_iip3_dbm(3.0e9) == pytest.approx(-2.0 + 0.55)
    assert truth.true_oip3_dbm(3.0e9) == pytest.approx(15.0 - 1.1 - 2.0 + 0.55)
    assert truth.true_loss_db("out", 3.0e9) == pytest.approx(1.5 + 0.4 * 0.55)
    # P1dB keeps its distance below IIP3 (12 dB here), found numerically from the model.
    assert truth.true_p1db_dbm(2.45e9) == pytest.approx(-14.0, abs=0.01)
    assert truth.true_p1db_dbm(3.0e9) == pytest.approx(-14.0 + 0.55, abs=0.01)
    with pytest.raises(ValueError):
        truth.true_loss_db("sideways", 1e9)


def test_small_signal_im3_matches_oip3_formula():
    bench = SimBench(quiet())
    tone_dbm = -40.0
    tones_at_dut(bench, tone_dbm)
    center_hz = (F1_HZ + F2_HZ) / 2
    gain_db, oip3_dbm = bench.truth.true_gain_db(center_hz), bench.truth.true_oip3_dbm(center_hz)
    out_dbm = tone_dbm + gain_db
    # Design section 3: OIP3 = Pout + (Pout - Pim3)/2, so Pim3 = 3 Pout - 2 OIP3 at the DUT output plane.
    for freq_hz in (LOW_IM3_HZ, HIGH_IM3_HZ):
        im3_dbm = read(bench, freq_hz) + bench.truth.true_loss_db("out", freq_hz)
        assert im3_dbm == pytest.approx(3 * out_dbm - 2 * oip3_dbm, abs=0.05)
    for freq_hz in (F1_HZ, F2_HZ):
        assert read(bench, freq_hz) + bench.truth.true_loss_db("out", freq_hz) == pytest.approx(out_dbm, abs=0.02)


@pytest.mark.parametrize("ratio_db", [3.0, 6.0, 12.0])
def test_source_residual_adds_to_dut_im3_as_phasor(ratio_db):
    # Residual at the DUT input: 3P - 2 IP3_sys, at the output + G; DUT product: 3P + G - 2 IIP3.
    # Their ratio D = 2 (IP3_sys - IIP3); choose IP3_sys to make it ratio_db.
    iip3_dbm = SimBench(Scenario()).truth.true_iip3_dbm((F1_HZ + F2_HZ) / 2)
    system_ip3_dbm = iip3_dbm + ratio_db / 2
    readings = {}
    for label, ip3_dbm, phase_deg in (("dut", 300.0, 0.0), ("0", system_ip3_dbm, 0.0), ("180", system_ip3_dbm, 180.0)):
        bench = SimBench(quiet(sources={"system_ip3_dbm": ip3_dbm}, coherent_phase_deg=phase_deg))
        tones_at_dut(bench, -40.0)
        readings[label] = read(bench, LOW_IM3_HZ)
    # Design section 4: off by 20 log10(1 +/- 10^(-D/20)); here as a direct complex sum.
    ratio = 10 ** (-ratio_db / 20)
    for label, phase_rad in (("0", 0.0), ("180", np.pi)):
        expected_db = 20 * np.log10(abs(1 + ratio * np.exp(1j * phase_rad)))
        assert readings[label] - readings["dut"] == pytest.approx(expected_db, abs=0.05)


def test_analyzer_made_im3_drops_20_db_with_10_db_more_attenuation():
    # Design section 4: an analyzer-made product's input-referred level falls 2 dB per dB of attenuation.
    thru = {"gain_db": 0.0, "gain_slope_db_per_ghz": 0.0, "iip3_dbm": 100.0, "nf_db": 0.0}
    bench = SimBench(scenario(dut=thru, sources={"system_ip3_dbm": 300.0}, analyzer={"danl_dbm_per_hz": -170.0}))
    tones_at_dut(bench, -20.0)  # below the mixer overload level even at 0 dB attenuation
    at_0_db = read(bench, LOW_IM3_HZ, atten_db=0.0)
    at_10_db = read(bench, LOW_IM3_HZ, atten_db=10.0)
    # Expected from the intercept formula with input intercept TOI + atten (tones -20 - out loss).
    tone_in_dbm = -20.0 - bench.truth.true_loss_db("out", F1_HZ)
    assert at_0_db == pytest.approx(3 * tone_in_dbm - 2 * 15.0, abs=0.2)
    assert at_0_db - at_10_db == pytest.approx(20.0, abs=0.3)


def test_gaussian_rbw_line_half_rbw_off_reads_3_db_low():
    bench = SimBench(quiet())
    bench.set_source(1, freq_hz=F1_HZ, power_dbm=-30.0, rf_on=True)
    bench.settle_source(1)
    rbw_hz = 1000.0
    read(bench, F1_HZ, span_hz=4 * rbw_hz, rbw_hz=rbw_hz)  # trace points every RBW/250
    trace_hz, trace_dbm = bench.analyzer.trace_freq_hz, bench.analyzer.trace_dbm
    on_line = trace_dbm[np.argmin(abs(trace_hz - F1_HZ))]
    half_rbw_off = trace_dbm[np.argmin(abs(trace_hz - (F1_HZ + rbw_hz / 2)))]
    # 3 dB bandwidth = RBW: half power (10 log10(1/2) = -3.01 dB) at RBW/2 off the line.
    assert half_rbw_off - on_line == pytest.approx(10 * np.log10(0.5), abs=0.02)


def test_noise_reading_scales_with_rbw_and_attenuation():
    # DUT noise made negligible so the analyzer's own floor shows.
    bench = SimBench(scenario(dut={"gain_db": -60.0, "gain_slope_db_per_ghz": 0.0}, analyzer={"noise_averages": 64}))
    at_100 = noise_mean_dbm(bench, 100.0, 0.0)
    # DANL + 10 log10(noise bandwidth), Gaussian noise bandwidth sqrt(pi/(4 ln2)) RBW (Gaussian integral).
    assert at_100 == pytest.approx(-150.0 + 10 * np.log10(math.sqrt(math.pi / (4 * math.log(2))) * 100.0), abs=0.1)
    # kTB: noise power proportional to bandwidth, 10 dB per decade of RBW.
    assert noise_mean_dbm(bench, 1000.0, 0.0) - at_100 == pytest.approx(10.0, abs=0.1)
    assert noise_mean_dbm(bench, 10000.0, 0.0) - at_100 == pytest.approx(20.0, abs=0.1)
    # DANL rises dB for dB with input attenuation.
    assert noise_mean_dbm(bench, 100.0, 20.0) - at_100 == pytest.approx(20.0, abs=0.1)


def test_dut_noise_adds_to_analyzer_floor():
    bench = SimBench(scenario(dut={"gain_db": 40.0, "gain_slope_db_per_ghz": 0.0, "nf_db": 3.0, "iip3_dbm": 0.0},
                              analyzer={"noise_averages": 64, "danl_dbm_per_hz": -200.0}))
    # kT (-174 dBm/Hz, SI Boltzmann constant, 2019) + NF + G - out loss at 1 GHz.
    expected_dbm_per_hz = 10 * np.log10(1.380649e-23 * 290 / 1e-3) + 3.0 + 40.0 - bench.truth.true_loss_db("out", 1e9)
    measured_dbm_per_hz = noise_mean_dbm(bench, 1000.0, 0.0) - 10 * np.log10(1.0645 * 1000.0)
    assert measured_dbm_per_hz == pytest.approx(expected_dbm_per_hz, abs=0.1)


def test_level_error_and_flatness_shift_readings():
    plain = SimBench(quiet())
    shifted = SimBench(quiet(analyzer={"level_error_db": 0.7, "flatness_db_per_ghz": -0.2}))
    for bench in (plain, shifted):
        tones_at_dut(bench, -40.0)
    assert read(shifted, F1_HZ) - read(plain, F1_HZ) == pytest.approx(0.7 - 0.2 * F1_HZ / 1e9, abs=0.01)


def test_same_seed_same_trace():
    traces = []
    for seed in (5, 5, 6):
        bench = SimBench(scenario(seed=seed))
        noise_mean_dbm(bench, 100.0, 10.0)
        traces.append(bench.analyzer.trace_dbm)
    assert np.array_equal(traces[0], traces[1])
    assert not np.array_equal(traces[0], traces[2])


def test_overload_compresses_and_sets_status_bit():
    readings, status = {}, {}
    for limit_dbm in (0.0, -30.0):
        bench = SimBench(quiet(analyzer={"overload_mixer_dbm": limit_dbm}))
        analyzer = SimAnalyzer(bench)
        tones_at_dut(bench, -30.0)  # about -17 dBm per tone at the analyzer, -14 dBm total
        readings[limit_dbm] = read(bench, F1_HZ, atten_db=0.0)
        status[limit_dbm] = int(analyzer.handle_line("STAT:QUES:COND?"))
    assert status == {0.0: 0, -30.0: 8}  # bit 3
    assert 1.0 <= readings[0.0] - readings[-30.0] <= 3.0


def test_damage_is_recorded():
    bench = SimBench(scenario(analyzer={"damage_dbm": -10.0}))
    tones_at_dut(bench, -40.0)
    assert not bench.analyzer.damaged and bench.damage_log == []
    before_s = bench.clock_s
    tones_at_dut(bench, -15.0)  # about 0 dBm at the analyzer input
    assert bench.analyzer.damaged
    clock_s, input_dbm = bench.damage_log[0]
    assert input_dbm > -10.0 and before_s < clock_s <= bench.clock_s
    bench.reset_analyzer()
    assert bench.analyzer.damaged  # hardware damage survives *RST


# --- virtual clock -------------------------------------------------------------------------------


def test_sweep_advances_clock_by_sweep_time():
    bench = SimBench(Scenario())
    start_s = bench.clock_s
    read(bench, 1e9, span_hz=1e4, rbw_hz=100.0)
    # Design section 5: k * span / RBW^2 with k = 2.5.
    assert bench.clock_s - start_s == pytest.approx(2.5 * 1e4 / 100.0**2)
    read(bench, 1e9, span_hz=1e3, rbw_hz=1e5)
    assert bench.clock_s - start_s == pytest.approx(2.5 + 1e-3)  # lower bound of a sweep


def test_sweep_before_opc_sees_old_power():
    bench = SimBench(quiet())
    source = SimSource(bench, 1)
    for line in (f"SOUR:FREQ {F1_HZ:.3f}", "SOUR:POW -30.00", "OUTP ON"):
        source.handle_line(line)
    assert source.handle_line("*OPC?") == "1"
    old_dbm = read(bench, F1_HZ, rbw_hz=1e4)  # span 1 kHz at 10 kHz RBW: 1 ms sweep, shorter than 5 ms settling
    source.handle_line("SOUR:POW -20.00")
    assert read(bench, F1_HZ, rbw_hz=1e4) == pytest.approx(old_dbm, abs=0.01)
    before_s = bench.clock_s
    assert source.handle_line("*OPC?") == "1"
    assert bench.clock_s > before_s  # waited on the virtual clock for the settling deadline
    assert read(bench, F1_HZ, rbw_hz=1e4) - old_dbm == pytest.approx(10.0, abs=0.05)


def test_change_in_force_once_clock_passes_deadline():
    bench = SimBench(quiet())
    bench.set_source(1, freq_hz=F1_HZ, power_dbm=-30.0, rf_on=True)
    first_dbm = read(bench, F1_HZ, rbw_hz=100.0)  # starts before the deadline: RF still off, noise only
    second_dbm = read(bench, F1_HZ, rbw_hz=100.0)  # the first 25 ms sweep took the clock past it
    assert second_dbm - first_dbm > 40.0


# --- SCPI front panels ---------------------------------------------------------------------------


def dialect(name: str) -> dict:
    return tomllib.loads((DRIVERS / f"{name}.toml").read_text())["operations"]


def run(device, operations: dict, name: str, **values) -> str | None:
    op = operations[name]
    reply = device.handle_line((op.get("command") or op["query"]).format(**values))
    errors = device.handle_line("SYST:ERR?")
    assert errors.startswith("0,"), f"{name}: {errors}"
    return reply


@pytest.mark.parametrize("analyzer_dialect", ["generic-analyzer", "verbose-analyzer"])
def test_dialect_strings_drive_the_bench(analyzer_dialect):
    bench = SimBench(quiet())
    source_ops, analyzer_ops = dialect("generic-source"), dialect(analyzer_dialect)
    sources = {1: SimSource(bench, 1), 2: SimSource(bench, 2)}
    analyzer = SimAnalyzer(bench)
    tone_dbm = -40.0
    for index, path, freq_hz in ((1, "in1", F1_HZ), (2, "in2", F2_HZ)):
        source, power_dbm = sources[index], tone_dbm + bench.truth.true_loss_db(path, freq_hz)
        assert run(source, source_ops, "identify").endswith(f"000{index},0.1")
        run(source, source_ops, "set_frequency", freq_hz=freq_hz)
        run(source, source_ops, "set_power", power_dbm=power_dbm)
        run(source, source_ops, "rf_on")
        assert run(source, source_ops, "wait_complete") == "1"
        assert float(run(source, source_ops, "read_frequency")) == pytest.approx(freq_hz, abs=1e-3)
        assert float(run(source, source_ops, "read_power")) == pytest.approx(power_dbm, abs=0.005)
        assert run(source, source_ops, "read_rf") == "1"
    run(analyzer, analyzer_ops, "clear_status")
    run(analyzer, analyzer_ops, "single_sweep_mode")
    run(analyzer, analyzer_ops, "set_span", span_hz=1000.0)
    run(analyzer, analyzer_ops, "set_rbw", rbw_hz=10.0)
    run(analyzer, analyzer_ops, "set_vbw", vbw_hz=10.0)
    run(analyzer, analyzer_ops, "set_attenuation", atten_db=0.0)
    run(analyzer, analyzer_ops, "set_ref_level", ref_dbm=-10.0)
    assert float(run(analyzer, analyzer_ops, "read_sweep_time")) == pytest.approx(2.5 * 1000.0 / 10.0**2)
    center_hz = (F1_HZ + F2_HZ) / 2
    out_dbm = tone_dbm + bench.truth.true_gain_db(center_hz)
    expected = {F1_HZ: out_dbm, LOW_IM3_HZ: 3 * out_dbm - 2 * bench.truth.true_oip3_dbm(center_hz)}
    for freq_hz, expected_dbm in expected.items():
        run(analyzer, analyzer_ops, "set_center", freq_hz=freq_hz)
        run(analyzer, analyzer_ops, "set_marker_freq", freq_hz=freq_hz)
        run(analyzer, analyzer_ops, "start_sweep")
        assert run(analyzer, analyzer_ops, "wait_complete") == "1"
        reading_dbm = float(run(analyzer, analyzer_ops, "read_marker_power"))
        assert reading_dbm + bench.truth.true_loss_db("out", freq_hz) == pytest.approx(expected_dbm, abs=0.05)
    assert run(analyzer, analyzer_ops, "read_status") == "0"
    assert bench.analyzer.rbw_hz == 10.0 and bench.analyzer.ref_level_dbm == -10.0
    assert [entry[1] for entry in bench.command_log].count("analyzer") > 10


def test_setting_queries_range_errors_and_reset():
    bench = SimBench(Scenario())
    source, analyzer = SimSource(bench, 2), SimAnalyzer(bench)
    source.handle_line("SOURce:FREQuency:CW 2.4GHZ;:SOURce:POWer:LEVel:IMMediate:AMPLitude -12.5 DBM;:OUTPut:STATe ON")
    assert float(source.handle_line("FREQ:FIX?")) == 2.4e9
    assert float(source.handle_line("POW?")) == -12.5 and source.handle_line("OUTP?") == "1"
    source.handle_line("SOUR:POW 25")  # above the scenario's 20 dBm
    assert source.handle_line("SYST:ERR?").startswith("-222,")
    assert float(source.handle_line("SOUR:POW?")) == -12.5
    source.handle_line("*RST")
    source.handle_line("*OPC?")
    assert source.handle_line("OUTP?") == "0" and not bench.source(2).effective.rf_on
    analyzer.handle_line("INP:ATT 11")  # step attenuator: nearest 2 dB step
    assert float(analyzer.handle_line("INP:ATT?")) in (10.0, 12.0)
    analyzer.handle_line("SENS:BAND:RES 100 KHZ")
    assert float(analyzer.handle_line("BAND?")) == 1e5
    analyzer.handle_line("FREQ:CENT 9 GHZ")
    assert analyzer.handle_line("SYST:ERR?").startswith("-222,")
    analyzer.handle_line("INIT:CONT OFF")
    analyzer.handle_line("*RST")
    assert analyzer.handle_line("INIT:CONT?") == "1" and float(analyzer.handle_line("BAND?")) == 1e6


def test_marker_without_trace_is_an_scpi_error():
    bench = SimBench(Scenario())
    analyzer = SimAnalyzer(bench)
    analyzer.handle_line("INIT:CONT OFF")
    assert analyzer.handle_line("CALC:MARK:Y?") is None
    assert analyzer.handle_line("SYST:ERR?").startswith("-200,")


def test_pyvisa_reads_marker_over_tcp():
    pyvisa = pytest.importorskip("pyvisa")
    with start_sim_bench(quiet()) as running:
        assert set(running.resources) == {"source1", "source2", "analyzer", "power_meter"}
        manager = pyvisa.ResourceManager("@py")
        try:
            opened = {role: manager.open_resource(resource, read_termination="\n", write_termination="\n", timeout=5000)
                      for role, resource in running.resources.items()}
            truth = running.bench.truth
            for role, path, freq_hz in (("source1", "in1", F1_HZ), ("source2", "in2", F2_HZ)):
                opened[role].write(f"SOUR:FREQ {freq_hz:.3f}")
                opened[role].write(f"SOUR:POW {-40.0 + truth.true_loss_db(path, freq_hz):.2f}")
                opened[role].write("OUTP ON")
                assert opened[role].query("*OPC?") == "1"
            analyzer = opened["analyzer"]
            for line in ("INIT:CONT OFF", f"FREQ:CENT {F1_HZ:.3f}", "FREQ:SPAN 1000.000", "BAND 10.000",
                         "INP:ATT 0.0", f"CALC:MARK1:X {F1_HZ:.3f}", "INIT:IMM"):
                analyzer.write(line)
            assert analyzer.query("*OPC?") == "1"
            reading_dbm = float(analyzer.query("CALC:MARK1:Y?"))
            expected_dbm = -40.0 + truth.true_gain_db((F1_HZ + F2_HZ) / 2) - truth.true_loss_db("out", F1_HZ)
            assert reading_dbm == pytest.approx(expected_dbm, abs=0.05)
            for resource in opened.values():
                resource.close()
        finally:
            manager.close()
        assert running.bench.clock_s > 0.25  # sources settled, one 0.25 s sweep
