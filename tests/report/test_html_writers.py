"""Every HTML page (run report, comparison, calibration page) is written the one way of
report/html.py: refused for a missing folder or a directory, written to a temporary file that is
fsynced and then renamed, the old page kept when the write fails, one stylesheet."""

from __future__ import annotations

import datetime as dt
import os
import stat

import numpy as np
import pandas as pd
import pytest

from tonebench.analysis import fit_sweep
from tonebench.calibration.sets import CalibrationView
from tonebench.catalog.query import ResultFilter
from tonebench.catalog.synthetic import Layout, fill
from tonebench.errors import InputError, TonebenchError
from tonebench.planes.loss_table import LossTable
from tonebench.report import html as html_module
from tonebench.report.calibration_page import write_calibration_page
from tonebench.report.comparison import write_compare_report
from tonebench.report.run_report import (
    SweepPlotData,
    result_row,
    sweep_title,
    write_report,
)
from tonebench.store.database import open_database, session_factory


def _run_report(path):
    # Gain 12 dB, IIP3 4 dBm: IM3 out = 3 pin - 2 IIP3 + gain; noise far below.
    pin = np.linspace(-30.0, -10.0, 6)
    im3 = 3.0 * pin - 2.0 * 4.0 + 12.0
    noise = np.full(6, -120.0)
    fit = fit_sweep(pin, pin, pin, pin + 12.0, pin + 12.0, im3, im3, noise, noise, np.zeros(6, bool))
    plot = SweepPlotData(sweep_title(2.45e9, 1e6), pin, pin + 12.0, im3, im3, noise,
                         fit.valid_mask, fit)
    return write_report(path, "run", [], [plot], [result_row(2.45e9, 1e6, fit)])


@pytest.fixture(scope="module")
def catalog_db(tmp_path_factory):
    engine = open_database(f"sqlite:///{tmp_path_factory.mktemp('catalog') / 'catalog.db'}")
    fill(engine, 2, seed=3, layout=Layout(centers_hz=(2.45e9,), spacings_hz=(1e6,), biases_v=(None,),
                                          tones_dbm=(-30.0, -20.0, -10.0)))
    yield engine
    engine.dispose()


def _calibration_view() -> CalibrationView:
    tables = {path: LossTable.from_rows(path, [[2.3e9, 6.0], [2.6e9, 6.5]], "test")
              for path in ("in1", "in2", "out")}
    return CalibrationView(id=1, name="cables", method="table", created_at=dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc), operator=None,
                           instruments=[], source_files=[], freq_min_hz=2.3e9, freq_max_hz=2.6e9, valid_days=30.0,
                           expired_at=None, notes=None, tables=tables)


@pytest.fixture(params=["run report", "comparison", "calibration page", "points table"])
def writer(request, catalog_db):
    """A callable writing one kind of page (or the points table of `export --points`) to a path."""
    if request.param == "run report":
        return _run_report
    if request.param == "comparison":
        def compare(path):
            with session_factory(catalog_db)() as session:
                return write_compare_report(session, ResultFilter(), path)[0]
        return compare
    if request.param == "points table":
        from tonebench.api.points_export import write_points

        table = pd.DataFrame({"tone_dbm": [-30.0, -20.0], "flags": [[], ["slope"]]})
        return lambda path: write_points(table, path, "csv")
    return lambda path: write_calibration_page(_calibration_view(), path)


def test_page_is_fsynced_in_a_temporary_file_then_renamed(writer, tmp_path, monkeypatch):
    calls = []
    real_fsync, real_replace = os.fsync, os.replace
    monkeypatch.setattr(html_module.os, "fsync", lambda fd: (calls.append(("fsync", fd)), real_fsync(fd))[1])
    monkeypatch.setattr(html_module.os, "replace",
                        lambda src, dst: (calls.append(("replace", os.path.dirname(src), str(dst))),
                                          real_replace(src, dst))[1])
    target = tmp_path / "page.html"
    assert writer(target) == target
    assert [c[0] for c in calls] == ["fsync", "replace"]
    assert calls[1][1:] == (str(tmp_path), str(target))  # renamed from the same folder
    page = target.read_text(encoding="utf-8")
    if page.startswith("tone_dbm"):  # the points table
        assert page.splitlines() == ["tone_dbm,flags", "-30.0,", "-20.0,slope"]
    else:
        assert page.startswith("<!DOCTYPE html>") and page.count(html_module.STYLE) == 1
    assert stat.S_IMODE(target.stat().st_mode) == 0o644
    assert [p.name for p in tmp_path.iterdir()] == ["page.html"]  # no temporary or probe file left


def test_missing_folder_is_refused_and_nothing_created(writer, tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        writer(tmp_path / "nowhere" / "page.html")
    assert list(tmp_path.iterdir()) == []


def test_directory_is_refused(writer, tmp_path):
    with pytest.raises(InputError, match="is a directory"):
        writer(tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_failed_write_keeps_the_old_page(writer, tmp_path, monkeypatch):
    target = tmp_path / "page.html"
    target.write_text("old page")

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(html_module.os, "fsync", full_disk)
    with pytest.raises(TonebenchError, match=r"No space left on device\); nothing was replaced"):
        writer(target)
    assert target.read_text() == "old page"
    assert [p.name for p in tmp_path.iterdir()] == ["page.html"]
