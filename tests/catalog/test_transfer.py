"""Export and import: export -> import into an empty database -> export again gives the identical
file, importing twice adds nothing, across SQLite and PostgreSQL; damaged files write nothing."""

from __future__ import annotations

import datetime as dt
import gzip
import json

import pytest
import sqlalchemy as sa
from typer.testing import CliRunner

from tonebench.catalog.synthetic import Layout, fill
from tonebench.catalog.transfer import export_runs, import_runs, verify
from tonebench.cli import app
from tonebench.errors import InputError
from tonebench.store import open_database, session_factory
from tonebench.store.models import (
    Base,
    Bench,
    CalibrationOffset,
    CalibrationSet,
    Device,
    Event,
    Instrument,
    Offset,
    Point,
    Result,
    Run,
    SystemResidual,
)

LAYOUT = Layout(centers_hz=(2.40e9, 2.45e9), spacings_hz=(1.0e6,), biases_v=(None, 3.3),
                tones_dbm=(-30.0, -24.0, -18.0, -12.0))
T0 = dt.datetime(2026, 2, 3, 10, 0, tzinfo=dt.timezone.utc)


def source_database(url: str, n_devices: int = 5) -> sa.Engine:
    """Synthetic runs plus what the generator leaves out: instruments, offsets, events, a
    calibration set used by runs and results, and values that test the encoding."""
    engine = open_database(url)
    fill(engine, n_devices, seed=9, layout=LAYOUT, flag_fraction=0.5, random_verdicts=True)
    with session_factory(engine).begin() as session:
        bench = session.scalars(sa.select(Bench)).first()
        cal = CalibrationSet(
            name="cal-2026-02-03", method="measured", created_at=T0, operator="Ana Lindqvist", bench_id=bench.id,
            instruments_json=[{"role": "meter", "resource": "TCPIP0::10.0.0.9::INSTR", "idn": "x,y,z,1"}],
            source_files_json=[], freq_min_hz=2.3e9, freq_max_hz=2.6e9, valid_days=30.0, notes="ünïcode ok",
            offsets=[CalibrationOffset(path=p, freq_hz=f, loss_db=l) for p, f, l in
                     (("in1", 2.3e9, 6.4), ("in1", 2.6e9, 6.6), ("out", 2.3e9, 1.4), ("out", 2.6e9, 1.6))],
            residuals=[SystemResidual(center_hz=2.45e9, spacing_hz=1e6, atten_db=20.0, system_ip3_dbm=38.5,
                                      source_ip3_dbm=None, analyzer_ip3_dbm=41.0, sweep_json={"points": [1, 2]},
                                      created_at=T0)],
        )
        session.add(cal)
        session.flush()
        for i, run in enumerate(session.scalars(sa.select(Run).order_by(Run.id))):
            run.instruments = [Instrument(role=r, resource=f"TCPIP0::127.0.0.1::{5000 + j}::SOCKET",
                                          dialect="generic-source", idn=f"maker,model,{i}{j},1.0")
                               for j, r in enumerate(("source1", "source2", "analyzer"))]
            run.offsets = [Offset(path="out", freq_hz=f, loss_db=1.5, origin="bench file") for f in (2.3e9, 2.6e9)]
            # Two events at the same instant: their order must not depend on row ids.
            run.events = [Event(at=T0, level="info", kind="run-start", message="started", details_json={"b": 1, "a": [1.5]}),
                          Event(at=T0, level="warning", kind="overload", message="ADC over range \u2013 retried"),
                          Event(at=T0 + dt.timedelta(seconds=1.5), level="info", kind="run-end", message="done")]
            if i % 2 == 0:
                run.calibration_set_id = cal.id
                for result in session.scalars(sa.select(Result).where(Result.run_id == run.id)):
                    result.calibration_set_id = cal.id
                    result.details_json = {"valid_mask": [True, False, True, True]}
        point = session.scalars(sa.select(Point).order_by(Point.id)).first()
        point.extra_json = {"note": "quote \" and newline \n kept"}
        point.fail_reason = None
    return engine


def counts(engine: sa.Engine) -> dict[str, int]:
    with engine.connect() as connection:
        return {table.name: connection.scalar(sa.select(sa.func.count()).select_from(table))
                for table in Base.metadata.sorted_tables if table.name not in ("jobs", "spec_limits")}


def test_export_import_export_is_identical_and_import_is_idempotent(tmp_path, db_url):
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}")
    with session_factory(source)() as session:
        first = export_runs(session, tmp_path / "first.jsonl.gz")
    assert first.runs == 5 and first.points == 5 * LAYOUT.points_per_run

    target = open_database(db_url)
    added = import_runs(session_factory(target), tmp_path / "first.jsonl.gz")
    assert (added.runs_added, added.runs_present, added.points_added) == (5, 0, first.points)
    assert counts(target) == counts(source)  # every row arrived, none twice

    with session_factory(target)() as session:
        second = export_runs(session, tmp_path / "second.jsonl.gz")
    assert (tmp_path / "first.jsonl.gz").read_bytes() == (tmp_path / "second.jsonl.gz").read_bytes()
    assert second.sha256 == first.sha256

    before = counts(target)
    again = import_runs(session_factory(target), tmp_path / "first.jsonl.gz")
    assert (again.runs_added, again.runs_present, again.added) == (0, 5, {})
    assert counts(target) == before
    source.dispose()
    target.dispose()


def test_content_survives_exactly(tmp_path):
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}", n_devices=2)
    with session_factory(source)() as session:
        export_runs(session, tmp_path / "x.jsonl.gz")
    target = open_database(f"sqlite:///{tmp_path / 'lab.db'}")
    import_runs(session_factory(target), tmp_path / "x.jsonl.gz")

    def snapshot(engine):
        # Every column but ids and foreign keys, read directly, in a content order.
        with engine.connect() as connection:
            out = {}
            for model in (Run, Point, Result, Event, CalibrationSet, CalibrationOffset, Device):
                columns = [c for c in model.__table__.columns if c.name != "id" and not c.foreign_keys]
                rows = connection.execute(sa.select(*columns)).all()
                out[model.__tablename__] = sorted(json.dumps(list(row), sort_keys=True, default=str) for row in rows)
            return out

    assert snapshot(target) == snapshot(source)
    with session_factory(target)() as session:
        point = session.scalars(sa.select(Point).where(Point.extra_json.is_not(None))).one()
        assert point.extra_json == {"note": 'quote " and newline \n kept'}
        run = session.scalars(sa.select(Run).where(Run.calibration_set_id.is_not(None))).first()
        assert run.calibration_set.name == "cal-2026-02-03"
        assert sorted(e.kind for e in run.events) == ["overload", "run-end", "run-start"]
        assert all(e.at.tzinfo is not None for e in run.events)
    source.dispose()
    target.dispose()


def test_partial_overlap_adds_only_missing_runs_and_keeps_existing_devices(tmp_path):
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}", n_devices=4)
    with session_factory(source)() as session:
        guids = session.scalars(sa.select(Run.guid).order_by(Run.started_at)).all()
        export_runs(session, tmp_path / "one.jsonl.gz", run_idents=[guids[1][:13]])
        export_runs(session, tmp_path / "all.jsonl.gz")
        part, serial = session.execute(sa.select(Device.part_number, Device.serial).order_by(Device.serial)).first()
    target = open_database(f"sqlite:///{tmp_path / 'lab.db'}")
    assert import_runs(session_factory(target), tmp_path / "one.jsonl.gz").runs_added == 1
    with session_factory(target).begin() as session:
        # A device registered here first keeps what this database says about it.
        session.add(Device(part_number=part, serial=serial, lot="LOCAL-LOT", tags=[]))
    summary = import_runs(session_factory(target), tmp_path / "all.jsonl.gz")
    assert (summary.runs_added, summary.runs_present) == (3, 1)
    with session_factory(target)() as session:
        assert session.scalars(sa.select(Device.lot).where(Device.serial == serial)).one() == "LOCAL-LOT"
        assert sorted(session.scalars(sa.select(Run.guid))) == sorted(guids)
    source.dispose()
    target.dispose()


def rewrite(path, transform) -> None:
    lines = gzip.decompress(path.read_bytes()).decode().splitlines(keepends=True)
    path.write_bytes(gzip.compress("".join(transform(lines)).encode()))


@pytest.mark.parametrize("damage, words", [
    (lambda lines: [lines[0]] + [lines[1].replace("synthetic", "synthetiq", 1)] + lines[2:], "hash"),
    (lambda lines: lines[:-1], "no end record"),
    (lambda lines: lines[:3] + lines[4:], "does not match"),
    (lambda lines: [lines[0].replace('"version":1', '"version":9')] + lines[1:], "version 9"),
    (lambda lines: ['{"kind":"header","format":"something-else"}\n'] + lines[1:], "not a tonebench transfer file"),
])
def test_damaged_file_is_refused_and_writes_nothing(tmp_path, damage, words):
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}", n_devices=2)
    path = tmp_path / "x.jsonl.gz"
    with session_factory(source)() as session:
        export_runs(session, path)
    rewrite(path, damage)
    target = open_database(f"sqlite:///{tmp_path / 'lab.db'}")
    before = counts(target)
    with pytest.raises(InputError) as caught:
        import_runs(session_factory(target), path)
    assert words in str(caught.value) and "\n" not in str(caught.value)
    assert counts(target) == before
    source.dispose()
    target.dispose()


def test_not_gzip_is_refused(tmp_path):
    path = tmp_path / "notes.jsonl.gz"
    path.write_text("just some notes\n")
    with pytest.raises(InputError, match="not a readable transfer file"):
        verify(path)


def test_export_and_import_commands(tmp_path):
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}", n_devices=3)
    with source.connect() as connection:
        starts = sorted(connection.scalars(sa.select(Run.started_at)))
    source.dispose()
    since = starts[1]  # the first run is left out, the others go
    runner = CliRunner(env={"COLUMNS": "200"})
    out = tmp_path / "ship.jsonl.gz"
    exported = runner.invoke(app, ["export", str(out), "--since", since.isoformat(), "--db", f"sqlite:///{tmp_path / 'bench.db'}"])
    assert exported.exit_code == 0, exported.output
    assert "exported 2 runs" in exported.output
    lab = f"sqlite:///{tmp_path / 'lab.db'}"
    first = runner.invoke(app, ["import", str(out), "--db", lab])
    assert first.exit_code == 0 and "imported 2 runs" in first.output and "0 already present" in first.output
    second = runner.invoke(app, ["import", str(out), "--db", lab])
    assert "imported 0 runs" in second.output and "2 already present" in second.output
    missing = runner.invoke(app, ["import", str(tmp_path / "nope.gz"), "--db", lab])
    assert missing.exit_code == 2 and "no such file" in missing.output


def _records(path) -> list[dict]:
    """Every record of a transfer file, those nested in a run (points, results) included."""
    records = [json.loads(line) for line in gzip.decompress(path.read_bytes()).decode().splitlines()]
    nested = [item for record in records for name in ("points", "results") for item in record.get(name, [])]
    return records + nested


def test_the_lo_level_travels_and_runs_without_it_keep_their_records(tmp_path):
    """lo_dbm (the stepped LO, migration 0007) is left out of a record when None, so a run without
    it exports the records it did before the axis; set, it survives export, import, export."""
    source = source_database(f"sqlite:///{tmp_path / 'bench.db'}", n_devices=2)
    with session_factory(source)() as session:
        export_runs(session, tmp_path / "old.jsonl.gz")
    old = _records(tmp_path / "old.jsonl.gz")
    assert any("temperature_c" in record for record in old)  # nested point and result records are read
    assert not any("lo_dbm" in record for record in old)
    with session_factory(source).begin() as session:
        run = session.scalars(sa.select(Run).order_by(Run.id)).first()
        for row in (*session.scalars(sa.select(Point).where(Point.run_id == run.id)),
                    *session.scalars(sa.select(Result).where(Result.run_id == run.id))):
            row.lo_dbm = 3.0
    with session_factory(source)() as session:
        export_runs(session, tmp_path / "first.jsonl.gz")
    stepped = [r for r in _records(tmp_path / "first.jsonl.gz") if "lo_dbm" in r]
    assert stepped and all(r["lo_dbm"] == 3.0 for r in stepped)
    assert any(r.get("group_key", "").endswith(";lo_dbm=3.0") for r in stepped)
    target = open_database(f"sqlite:///{tmp_path / 'lab.db'}")
    import_runs(session_factory(target), tmp_path / "first.jsonl.gz")
    with session_factory(target)() as session:
        assert session.scalar(sa.select(sa.func.count()).where(Result.lo_dbm == 3.0)) > 0
        export_runs(session, tmp_path / "second.jsonl.gz")
    assert (tmp_path / "first.jsonl.gz").read_bytes() == (tmp_path / "second.jsonl.gz").read_bytes()
    source.dispose()
    target.dispose()
