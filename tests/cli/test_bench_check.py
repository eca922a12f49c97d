"""A lab's first hour on hardware (issue 12, items 1 to 3): the VISA library is the user's choice
and an absent one is one line naming it; `tonebench bench check` identifies every role, names
each misfit and leaves RF off; `--trace` and `-v` show every SCPI command and reply.

The "hardware" here is the simulated bench served from this process (the `sim` fixture), reached
through bench files without a [simulation] table, as a real bench would be."""

from __future__ import annotations

import re
import socket

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from hardware_benches import hardware_bench, one_error_line
from sim_runs import write_plan

IDN_OF = {"source1": "tonebench,simulated two-tone source,SIM-SRC-0001,0.1",
          "source2": "tonebench,simulated two-tone source,SIM-SRC-0002,0.1",
          "analyzer": "tonebench,simulated spectrum analyzer,SIM-SA-0001,0.1"}


def _send(resource: str, line: str) -> None:
    host, port = resource.split("::")[1:3]
    with socket.create_connection((host, int(port)), timeout=5) as sock:
        sock.sendall(line.encode() + b"\n*OPC?\n")
        assert sock.recv(16).strip() == b"1"


def _bench_with(path, **bench_keys: str):
    text = path.read_text()
    extra = "".join(f'{key} = "{value}"\n' for key, value in bench_keys.items())
    path.write_text(text.replace("[bench]\n", f"[bench]\n{extra}", 1))
    return path


def test_bench_check_identifies_every_role_and_leaves_rf_off(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim, power_meter=True)
    _send(sim.resources["source1"], "OUTP ON")  # as a command killed with RF on would leave it
    assert sim.bench.source(1).effective.rf_on
    result = invoke("bench", "check", "--bench", bench)
    assert result.exit_code == 0, result.output
    for role, idn in IDN_OF.items():
        block = result.output.split(f"\n{role}: ", 1)[1].split("\n\n", 1)[0]
        assert sim.resources[role] in block and f"identity  {idn}" in block
        assert "error queue empty" in block
    assert "is not" not in result.output and "PROBLEM" not in result.output
    assert "source1 was found with RF on" in result.output  # said, then switched off
    assert re.search(r"state +RF off, 1 GHz, -30\.00 dBm", result.output)
    assert "level -130 to +20 dBm (dialect)" in result.output  # generic-source's own [limits]
    assert "at most +0 dBm per tone at the DUT input" in result.output  # sim_bench.toml [limits]
    assert result.output.rstrip().endswith("RF is off at both sources")
    assert not sim.bench.source(1).effective.rf_on and not sim.bench.source(2).effective.rf_on


def test_bench_check_on_the_simulated_bias_and_chamber_bench():
    result = invoke("bench", "check", "--bench", SAMPLE_RUNS / "bias_chamber_bench.toml")
    assert result.exit_code == 0, result.output
    assert re.search(r"\ngate: .*\n  identity  tonebench,simulated DC supply", result.output)
    assert "channel 1: output off" in result.output
    assert re.search(r"state +set point [-0-9.]+ degC, reads [-0-9.]+ degC", result.output)
    assert "all 6 roles answer" in result.output


def _point(bench, role: str, resource: str) -> None:
    """Give `role` another resource string in a hardware bench file."""
    text = bench.read_text()
    text = re.sub(rf'(\[instruments\.{role}\]\nresource = )"[^"]*"', rf'\1"{resource}"', text)
    bench.write_text(text)


def test_bench_check_names_every_role_that_does_not_fit(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim, power_meter=True)
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        free_port = probe.getsockname()[1]
    # The analyzer and power-meter roles swapped; source2 at a port where nothing listens.
    _point(bench, "analyzer", sim.resources["power_meter"])
    _point(bench, "power_meter", sim.resources["analyzer"])
    _point(bench, "source2", f"TCPIP0::127.0.0.1::{free_port}::SOCKET")
    result = invoke("bench", "check", "--bench", bench)
    assert result.exit_code == 2, result.output
    analyzer_block = result.output.split("\nanalyzer: ", 1)[1].split("\n\n", 1)[0]
    assert "simulated power meter" in analyzer_block and "is not a spectrum analyzer" in analyzer_block
    source2_block = result.output.split("\nsource2: ", 1)[1].split("\n\n", 1)[0]
    assert "cannot reach" in source2_block
    assert f"identity  {IDN_OF['source1']}" in result.output  # the role that fits is still shown
    meter_block = result.output.split("\npower_meter: ", 1)[1].split("\n\n", 1)[0]
    assert "simulated spectrum analyzer" in meter_block and "is not a power meter" in meter_block
    assert "3 role(s) do not fit: source2, analyzer, power_meter" in result.output
    assert not sim.bench.source(1).effective.rf_on


def test_a_misspelled_dialect_is_named_before_an_unreachable_source(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim)
    _point(bench, "source1", "TCPIP0::127.0.0.1::9::SOCKET")
    bench.write_text(bench.read_text().replace('dialect = "generic-analyzer"', 'dialect = "generic-analyser"'))
    plan = write_plan(tmp_path)
    for args in (("bench", "check", "--bench", bench), ("run", plan, "--bench", bench, "--db", tmp_path / "t.db")):
        line = one_error_line(invoke(*args))
        assert "generic-analyser" in line and "cannot reach" not in line, line
    assert not (tmp_path / "t.db").exists()


@pytest.mark.parametrize("library, named", [
    ("@nonesuch", "pyvisa backend package pyvisa-nonesuch is not installed"),
    ("/opt/nowhere/libvisa-lab.so", "'/opt/nowhere/libvisa-lab.so' cannot be loaded"),
])
def test_a_visa_library_that_is_not_installed_is_one_line(tmp_path, library, named):
    bench = tmp_path / "bench.toml"
    bench.write_text((SAMPLE_RUNS / "sim_bench.toml").read_text())
    _bench_with(bench, visa_library=library)
    result = invoke("run", write_plan(tmp_path), "--bench", bench, "--db", tmp_path / "t.db")
    assert result.exit_code == 2
    line = one_error_line(result)
    assert named in line and "'@py'" in line, line  # what is missing, and what is allowed
    assert not (tmp_path / "t.db").exists()


def test_pyvisa_conventions_choose_the_library_when_the_bench_file_does_not(tmp_path, sim, monkeypatch):
    bench = hardware_bench(tmp_path, sim)
    monkeypatch.setenv("PYVISA_LIBRARY", "@elsewhere")
    line = one_error_line(invoke("bench", "check", "--bench", bench))
    assert "'@elsewhere' (from PYVISA_LIBRARY)" in line and "pyvisa-elsewhere" in line
    monkeypatch.delenv("PYVISA_LIBRARY")
    monkeypatch.setenv("HOME", str(tmp_path))
    (tmp_path / ".pyvisarc").write_text("[Paths]\nvisa library=/opt/nowhere/libvisa-lab.so\n")
    line = one_error_line(invoke("bench", "check", "--bench", bench))
    assert "'/opt/nowhere/libvisa-lab.so' (from .pyvisarc)" in line
    _bench_with(bench, visa_library="@py")  # the bench file's choice wins over both
    result = invoke("bench", "check", "--bench", bench)
    assert result.exit_code == 0 and "VISA library '@py'\n" in result.output, result.output


def test_a_gpib_resource_without_its_package_is_one_line(tmp_path, sim):
    pytest.importorskip("pyvisa_py")
    try:
        import gpib  # noqa: F401
        pytest.skip("linux-gpib is installed here")
    except ImportError:
        pass
    bench = hardware_bench(tmp_path, sim)
    _point(bench, "source1", "GPIB0::18::INSTR")
    result = invoke("run", write_plan(tmp_path), "--bench", bench, "--db", tmp_path / "t.db")
    assert result.exit_code == 2
    line = one_error_line(result)
    assert "GPIB0::18::INSTR (source1)" in line and "linux-gpib" in line and "visa_library" in line
    assert not sim.bench.source(2).effective.rf_on


def test_trace_records_every_command_and_reply_per_role(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim)
    trace = tmp_path / "scpi.log"
    result = invoke("--trace", trace, "run", write_plan(tmp_path), "--bench", bench, "--db", tmp_path / "t.db")
    assert result.exit_code == 0, result.output
    lines = trace.read_text().splitlines()
    stamp = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z tonebench\.scpi "
    assert all(re.match(stamp + r"(source1|source2|analyzer) [<>] ", line) for line in lines), lines[:5]
    for role, idn in IDN_OF.items():
        assert any(line.endswith(f"{role} > *IDN?") for line in lines)
        assert any(line.endswith(f"{role} < {idn}") for line in lines)
    assert any(re.search(r"source1 > SOUR:FREQ \d", line) for line in lines)
    assert any(re.search(r"analyzer < -?\d", line) for line in lines)  # marker readings
    assert lines[-1].split(" ", 2)[2].startswith(("source", "analyzer"))
    before = len(lines)
    assert invoke("--trace", trace, "bench", "check", "--bench", bench).exit_code == 0
    assert len(trace.read_text().splitlines()) > before  # appended, the run's trace kept


def test_verbose_puts_the_trace_on_stderr(tmp_path, sim):
    from typer.testing import CliRunner

    from tonebench.cli import app

    bench = hardware_bench(tmp_path, sim)
    result = CliRunner().invoke(app, ["-v", "bench", "check", "--bench", str(bench)])
    assert result.exit_code == 0, result.output
    assert re.search(r"Z tonebench\.scpi analyzer > SWE:TIME\?", result.stderr)
    assert "identity  " + IDN_OF["analyzer"] in result.stdout and "tonebench.scpi" not in result.stdout


def test_a_trace_file_that_cannot_be_written_is_one_line(tmp_path):
    result = invoke("--trace", tmp_path / "no-such-folder" / "scpi.log", "bench", "check",
                    "--bench", SAMPLE_RUNS / "sim_bench.toml")
    assert result.exit_code == 2
    assert "--trace" in one_error_line(result)
