"""Dialect files: the shipped ones load; each mistake gives one line naming the file and field."""

from __future__ import annotations

from pathlib import Path

import pytest

from conftest import PROJECT_ROOT
from tonebench.errors import InputError
from tonebench.instruments.dialect import drivers_dirs, load_dialect

REPO_DRIVERS = PROJECT_ROOT / "drivers"
SHIPPED = sorted(REPO_DRIVERS.glob("*.toml"))

SOURCE = """\
[dialect]
name = "test-source"
role = "source"
description = "for tests"

[io]
query_timeout_s = 2.0

[limits]
min_power_dbm = -100.0
max_power_dbm = 10.0
min_freq_hz = 1e6
max_freq_hz = 1e9

[operations]
identify      = { query = "*IDN?", reply = "text" }
clear_status  = { command = "*CLS" }
wait_complete = { query = "*OPC?", reply = "int" }
next_error    = { query = "SYST:ERR?", reply = "error" }
set_frequency = { command = "FREQ {freq_hz:.0f}" }
set_power     = { command = "POW {power_dbm:.2f}" }
rf_on         = { command = "OUTP 1" }
rf_off        = { command = "OUTP 0" }
read_rf       = { query = "OUTP?", reply = "bool" }
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "test-source.toml"
    path.write_text(text, encoding="utf-8")
    return path


def load_error(path: Path) -> str:
    with pytest.raises(InputError) as info:
        load_dialect(str(path))
    message = str(info.value)
    assert "\n" not in message
    assert str(path) in message
    return message


def test_repo_has_the_shipped_dialects():
    assert {p.stem for p in SHIPPED} == {"generic-source", "generic-analyzer", "verbose-analyzer", "generic-power-meter",
                                         "generic-supply", "generic-smu", "generic-chamber"}
    # Installed (wheel copy) or run from the checkout, the named dialects are the repo's files.
    (folder,) = drivers_dirs()
    assert {p.name: p.read_text() for p in folder.glob("*.toml")} == {p.name: p.read_text() for p in SHIPPED}


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_shipped_dialects_load_by_name_and_path(path):
    by_name = load_dialect(path.stem)
    assert by_name.name == path.stem
    assert load_dialect(str(path)) == by_name


def test_unknown_name_lists_known():
    with pytest.raises(InputError) as info:
        load_dialect("no-such-box")
    message = str(info.value)
    assert message.startswith("unknown dialect 'no-such-box'; known: ")
    for path in SHIPPED:
        assert path.stem in message


def test_minimal_source_loads(tmp_path):
    dialect = load_dialect(str(write(tmp_path, SOURCE)))
    assert dialect.role == "source"
    assert dialect.io.read_termination == "\n"
    assert dialect.operations["read_rf"].reply == "bool"


def test_missing_required_operation(tmp_path):
    path = write(tmp_path, SOURCE.replace('rf_off        = { command = "OUTP 0" }\n', ""))
    assert "field 'operations.rf_off' is missing" in load_error(path)


def test_missing_required_limit(tmp_path):
    path = write(tmp_path, SOURCE.replace("max_power_dbm = 10.0\n", ""))
    assert "field 'limits.max_power_dbm' is missing" in load_error(path)


def test_unknown_template_field(tmp_path):
    path = write(tmp_path, SOURCE.replace("{power_dbm:.2f}", "{level_dbm:.2f}"))
    message = load_error(path)
    assert "operations.set_power" in message
    assert "level_dbm" in message
    assert "allowed: power_dbm" in message


def test_field_in_an_operation_that_takes_none(tmp_path):
    path = write(tmp_path, SOURCE.replace('"OUTP 1"', '"OUTP {freq_hz}"'))
    assert "field 'operations.rf_on': unknown template field {freq_hz}; allowed: none" in load_error(path)


def test_bad_format_spec(tmp_path):
    path = write(tmp_path, SOURCE.replace("{freq_hz:.0f}", "{freq_hz:.0q}"))
    assert "field 'operations.set_frequency': bad template" in load_error(path)


def test_query_without_reply_kind(tmp_path):
    text = SOURCE.replace('{ query = "OUTP?", reply = "bool" }', '{ query = "OUTP?" }')
    path = write(tmp_path, text)
    message = load_error(path)
    assert "operations.read_rf" in message
    assert "needs 'reply'" in message


def test_unknown_reply_kind(tmp_path):
    path = write(tmp_path, SOURCE.replace('reply = "bool"', 'reply = "yesno"'))
    message = load_error(path)
    assert "operations.read_rf.reply" in message
    assert "'yesno'" in message


def test_command_and_query_both(tmp_path):
    text = SOURCE.replace('{ command = "*CLS" }', '{ command = "*CLS", query = "*CLS?" }')
    path = write(tmp_path, text)
    assert "field 'operations.clear_status': needs exactly one of 'command' or 'query'" in load_error(path)


def test_unknown_role(tmp_path):
    path = write(tmp_path, SOURCE.replace('role = "source"', 'role = "oscilloscope"'))
    message = load_error(path)
    assert "dialect.role" in message
    assert "'oscilloscope'" in message


def test_unknown_key(tmp_path):
    text = SOURCE.replace("query_timeout_s = 2.0", "query_timeout_s = 2.0\nbaud = 9600")
    message = load_error(write(tmp_path, text))
    allowed = "read_termination, write_termination, query_timeout_s"
    assert f"field 'io.baud' is not a known setting; allowed: {allowed}" in message


def test_bad_toml(tmp_path):
    path = write(tmp_path, SOURCE.replace('name = "test-source"', "name = test-source"))
    message = load_error(path)
    assert "not valid TOML" in message
    assert "line 2" in message


def test_missing_dialect_table(tmp_path):
    path = write(tmp_path, SOURCE.replace("[dialect]\n", "[header]\n"))
    assert "table [dialect] is missing" in load_error(path)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="dialect file .*nowhere.toml not found"):
        load_dialect(str(tmp_path / "nowhere.toml"))
