"""Importing path losses: CSV tables and Touchstone 2-port files (read with scikit-rf), and every
kind of bad file refused in one line with nothing stored."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import create_engine, func, select
from sqlalchemy.orm import Session
from cli_invoke import invoke

from tonebench.calibration.importers import read_touchstone
from tonebench.errors import InputError
from tonebench.store.models import CalibrationOffset, CalibrationSet

skrf = pytest.importorskip("skrf")
SKRF_DATA = Path(skrf.__file__).parent / "data"
# scikit-rf's docstring calls this "Measured 1 nH series inductor (with parasitics)": a measured
# 2-port, 1 to 10 GHz in 1 GHz steps.
MEASURED_2PORT = SKRF_DATA / "ind.s2p"
# Another 2-port shipped with scikit-rf (1 to 10 GHz in 100 MHz steps), for cascading.
SECOND_2PORT = SKRF_DATA / "ntwk1.s2p"


def stored_sets(db: str) -> int:
    with Session(create_engine(db)) as session:
        return session.scalar(select(func.count()).select_from(CalibrationSet)) + session.scalar(
            select(func.count()).select_from(CalibrationOffset))


def test_table_import_stores_the_rows_with_provenance(tmp_path):
    db = f"sqlite:///{tmp_path / 'c.db'}"
    rows = {"in1": [(2.3e9, 6.1), (2.6e9, 6.4)], "in2": [(2.3e9, 6.9), (2.5e9, 7.0), (2.6e9, 7.3)],
            "out": [(2.2e9, 1.2), (2.7e9, 1.6)]}
    args = []
    for path, table in rows.items():
        file = tmp_path / f"{path}.csv"
        file.write_text("# loss of the " + path + " arm\nfreq_hz,loss_db\n" + "\n".join(f"{f},{l}" for f, l in table) + "\n")
        args += [f"--loss-{path}", file]
    result = invoke("cal", "import-table", "cables-2024", *args, "--valid-days", "90", "--operator", "pat", "--db", db)
    assert result.exit_code == 0, result.output
    with Session(create_engine(db)) as session:
        cal = session.scalars(select(CalibrationSet)).one()
        assert (cal.method, cal.valid_days, cal.operator) == ("table", 90.0, "pat")
        # The range is where every path is defined.
        assert (cal.freq_min_hz, cal.freq_max_hz) == (2.3e9, 2.6e9)
        assert sorted((o.path, o.freq_hz, o.loss_db) for o in cal.offsets) == sorted(
            (p, f, l) for p, t in rows.items() for f, l in t)
        import hashlib
        expected = {str(tmp_path / f"{p}.csv"): hashlib.sha256((tmp_path / f"{p}.csv").read_bytes()).hexdigest() for p in rows}
        assert {f["file"]: f["sha256"] for f in cal.source_files_json} == expected


def test_touchstone_loss_matches_scikit_rf_interpolation(tmp_path):
    table, provenance = read_touchstone([MEASURED_2PORT], "out")
    network = skrf.Network(str(MEASURED_2PORT))
    # At the file's own points: -|S21| in dB exactly as scikit-rf reads it.
    np.testing.assert_allclose(table.losses_db, -network.s_db[:, 1, 0], rtol=0, atol=1e-12)
    # Between them, against scikit-rf's own interpolation (linear in magnitude and phase): tonebench
    # interpolates linearly in dB, which differs from that only in second order of the step.
    between_hz = np.linspace(1.05e9, 9.95e9, 90)
    reference = -network.interpolate(skrf.Frequency.from_f(between_hz, unit="hz"), coords="polar").s_db[:, 1, 0]
    np.testing.assert_allclose(table.loss_db(between_hz), reference, rtol=0, atol=0.002)
    assert len(provenance) == 1 and len(provenance[0]["sha256"]) == 64
    with pytest.raises(InputError, match="does not extrapolate"):
        table.loss_db(10.5e9)


def test_cascaded_touchstone_files_follow_the_cascade_formula():
    table, provenance = read_touchstone([MEASURED_2PORT, SECOND_2PORT], "in1")
    assert [p["file"] for p in provenance] == [str(MEASURED_2PORT), str(SECOND_2PORT)]
    first = skrf.Network(str(MEASURED_2PORT)).interpolate(skrf.Frequency.from_f(table.freqs_hz, unit="hz"))
    second = skrf.Network(str(SECOND_2PORT)).interpolate(skrf.Frequency.from_f(table.freqs_hz, unit="hz"))
    # Two cascaded 2-ports: S21 = S21a S21b / (1 - S22a S11b) (signal-flow graph, textbook, from memory).
    s21 = first.s[:, 1, 0] * second.s[:, 1, 0] / (1 - first.s[:, 1, 1] * second.s[:, 0, 0])
    np.testing.assert_allclose(table.losses_db, -20 * np.log10(np.abs(s21)), rtol=0, atol=1e-9)
    # The common range and the union of both files' points inside it.
    assert table.freqs_hz[0] == 1e9 and table.freqs_hz[-1] == 10e9 and table.freqs_hz.size == 91


def test_touchstone_import_through_the_cli_cascades_and_records_files(tmp_path):
    db = f"sqlite:///{tmp_path / 'c.db'}"
    result = invoke("cal", "import-touchstone", "arms", "--loss-in1", MEASURED_2PORT, "--loss-in2", SECOND_2PORT,
                    "--loss-out", MEASURED_2PORT, "--loss-out", SECOND_2PORT, "--db", db)
    assert result.exit_code == 0, result.output
    with Session(create_engine(db)) as session:
        cal = session.scalars(select(CalibrationSet)).one()
        assert cal.method == "touchstone"
        assert sorted(f["offset_path"] for f in cal.source_files_json) == ["in1", "in2", "out", "out"]
    page = tmp_path / "arms.html"
    shown = invoke("cal", "show", "arms", "--db", db, "--html", page)
    assert shown.exit_code == 0, shown.output
    text = page.read_text()
    assert "Plotly.newPlot" in text and "arms" in text and "<script src=\"http" not in text  # plotly.js inline


SKRF_3PORT = SKRF_DATA / "tee.s3p"
SKRF_1PORT = SKRF_DATA / "short.s1p"


def bad_files(folder: Path) -> list[tuple[str, list, str]]:
    """(case, CLI arguments after the set name, text the one error line must contain)."""
    def write(name: str, text: str | bytes) -> Path:
        path = folder / name
        path.write_bytes(text if isinstance(text, bytes) else text.encode())
        return path

    return [
        ("garbage table", ["import-table", "--loss-in1", write("garbage.csv", b"\x89PNG\r\n\x1a\n\x00\xff")], "not a text file"),
        ("wrong columns", ["import-table", "--loss-in1", write("cols.csv", "frequency,attenuation\n1e9,3\n")],
         "expected exactly freq_hz,loss_db"),
        ("three columns", ["import-table", "--loss-out", write("three.csv", "freq_hz,loss_db\n1e9,3,4\n")], "3 fields"),
        ("words for numbers", ["import-table", "--loss-out", write("words.csv", "freq_hz,loss_db\n1e9,three\n")], "not two numbers"),
        ("negative frequency", ["import-table", "--loss-in2", write("neg.csv", "freq_hz,loss_db\n-1e9,3\n1e9,3\n")],
         "must be > 0 Hz"),
        ("non-monotonic", ["import-table", "--loss-in1", write("order.csv", "freq_hz,loss_db\n1e9,3\n3e9,3.2\n2e9,3.1\n")],
         "must increase strictly"),
        ("gain, not loss", ["import-table", "--loss-in1", write("gain.csv", "freq_hz,loss_db\n1e9,-12\n")], "between -1 and 80 dB"),
        ("empty table", ["import-table", "--loss-in1", write("empty.csv", "# nothing\n")], "empty"),
        ("missing file", ["import-table", "--loss-in1", folder / "nowhere.csv"], "file not found"),
        ("garbage touchstone", ["import-touchstone", "--loss-in1", write("junk.s2p", "hello\nworld\n")], "cannot be read as Touchstone"),
        ("empty touchstone", ["import-touchstone", "--loss-in1", write("void.s2p", "")], "cannot be read as Touchstone"),
        ("3-port touchstone", ["import-touchstone", "--loss-out", SKRF_3PORT], "has 3 port(s)"),
        ("1-port touchstone", ["import-touchstone", "--loss-out", SKRF_1PORT], "has 1 port(s)"),
        ("negative touchstone frequency", ["import-touchstone", "--loss-in1", write(
            "negf.s2p", "# GHz S RI R 50\n-1 0 0 0.9 0 0.9 0 0 0\n1 0 0 0.9 0 0.9 0 0 0\n")], "must be > 0 Hz"),
        ("no overlap to cascade", ["import-touchstone", "--loss-in1", MEASURED_2PORT, "--loss-in1", SKRF_DATA / "line.s2p"],
         "do not share any frequency range"),
        ("no paths", ["import-table"], "give at least one table"),
    ]


@pytest.mark.parametrize("index", range(16))
def test_bad_calibration_input_is_one_line_and_stores_nothing(tmp_path, index):
    db = f"sqlite:///{tmp_path / 'c.db'}"
    # A good set first: a failed import must leave it alone and add nothing.
    good = tmp_path / "good.csv"
    good.write_text("freq_hz,loss_db\n1e9,3\n2e9,3.5\n")
    assert invoke("cal", "import-table", "good", "--loss-in1", good, "--db", db).exit_code == 0
    before = stored_sets(db)
    case, args, expected = bad_files(tmp_path)[index]
    result = invoke("cal", args[0], "bad-one", *args[1:], "--db", db)
    assert result.exit_code == 2, (case, result.output)
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and expected in lines[0], (case, result.output)
    assert stored_sets(db) == before


def test_bad_set_names_and_duplicates(tmp_path):
    db = f"sqlite:///{tmp_path / 'c.db'}"
    good = tmp_path / "good.csv"
    good.write_text("freq_hz,loss_db\n1e9,3\n2e9,3.5\n")
    assert invoke("cal", "import-table", "one", "--loss-in1", good, "--db", db).exit_code == 0
    again = invoke("cal", "import-table", "one", "--loss-in1", good, "--db", db)
    assert again.exit_code == 2 and "already exists" in again.output
    spaced = invoke("cal", "import-table", "two words", "--loss-in1", good, "--db", db)
    assert spaced.exit_code == 2 and "letters, digits" in spaced.output
    never = invoke("cal", "import-table", "short-lived", "--loss-in1", good, "--valid-days", "0", "--db", db)
    assert never.exit_code == 2 and "more than 0" in never.output
    assert stored_sets(db) == 1 + 2
