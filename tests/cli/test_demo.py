"""The README's demo: it prints where its outputs are, and its IIP3 matches the simulated truth."""

import re
from pathlib import Path

from typer.testing import CliRunner

from tonebench.cli import app


def test_demo_recovers_the_true_iip3(tmp_path):
    result = CliRunner(env={"COLUMNS": "220"}).invoke(app, ["demo", "--out", str(tmp_path / "demo")])
    assert result.exit_code == 0, result.output
    db_path = Path(re.search(r"database:\s+(\S+)", result.output).group(1))
    report_path = Path(re.search(r"report:\s+(\S+)", result.output).group(1))
    assert db_path.exists() and report_path.exists()
    pairs = re.findall(r"IIP3 measured ([+-]\d+\.\d+) dBm, simulated truth ([+-]\d+\.\d+) dBm", result.output)
    assert len(pairs) == 3, result.output  # one per centre frequency of the demo plan
    for measured, truth in pairs:
        assert abs(float(measured) - float(truth)) <= 0.3, result.output
    # The next commands it prints work as printed.
    next_commands = re.findall(r"^  (tonebench .+)$", result.output, re.MULTILINE)
    assert [c.split()[1] for c in next_commands] == ["show", "find", "analyze"]
    for command in next_commands:
        followed = CliRunner(env={"COLUMNS": "220"}).invoke(app, command.split()[1:])
        assert followed.exit_code == 0, (command, followed.output)
        assert "KLN-2417A" in followed.output or "IIP3" in followed.output, followed.output
