"""A plan whose [device] disagrees with the registry (another lot, wafer or position for the same
part and serial) is said in one warning line and a stored event; the registry keeps its entry."""

from __future__ import annotations

from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.store.models import Device, Event

PLAN = (SAMPLE_RUNS / "demo_plan.toml").read_text().replace(
    "center_freqs_hz = [2.40e9, 2.45e9, 2.48e9]", "center_freqs_hz = [2.45e9]")


def run_plan(folder, text):
    (folder / "plan.toml").write_text(text)
    return invoke("run", folder / "plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", folder / "t.db")


def test_another_lot_is_a_warning_and_an_event(tmp_path):
    first = run_plan(tmp_path, PLAN)
    assert first.exit_code == 0 and "disagrees with the device registry" not in first.output
    second = run_plan(tmp_path, PLAN.replace('lot = "TB24-031"', 'lot = "TB24-099"'))
    assert second.exit_code == 0, second.output
    line = next(l for l in second.output.splitlines() if "disagrees" in l)
    assert line == ("warning: plan [device] KLN-2417A KLN24031-0117 disagrees with the device registry: "
                    "lot 'TB24-099' (the registry has 'TB24-031'); the run is stored against the registry's device")
    with Session(create_engine(f"sqlite:///{tmp_path / 't.db'}")) as session:
        assert session.scalars(select(Device.lot)).all() == ["TB24-031"]
        assert session.scalars(select(Event.message).where(Event.kind == "device-differs")).one() == line[9:]


def test_device_edit_changes_the_registry_and_the_warning_goes(tmp_path):
    run_plan(tmp_path, PLAN)
    db = tmp_path / "t.db"
    edited = invoke("device", "edit", "KLN-2417A", "KLN24031-0117", "--lot", "TB24-099", "--position", "", "--db", db)
    assert edited.exit_code == 0, edited.output
    assert edited.output.strip() == ("device KLN-2417A serial KLN24031-0117: lot: TB24-031 -> TB24-099; "
                                     "position: R4C11 -> -")
    shown = invoke("device", "show", "KLN-2417A", "KLN24031-0117", "--db", db).output
    assert "lot:       TB24-099" in shown and "position:  -" in shown
    again = run_plan(tmp_path, PLAN.replace('lot = "TB24-031"', 'lot = "TB24-099"'))
    assert again.exit_code == 0 and "disagrees" not in again.output
    missing = invoke("device", "edit", "KLN-2417A", "NOPE", "--lot", "x", "--db", db)
    assert missing.exit_code == 2 and missing.output.strip() == (
        "error: device KLN-2417A serial NOPE: not registered (see `tonebench device list`)")
