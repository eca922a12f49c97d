"""Dialect files are typed (issue 9, item 4): [limits], [performance] and [status] take only the keys
the drivers read, with finite values; a bad file is refused through `tonebench run` in one line with
exit 2 before anything is written."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
from conftest import PROJECT_ROOT, SAMPLE_RUNS
from typer.testing import CliRunner

from tonebench.cli import app

runner = CliRunner(env={"COLUMNS": "300"})  # one line must not be wrapped by the console
ANALYZER = (PROJECT_ROOT / "drivers" / "generic-analyzer.toml").read_text()
LIMITS_ALLOWED = "min_freq_hz, max_freq_hz, min_atten_db, max_atten_db, damage_dbm, max_mixer_dbm, atten_step_db"

PLAN = textwrap.dedent(
    """
    [plan]
    name = "typing-check"
    [device]
    part_number = "KLN-2417A"
    serial = "KLN24031-0002"
    [sweep]
    center_freqs_hz = [2.45e9]
    spacings_hz = [1.0e6]
    tone_start_dbm = -34.0
    tone_stop_dbm = -30.0
    tone_step_dbm = 2.0
    [analyzer]
    rbw_hz = 1000.0
    atten_db = 20.0
    """
)


def refused(workdir: Path, dialect_text: str) -> str:
    """Run the plan on the simulated bench with this analyzer dialect; return the one error line."""
    dialect = workdir / "bad-analyzer.toml"
    dialect.write_text(dialect_text)
    bench = (SAMPLE_RUNS / "sim_bench.toml").read_text().replace('dialect = "generic-analyzer"',
                                                                 f'dialect = "{dialect}"')
    (workdir / "bench.toml").write_text(bench)
    (workdir / "plan.toml").write_text(PLAN)
    result = runner.invoke(app, ["run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{workdir}/t.db"])
    assert result.exit_code == 2, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), result.output
    assert "Traceback" not in result.output
    written = sorted(p.name for p in workdir.iterdir() if p.suffix in (".db", ".html", ".db-wal", ".log"))
    assert written == [], f"a refused dialect must write nothing (no run row), found {written}"
    assert str(dialect) in lines[0]
    return lines[0]


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_misspelled_damage_limit_is_named_with_the_allowed_keys(workdir):
    line = refused(workdir, ANALYZER.replace("damage_dbm = 30.0", "damage_dBm = 30.0"))
    assert "field 'limits.damage_dBm' is not a known setting for an analyzer dialect" in line
    assert line.endswith(f"allowed: {LIMITS_ALLOWED} (did you mean damage_dbm?)")


def test_unknown_status_key(workdir):
    line = refused(workdir, ANALYZER.replace("overload_bit = 3", "overload_bit = 3\nover_range_bit = 4"))
    assert "field 'status.over_range_bit' is not a known setting for an analyzer dialect" in line
    assert "allowed: overload_bit" in line


def test_non_finite_performance_value(workdir):
    line = refused(workdir, ANALYZER.replace("mixer_toi_dbm = 15.0", "mixer_toi_dbm = nan"))
    assert "field 'performance.mixer_toi_dbm': nan is not a finite number" in line
    assert "mixer_toi_dbm, danl_dbm_per_hz, sweep_time_factor, level_accuracy_db" in line


def test_infinite_limit(workdir):
    line = refused(workdir, ANALYZER.replace("max_mixer_dbm = -10.0", "max_mixer_dbm = inf"))
    assert "field 'limits.max_mixer_dbm': inf is not a finite number" in line


def test_infinite_query_timeout(workdir):
    line = refused(workdir, ANALYZER.replace("query_timeout_s = 5.0", "query_timeout_s = inf"))
    assert "field 'io.query_timeout_s': inf s; allowed: a finite number of seconds, 0 < t <= 600" in line


def test_nested_template_field(workdir):
    line = refused(workdir, ANALYZER.replace("FREQ:CENT {freq_hz:.3f}", "FREQ:CENT {freq_hz:{span_hz}}"))
    assert "field 'operations.set_center': nested field in {freq_hz:{span_hz}}" in line
    assert "allowed fields: freq_hz" in line


def test_missing_damage_limit_is_refused(workdir):
    line = refused(workdir, ANALYZER.replace("damage_dbm = 30.0", ""))
    assert "field 'limits.damage_dbm' is missing; an analyzer dialect needs" in line
    assert "min_freq_hz, max_freq_hz, min_atten_db, max_atten_db, damage_dbm" in line


def test_bench_file_overrides_take_the_dialect_performance_keys():
    from tonebench.config.bench_file import PERFORMANCE_OVERRIDES
    from tonebench.instruments.dialect import KNOWN_PERFORMANCE

    required, optional = KNOWN_PERFORMANCE["analyzer"]
    assert tuple(PERFORMANCE_OVERRIDES) == (*required, *optional)


def test_misspelled_bench_file_override_is_named(workdir):
    bench = (SAMPLE_RUNS / "sim_bench.toml").read_text().replace(
        'dialect = "generic-analyzer"', 'dialect = "generic-analyzer"\nperformance = { mixer_toi_dBm = 20.0 }')
    (workdir / "bench.toml").write_text(bench)
    (workdir / "plan.toml").write_text(PLAN)
    result = runner.invoke(app, ["run", "plan.toml", "--bench", "bench.toml", "--db", f"sqlite:///{workdir}/t.db"])
    assert result.exit_code == 2, result.output
    assert "performance.mixer_toi_dBm is not a figure tonebench uses" in result.output
    assert "(did you mean mixer_toi_dbm?)" in result.output
    assert not (workdir / "t.db").exists()


def test_phase_noise_without_its_offset(workdir):
    line = refused(workdir, ANALYZER.replace("phase_noise_offset_hz = 10e3\n", ""))
    assert ("field 'performance.phase_noise_dbc_per_hz' needs its partner: give phase_noise_dbc_per_hz (dBc/Hz) "
            "together with phase_noise_offset_hz") in line


def test_phase_noise_at_a_zero_offset(workdir):
    line = refused(workdir, ANALYZER.replace("phase_noise_offset_hz = 10e3", "phase_noise_offset_hz = 0.0"))
    assert "field 'performance.phase_noise_offset_hz': 0.0 Hz; the offset must be above 0 Hz" in line
