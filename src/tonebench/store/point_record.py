"""One point as measured: the typed record the sequencer builds, the store writes and the results
read back. Its fields are the points table's columns (less the row id, the run link and the commit
time, which the store adds), with the same names and units.

raw_* are analyzer readings as read; pin/pout/im3/noise/im2 are DUT-referred (inputs at the DUT
input plane, outputs at the DUT output plane); tone_dbm is the target per tone at the DUT input
plane and source*_dbm what the sources were commanded to. A failed point carries its planned
coordinates and fail_reason only. What has no column of its own goes in extra_json.

Adding a measured quantity: a field here, its column in store/models/points.py with a migration,
and the code that computes it. The writer and the reader follow the fields.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any


@dataclass(frozen=True)
class PointRecord:
    point_key: str
    seq: int
    status: str  # "measured" or "failed"
    bench_clock_s: float
    center_hz: float
    spacing_hz: float
    f1_hz: float
    f2_hz: float
    tone_dbm: float
    bias_v: float | None = None
    temperature_c: float | None = None  # chamber set point (the axis value)
    lo_dbm: float | None = None  # LO power stepped by the plan (the axis value)
    fail_reason: str | None = None
    # The gate and drain supplies' read-back at the point (bias benches only).
    gate_read_v: float | None = None
    gate_current_a: float | None = None
    drain_read_v: float | None = None
    drain_current_a: float | None = None
    chamber_read_c: float | None = None  # the chamber's reading at the point

    source1_dbm: float | None = None
    source2_dbm: float | None = None
    # Closed-loop leveling: dB added to each source's open-loop setting to hit its target.
    source1_correction_db: float | None = None
    source2_correction_db: float | None = None

    in1_loss_db: float | None = None
    in2_loss_db: float | None = None
    out_loss_f1_db: float | None = None
    out_loss_f2_db: float | None = None
    out_loss_lower_db: float | None = None
    out_loss_upper_db: float | None = None

    raw_f1_dbm: float | None = None
    raw_f2_dbm: float | None = None
    raw_lower_dbm: float | None = None
    raw_upper_dbm: float | None = None
    raw_noise_lower_dbm: float | None = None
    raw_noise_upper_dbm: float | None = None
    span_hz: float | None = None
    rbw_hz: float | None = None
    vbw_hz: float | None = None
    atten_db: float | None = None
    ref_level_dbm: float | None = None
    overload: bool | None = None
    sweep_time_s: float | None = None
    # The attenuation-step check: IM3 read again with step_atten_db more input attenuation.
    step_atten_db: float | None = None
    raw_lower_step_dbm: float | None = None
    raw_upper_step_dbm: float | None = None
    # Second-order products f2-f1 ("diff") and f1+f2 ("sum"), when the plan asks for them.
    raw_diff_dbm: float | None = None
    raw_sum_dbm: float | None = None
    out_loss_diff_db: float | None = None
    out_loss_sum_db: float | None = None

    pin1_dbm: float | None = None
    pin2_dbm: float | None = None
    pout_f1_dbm: float | None = None
    pout_f2_dbm: float | None = None
    im3_lower_dbm: float | None = None
    im3_upper_dbm: float | None = None
    noise_lower_dbm: float | None = None
    noise_upper_dbm: float | None = None
    im2_diff_dbm: float | None = None
    im2_sum_dbm: float | None = None

    extra_json: dict[str, Any] | None = None


RECORD_FIELDS = tuple(f.name for f in fields(PointRecord))


def point_columns(record: PointRecord) -> dict[str, Any]:
    """The points-table values of a record, by column name.

    A missing extra_json is left out rather than given as None: SQLAlchemy stores a JSON None as
    the JSON text 'null', and a point without extras has always been SQL NULL.
    """
    values = dict(vars(record))  # the fields, in their order
    if values["extra_json"] is None:
        del values["extra_json"]
    return values


def record_of(row: Any) -> PointRecord:
    """The record of a stored points row (anything with the record's fields as attributes)."""
    return PointRecord(**{name: getattr(row, name) for name in RECORD_FIELDS})
