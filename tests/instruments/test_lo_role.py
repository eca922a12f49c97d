"""The LO source role of a mixer bench: its limit, and RF off at the LO on every way out of the
bench driver, asserted on the simulated LO's own state."""

from __future__ import annotations

import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.errors import InputError
from tonebench.instruments.open_bench import open_bench
from tonebench.instruments.scpi import LimitError
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.mixer import LO_SOURCE_INDEX

MIXER_BENCH = SAMPLE_RUNS / "mixer_bench.toml"


@pytest.fixture
def mixer_lab():
    bench = load_bench(MIXER_BENCH)
    with start_sim_bench(bench.scenario) as sim:
        instruments = open_bench(bench.settings, sim.resources)
        try:
            yield sim, instruments
        finally:
            instruments.close()


def lo_on(sim) -> bool:
    """The simulated LO's own state (what it was told last), not what tonebench believes."""
    with sim.bench.lock:
        return sim.bench.source(LO_SOURCE_INDEX).commanded.rf_on


def switch_lo_on(instruments) -> None:
    instruments.lo.set_tone(2.3e9, 7.0)
    instruments.lo.rf_on()


def test_the_lo_is_opened_as_a_source(mixer_lab):
    sim, instruments = mixer_lab
    assert instruments.lo is not None and instruments.lo.label == "lo"
    switch_lo_on(instruments)
    assert lo_on(sim)


def test_switch_rf_off_switches_the_lo_off_and_says_so(mixer_lab):
    sim, instruments = mixer_lab
    switch_lo_on(instruments)
    report = instruments.switch_rf_off()
    assert report.ok and "lo" in report.confirmed
    assert not lo_on(sim)


def test_the_watchdog_path_switches_the_lo_off(mixer_lab):
    sim, instruments = mixer_lab
    switch_lo_on(instruments)
    report = instruments.force_rf_off_all()
    assert report.ok and "lo" in report.confirmed
    assert not lo_on(sim)


def test_rf_off_all_includes_the_lo(mixer_lab):
    sim, instruments = mixer_lab
    switch_lo_on(instruments)
    instruments.rf_off_all()
    assert not lo_on(sim)


def test_an_lo_left_on_is_found_and_switched_off_at_connect(mixer_lab):
    sim, instruments = mixer_lab
    with sim.bench.lock:  # as if a killed command had left it on
        sim.bench.set_source(LO_SOURCE_INDEX, rf_on=True)
        sim.bench.settle_source(LO_SOURCE_INDEX)
    lines = instruments.switch_off_at_connect()
    assert any(line.startswith("lo was found with RF on") for line in lines)
    assert not lo_on(sim)


def test_lo_power_above_the_bench_limit_is_refused_before_it_is_sent(mixer_lab):
    sim, instruments = mixer_lab
    with pytest.raises(LimitError, match="max_lo_dbm 13.00 dBm"):
        instruments.lo.set_tone(2.3e9, 14.0)
    with sim.bench.lock:
        assert sim.bench.source(LO_SOURCE_INDEX).commanded.power_dbm != 14.0


def test_an_lo_role_without_its_limit_is_refused(tmp_path):
    text = MIXER_BENCH.read_text().replace("max_lo_dbm = 13.0", "")
    (tmp_path / "bench.toml").write_text(text)
    with pytest.raises(InputError, match="max_lo_dbm is missing"):
        load_bench(tmp_path / "bench.toml")


def test_a_simulated_lo_needs_a_simulated_mixer(tmp_path):
    text = MIXER_BENCH.read_text().split("[simulation.mixer]")[0] + "\n[simulation.paths]" + \
        MIXER_BENCH.read_text().split("[simulation.paths]")[1]
    (tmp_path / "bench.toml").write_text(text)
    with pytest.raises(InputError, match=r"instruments.lo on a simulated bench needs a \[simulation.mixer\]"):
        load_bench(tmp_path / "bench.toml")
