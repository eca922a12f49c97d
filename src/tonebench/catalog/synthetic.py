"""Fill a database quickly with plausible devices, runs, points and results (tests, benchmarks).

Rows go straight through the tables with batched inserts, not through the sequencer: a memoryless
amplifier model gives each point its tone, IM3 and noise readings, and each (center, spacing,
bias) group gets a result near the device's true intercepts. Part numbers, lots and serials
are invented.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import sqlalchemy as sa

from tonebench.version import __version__
from tonebench.store.models import (
    ANALYZER_CAUSES,
    FLAGS,
    VERDICTS,
    Bench,
    Device,
    Plan,
    Point,
    PointFlag,
    Result,
    ResultFlag,
    Run,
    result_group_key,
)
from tonebench.store.point_record import PointRecord, point_columns

# Invented parts: (part number, serial prefix, IIP3 at 2.45 GHz in dBm, gain in dB, P1dB per tone in dBm).
PARTS = (
    ("QMX-4410", "QX", 4.0, 14.0, -6.0),
    ("VRA-2205", "VR", -2.0, 18.0, -12.0),
    ("LNT-0930B", "LB", 8.0, 11.0, -2.0),
)
TAGS = ("lna", "eng", "qual", "rework", "hot", "cold")
NOISE_FLOOR_DBM = -112.0  # analyzer noise at the IM3 frequencies, DUT output plane
OUT_LOSS_DB = 1.5
IN_LOSS_DB = 6.5
START = dt.datetime(2026, 1, 5, 8, 0, tzinfo=dt.timezone.utc)


@dataclass(frozen=True)
class Layout:
    """What each device's run measures: every center x spacing x bias, tone swept up."""

    centers_hz: tuple[float, ...] = (2.40e9, 2.45e9, 2.48e9, 2.50e9)
    spacings_hz: tuple[float, ...] = (1.0e6, 10.0e6)
    biases_v: tuple[float | None, ...] = (None,)
    tones_dbm: tuple[float, ...] = tuple(float(t) for t in np.arange(-40.0, 8.0 + 1e-9, 2.0))

    @property
    def points_per_run(self) -> int:
        return len(self.centers_hz) * len(self.spacings_hz) * len(self.biases_v) * len(self.tones_dbm)


@dataclass
class Truth:
    """What was written for one result, for checks that must not read through the code tested."""

    run_guid: str
    group_key: str
    part_number: str
    serial: str
    lot: str
    wafer: str
    tags: tuple[str, ...]
    started_at: dt.datetime
    center_hz: float
    spacing_hz: float
    bias_v: float | None
    iip3_dbm: float | None
    oip3_dbm: float | None
    verdict: str | None
    flags: set[str] = field(default_factory=set)


@dataclass
class FillSummary:
    devices: int = 0
    runs: int = 0
    points: int = 0
    results: int = 0
    truths: list[Truth] = field(default_factory=list)


def fill(
    engine: sa.Engine,
    n_devices: int,
    *,
    seed: int = 1,
    layout: Layout = Layout(),
    n_lots: int = 8,
    batch_devices: int = 100,
    flag_fraction: float = 0.05,
    random_verdicts: bool = False,
    keep_truth: bool = False,
    bench_name: str = "synthetic-bench",
    serial_offset: int = 0,
) -> FillSummary:
    """Write n_devices devices, one complete run each, in transactions of batch_devices devices.

    random_verdicts writes a random verdict (or none) per result, for query tests; otherwise
    verdicts stay empty until limits are applied. keep_truth keeps a Truth per result
    (memory grows with the results: leave it off for big fills).
    """
    rng = np.random.default_rng(seed)
    summary = FillSummary()
    with engine.begin() as connection:
        bench_id, plan_id = _bench_and_plan(connection, bench_name, layout)
    for first in range(0, n_devices, batch_devices):
        count = min(batch_devices, n_devices - first)
        with engine.begin() as connection:
            _fill_batch(connection, rng, summary, layout, bench_id, plan_id, first + serial_offset,
                        count, n_lots, flag_fraction, random_verdicts, keep_truth)
    return summary


def _bench_and_plan(connection: sa.Connection, bench_name: str, layout: Layout) -> tuple[int, int]:
    text = (f"# synthetic plan\n[sweep]\ncenter_freqs_hz = {list(layout.centers_hz)}\n"
            f"spacings_hz = {list(layout.spacings_hz)}\n")
    sha = hashlib.sha256(text.encode()).hexdigest()
    bench_id = connection.scalar(sa.select(Bench.id).where(Bench.name == bench_name))
    if bench_id is None:
        bench_id = connection.scalar(sa.insert(Bench).values(name=bench_name, description="synthetic data",
                                                             created_at=START).returning(Bench.id))
    plan_id = connection.scalar(sa.select(Plan.id).where(Plan.sha256 == sha))
    if plan_id is None:
        plan_id = connection.scalar(sa.insert(Plan).values(name="synthetic-plan", text=text, sha256=sha,
                                                           created_at=START).returning(Plan.id))
    return bench_id, plan_id


def _device_row(rng: np.random.Generator, index: int, n_lots: int) -> tuple[dict, dict]:
    """Registry fields and the device's true behaviour (dBm, dB)."""
    part, prefix, iip3_dbm, gain_db, p1db_dbm = PARTS[index % len(PARTS)]
    lot_number = int(rng.integers(n_lots))
    n_tags = int(rng.integers(0, 3))
    tags = sorted(set(rng.choice(TAGS, size=n_tags, replace=False).tolist())) if n_tags else []
    registry = dict(
        part_number=part, serial=f"{prefix}{index:07d}", lot=f"LT26-{lot_number:03d}",
        wafer=f"W{int(rng.integers(1, 13)):02d}", position=f"R{int(rng.integers(1, 30))}C{int(rng.integers(1, 30))}",
        tags=tags, notes=None,
    )
    lot_shift_db = (lot_number - n_lots / 2) * 0.25  # lots differ a little, devices a little more
    behaviour = dict(
        iip3_dbm=iip3_dbm + lot_shift_db + float(rng.normal(0.0, 0.8)),
        asymmetry_db=float(rng.normal(0.0, 0.3)),
        gain_db=gain_db + float(rng.normal(0.0, 0.3)),
        p1db_dbm=p1db_dbm + float(rng.normal(0.0, 0.5)),
    )
    return registry, behaviour


def _groups(layout: Layout) -> Iterator[tuple[float, float, float | None]]:
    for center_hz in layout.centers_hz:
        for spacing_hz in layout.spacings_hz:
            for bias_v in layout.biases_v:
                yield center_hz, spacing_hz, bias_v


def _sweep(rng, behaviour: dict, center_hz: float, spacing_hz: float, bias_v: float | None,
           tones_dbm: np.ndarray) -> dict[str, np.ndarray]:
    """DUT-referred readings of one sweep from a memoryless model (dBm)."""
    ghz_from_ref = (center_hz - 2.45e9) / 1e9
    bias_shift_db = 0.0 if bias_v is None else 2.0 * (bias_v - 3.3)
    gain_db = behaviour["gain_db"] - 2.0 * ghz_from_ref
    iip3_lower = behaviour["iip3_dbm"] + ghz_from_ref + bias_shift_db - behaviour["asymmetry_db"] / 2
    iip3_upper = iip3_lower + behaviour["asymmetry_db"]
    # Soft compression, 1 dB down at P1dB: 10 log10(1 + 10^(x/10)) = 1 dB at x = -5.87 dB.
    compression_db = 10 * np.log10(1 + 10 ** ((tones_dbm - behaviour["p1db_dbm"] - 5.87) / 10))
    pout = tones_dbm + gain_db - compression_db
    n = tones_dbm.size
    noise_lower = NOISE_FLOOR_DBM + rng.normal(0.0, 0.5, n)
    noise_upper = NOISE_FLOOR_DBM + rng.normal(0.0, 0.5, n)
    im3_lower_true = 3 * tones_dbm - 2 * iip3_lower + gain_db
    im3_upper_true = 3 * tones_dbm - 2 * iip3_upper + gain_db
    # What an analyzer reads: product plus noise (powers add), with a little scatter.
    im3_lower = 10 * np.log10(10 ** (im3_lower_true / 10) + 10 ** (noise_lower / 10)) + rng.normal(0, 0.05, n)
    im3_upper = 10 * np.log10(10 ** (im3_upper_true / 10) + 10 ** (noise_upper / 10)) + rng.normal(0, 0.05, n)
    return dict(pout=pout + rng.normal(0, 0.02, n), im3_lower=im3_lower, im3_upper=im3_upper,
                noise_lower=noise_lower, noise_upper=noise_upper, gain_db=np.full(n, gain_db),
                iip3_lower=np.full(n, iip3_lower), iip3_upper=np.full(n, iip3_upper))


def _fill_batch(connection, rng, summary, layout, bench_id, plan_id, first, count, n_lots,
                flag_fraction, random_verdicts, keep_truth) -> None:
    devices, behaviours = zip(*(_device_row(rng, first + i, n_lots) for i in range(count)))
    device_ids = connection.execute(
        sa.insert(Device).returning(Device.id, sort_by_parameter_order=True), list(devices)).scalars().all()

    runs = []
    for i, device_id in enumerate(device_ids):
        started_at = START + dt.timedelta(minutes=37 * (first + i)) + dt.timedelta(seconds=int(rng.integers(0, 3000)))
        runs.append(dict(
            guid=str(uuid.UUID(int=int(rng.integers(0, 2**63)) << 64 | int(rng.integers(0, 2**63)), version=4)),
            bench_id=bench_id, device_id=device_id, plan_id=plan_id, status="complete",
            end_reason="all points measured", started_at=started_at,
            ended_at=started_at + dt.timedelta(minutes=12), simulated=True, host="synthetic",
            software_version=__version__, metadata_json={"synthetic": True}, owner=None,
            heartbeat_at=None, calibration_set_id=None,
        ))
    run_ids = connection.execute(
        sa.insert(Run).returning(Run.id, sort_by_parameter_order=True), runs).scalars().all()

    tones = np.array(layout.tones_dbm)
    point_rows, result_rows, truths, point_flag_keys, result_flag_lists = [], [], [], [], []
    for device, behaviour, run, run_id in zip(devices, behaviours, runs, run_ids):
        seq = 0
        for center_hz, spacing_hz, bias_v in _groups(layout):
            sweep = _sweep(rng, behaviour, center_hz, spacing_hz, bias_v, tones)
            for j, tone_dbm in enumerate(tones):
                key = f"c{center_hz:.0f}/d{spacing_hz:.0f}/p{tone_dbm:+.2f}" + ("" if bias_v is None else f"/b{bias_v:+.4f}V")
                point_rows.append(_point_row(run_id, key, seq, center_hz, spacing_hz, float(tone_dbm), bias_v,
                                             {name: float(v[j]) for name, v in sweep.items()}, run["started_at"]))
                if rng.random() < flag_fraction / len(tones):
                    point_flag_keys.append((run_id, key, str(rng.choice(FLAGS)),
                                            run["guid"], result_group_key(center_hz, spacing_hz, bias_v)))
                seq += 1
            result_rows.append(_result_row(rng, run_id, center_hz, spacing_hz, bias_v, sweep, tones,
                                           behaviour, random_verdicts))
            result_flags = sorted(set(rng.choice(FLAGS, size=int(rng.integers(1, 3))).tolist())) \
                if rng.random() < flag_fraction else []
            result_flag_lists.append(result_flags)
            if keep_truth:
                row = result_rows[-1]
                truths.append(Truth(
                    run_guid=run["guid"], group_key=row["group_key"], part_number=device["part_number"],
                    serial=device["serial"], lot=device["lot"], wafer=device["wafer"], tags=tuple(device["tags"]),
                    started_at=run["started_at"], center_hz=center_hz, spacing_hz=spacing_hz, bias_v=bias_v,
                    iip3_dbm=row["iip3_dbm"], oip3_dbm=row["oip3_dbm"], verdict=row["verdict"],
                    flags=set(result_flags)))

    connection.execute(sa.insert(Point), _used_columns(point_rows))
    result_ids = connection.execute(
        sa.insert(Result).returning(Result.id, sort_by_parameter_order=True), result_rows).scalars().all()
    flag_rows = [_flag_row(rng, {"result_id": rid}, flag)
                 for rid, flags in zip(result_ids, result_flag_lists) for flag in flags]
    if flag_rows:
        connection.execute(sa.insert(ResultFlag), flag_rows)
    if point_flag_keys:
        wanted = {(run_id, key) for run_id, key, *_ in point_flag_keys}
        found = connection.execute(sa.select(Point.id, Point.run_id, Point.point_key)
                                   .where(Point.run_id.in_(sorted({r for r, _ in wanted})))).all()
        ids = {(run_id, key): pid for pid, run_id, key in found if (run_id, key) in wanted}
        connection.execute(sa.insert(PointFlag), [_flag_row(rng, {"point_id": ids[(r, k)]}, flag)
                                                  for r, k, flag, *_ in point_flag_keys])
        # Point flags are exclusion reasons: they do not make a result flagged (catalog/query.py).

    summary.devices += count
    summary.runs += count
    summary.points += len(point_rows)
    summary.results += len(result_rows)
    summary.truths.extend(truths)


def _used_columns(rows: list[dict]) -> list[dict]:
    """The rows without the columns that are None in every one of them (they stay NULL): fewer
    keys per row keep the batched insert fast, and every row keeps the same keys."""
    if not rows:
        return rows
    unused = [name for name, value in rows[0].items() if value is None
              and all(row[name] is None for row in rows)]
    for row in rows:
        for name in unused:
            del row[name]
    return rows


def _point_row(run_id, key, seq, center_hz, spacing_hz, tone_dbm, bias_v, s: dict, started_at) -> dict:
    # Fields left out (second-order products, attenuation step, leveling) stay NULL.
    out_loss = OUT_LOSS_DB
    record = PointRecord(
        point_key=key, seq=seq, status="measured", bench_clock_s=seq * 2.5,
        center_hz=center_hz, spacing_hz=spacing_hz, f1_hz=center_hz - spacing_hz / 2,
        f2_hz=center_hz + spacing_hz / 2, tone_dbm=tone_dbm, bias_v=bias_v,
        source1_dbm=tone_dbm + IN_LOSS_DB, source2_dbm=tone_dbm + IN_LOSS_DB,
        in1_loss_db=IN_LOSS_DB, in2_loss_db=IN_LOSS_DB, out_loss_f1_db=out_loss, out_loss_f2_db=out_loss,
        out_loss_lower_db=out_loss, out_loss_upper_db=out_loss,
        raw_f1_dbm=s["pout"] - out_loss, raw_f2_dbm=s["pout"] - out_loss,
        raw_lower_dbm=s["im3_lower"] - out_loss, raw_upper_dbm=s["im3_upper"] - out_loss,
        raw_noise_lower_dbm=s["noise_lower"] - out_loss, raw_noise_upper_dbm=s["noise_upper"] - out_loss,
        span_hz=10_000.0, rbw_hz=1000.0, vbw_hz=1000.0, atten_db=20.0, ref_level_dbm=0.0,
        overload=False, sweep_time_s=0.05,
        pin1_dbm=tone_dbm, pin2_dbm=tone_dbm, pout_f1_dbm=s["pout"], pout_f2_dbm=s["pout"],
        im3_lower_dbm=s["im3_lower"], im3_upper_dbm=s["im3_upper"],
        noise_lower_dbm=s["noise_lower"], noise_upper_dbm=s["noise_upper"],
    )
    # Batched inserts, not the point writer: the same columns, without a transaction per point.
    return dict(run_id=run_id, measured_at=started_at + dt.timedelta(seconds=seq * 2.5), **point_columns(record))


def _result_row(rng, run_id, center_hz, spacing_hz, bias_v, sweep, tones, behaviour, random_verdicts) -> dict:
    # Results as an analysis would roughly have found them; about 2 % refused (noise-limited).
    gain_db = float(sweep["gain_db"][0])
    refused = rng.random() < 0.02
    lower = None if refused else float(sweep["iip3_lower"][0] + rng.normal(0, 0.1))
    upper = None if refused else float(sweep["iip3_upper"][0] + rng.normal(0, 0.1))
    iip3 = None if refused else (lower + upper) / 2
    verdict = None
    if random_verdicts:
        choice = int(rng.integers(len(VERDICTS) + 1))
        verdict = VERDICTS[choice] if choice < len(VERDICTS) else None
    return dict(
        run_id=run_id, group_key=result_group_key(center_hz, spacing_hz, bias_v),
        center_hz=center_hz, spacing_hz=spacing_hz, bias_v=bias_v, n_points=len(tones),
        n_valid=1 if refused else int(len(tones) * 0.6), gain_db=gain_db,
        iip3_lower_dbm=lower, iip3_upper_dbm=upper, iip3_dbm=iip3,
        oip3_lower_dbm=None if refused else lower + gain_db,
        oip3_upper_dbm=None if refused else upper + gain_db,
        oip3_dbm=None if refused else iip3 + gain_db,
        slope_fundamental=1.0, slope_im3_lower=None if refused else 3.0, slope_im3_upper=None if refused else 3.0,
        p1db_in_dbm=behaviour["p1db_dbm"], p1db_out_dbm=behaviour["p1db_dbm"] + gain_db - 1.0,
        iip3_bound_db=None, iip2_dbm=None, oip2_dbm=None, slope_im2=None, calibration_set_id=None,
        verdict=verdict, verdict_detail=None if verdict is None else "synthetic",
        reason="only 1 of the points meets the valid-region rules (synthetic)" if refused else None,
        valid_tone_min_dbm=None if refused else float(tones[0]),
        valid_tone_max_dbm=None if refused else float(tones[int(len(tones) * 0.6) - 1]),
        details_json={}, created_at=START,
    )


def _flag_row(rng, owner: dict, flag: str) -> dict:
    cause = str(rng.choice(ANALYZER_CAUSES)) if flag == "analyzer-limited" else None
    return dict(owner, flag=flag, cause=cause, detail=f"synthetic {flag}", error_db=round(float(rng.uniform(0.05, 1.0)), 3))

