"""Writing and reading sweet-spot studies (store/models/bias.py)."""

from __future__ import annotations

import uuid
from collections.abc import Callable

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload, sessionmaker

from tonebench.store.models import BiasFinding, BiasStudy, DcPoint, Device

FINDING_FIELDS = ("kind", "drive_tone_dbm", "sweet_spot_v", "sweet_spot_bound_v", "peak_iip3_dbm",
                  "window_threshold_dbm", "window_low_v", "window_high_v", "window_bound_v", "drain_current_a",
                  "gain_db", "method")


def add_study(sessions: sessionmaker, *, part_number: str, serial: str, bench_name: str, transfer, window_points: int,
              polyorder: int, step_v: float, run_guids: list[str], findings: list, input_offset_db: float | None,
              temp_k: float | None = None, temperature_c: float | None = None, center_hz: float | None = None,
              series_guid: str | None = None, judge: Callable[[Session, int], object] | None = None) -> str:
    """Store one study (its device must exist: its runs made it); returns the study's GUID.
    `judge(session, study_id)` gives its findings their verdicts in the same transaction."""
    guid = str(uuid.uuid4())
    with sessions.begin() as session:
        device = session.scalars(select(Device).where(Device.part_number == part_number,
                                                      Device.serial == serial)).one()
        study = BiasStudy(guid=guid, device_id=device.id, bench_name=bench_name, temp_k=temp_k,
                          temperature_c=temperature_c, center_hz=center_hz, series_guid=series_guid,
                          drain_v=float(transfer.drain_v), window_points=window_points, polyorder=polyorder,
                          step_v=step_v, current_sigma_a=transfer.current_sigma_a, run_guids=",".join(run_guids))
        study.dc_points = [
            DcPoint(seq=seq, gate_v=float(gate_v), gate_read_v=float(gate_read_v), drain_read_v=float(drain_read_v),
                    drain_current_a=float(drain_a))
            for seq, (gate_v, gate_read_v, drain_read_v, drain_a) in enumerate(
                zip(transfer.gate_v, transfer.gate_read_v, transfer.drain_read_v, transfer.drain_current_a))]
        study.findings = [
            BiasFinding(**{name: getattr(found, name) for name in FINDING_FIELDS},
                        input_offset_db=input_offset_db if found.kind == "two-tone" else None)
            for found in findings if found is not None]
        session.add(study)
        if judge is not None:
            session.flush()
            judge(session, study.id)
    return guid


def study_of(sessions: sessionmaker, guid: str) -> BiasStudy:
    with sessions() as session:
        loaded = select(BiasStudy).options(selectinload(BiasStudy.dc_points), selectinload(BiasStudy.findings))
        return session.scalars(loaded.where(BiasStudy.guid == guid)).one()
