"""Gate and drain on two outputs of one multi-output supply at one address (issue 11): one
connection serves both, each output keeps its own role name, and bias comes up and goes down in
order on the right channels, read from the simulated supply; the same output for both roles,
or two dialects for one address, is refused before anything is opened."""

from __future__ import annotations

import re
import threading

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from hardware_benches import one_error_line

from tonebench.config.bench_file import load_bench
from tonebench.instruments.open_bench import open_bench
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.server import InstrumentServer
from tonebench.sim.supply import SimSupply
from tonebench.sim.supply_panel import SimSupplyPanel

BIAS_BENCH = (SAMPLE_RUNS / "bias_bench.toml").read_text()


@pytest.fixture
def lab(tmp_path):
    """The simulated bench's sources and analyzer, and a two-output supply at one address, in a
    hardware bench file with gate on channel 1 and drain on channel 2."""
    scenario = load_bench(SAMPLE_RUNS / "bias_bench.toml").scenario
    dual = SimSupply(channel_count=2)
    with start_sim_bench(scenario) as sim, InstrumentServer(SimSupplyPanel(dual), threading.RLock()) as server:
        text = BIAS_BENCH.split("[simulation]")[0]
        for role in ("source1", "source2", "analyzer"):
            text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{sim.resources[role]}"\n')
        for role, channel in (("gate", 1), ("drain", 2)):
            text = text.replace(f"[instruments.{role}]\n",
                                f'[instruments.{role}]\nresource = "{server.resource}"\nchannel = {channel}\n')
        bench = tmp_path / "bench.toml"
        bench.write_text(text)
        yield bench, dual, server


def test_bench_check_takes_two_outputs_of_one_supply(lab):
    bench, _dual, server = lab
    result = invoke("bench", "check", "--bench", bench)
    assert result.exit_code == 0, result.output
    assert re.search(r"\ngate: .*\n  identity  tonebench,simulated DC supply", result.output)
    assert "channel 1: output off" in result.output and "channel 2: output off" in result.output
    assert result.output.count(server.resource) == 2


def test_bias_comes_up_and_goes_down_on_the_right_outputs(lab):
    bench, dual, _server = lab
    settings = load_bench(bench).settings
    resources = {role: entry.resource for role, entry in settings.instruments.items()}
    opened = open_bench(settings, resources)
    try:
        assert len(opened.connections) == 4  # two sources, the analyzer, one supply for both roles
        assert [info.role for info in opened.instruments] == ["source1", "source2", "analyzer", "gate", "drain"]
        bias = opened.bias
        assert (bias.gate.label, bias.drain.label) == ("gate", "drain")
        bias.bias_up(0.55)
        assert dual.channel(1).output_on and dual.channel(2).output_on
        assert dual.channel(1).set_voltage_v == pytest.approx(0.55)
        assert dual.channel(2).set_voltage_v == pytest.approx(settings.bias.drain_v)
        assert opened.switch_bias_off() == []
        assert not dual.channel(1).output_on and not dual.channel(2).output_on
        assert dual.channel(2).set_voltage_v == 0.0
    finally:
        opened.close()


@pytest.mark.parametrize("edit, words", [
    (lambda text: text.replace("channel = 2", "channel = 1"), "both channel 1 of"),
    (lambda text: text.replace('dialect = "generic-supply"', 'dialect = "generic-smu"', 1), "with different dialects"),
])
def test_one_output_for_both_or_two_dialects_for_one_address_is_refused(lab, tmp_path, edit, words):
    bench, dual, _server = lab
    text = bench.read_text()
    assert text.count('dialect = "generic-supply"') == 2, "the sample bench changed: update the edit"
    bench.write_text(edit(text))
    for args in (("bench", "check", "--bench", bench),
                 ("run", SAMPLE_RUNS / "bias_plan.toml", "--bench", bench, "--db", tmp_path / "t.db")):
        line = one_error_line(invoke(*args))
        assert words in line and "instruments.gate and instruments.drain" in line, line
    assert not (tmp_path / "t.db").exists()
    assert not dual.channel(1).output_on and not dual.channel(2).output_on
