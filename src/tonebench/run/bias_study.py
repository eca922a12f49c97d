"""The sweet-spot study of one FET (`tonebench bias search`): a DC transfer sweep and its
prediction, a two-tone run over the plan's coarse gate steps, a second run at fine steps around
the measured IIP3 peak (placed from the coarse points, not a fixed grid), then the measured sweet
spot, window and input offset beside the prediction, and the bias page.

Both two-tone runs are ordinary runs (stored, analysed, reported, resumable); the fine run's plan
is the coarse plan with its [bias] table replaced by the fine gate voltages.

With [sweep] temperatures_c the whole study is made at each temperature in turn (each plan has
that one temperature): the DC sweep soaks the chamber, the two-tone runs after it find it held
there and wait no second dwell (a chamber found out of tolerance is soaked again). The studies
share a series GUID, and the sweet spot's drift in mV/K comes from a weighted line through them.
"""

from __future__ import annotations

import math
import re
import tempfile
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from sqlalchemy import select

from tonebench.analysis.bias_drift import SweetSpotDrift, sweet_spot_drift
from tonebench.analysis.bias_search import (
    DrivePoints,
    SweetSpotFinding,
    drive_points,
    input_offset_db,
    measured_sweet_spot,
    null_estimate_v,
    predicted_sweet_spot,
    refined_gates_v,
)
from tonebench.analysis.degeneration import inductor_ohm
from tonebench.analysis.transconductance import TransconductanceResult
from tonebench.catalog.limits import apply_finding_verdicts
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan
from tonebench.errors import InputError
from tonebench.plan.limits import check_bias_voltages, check_plan_parts
from tonebench.plan.points import expand
from tonebench.report.bias_page import (
    BiasFinding,
    BiasPageData,
    DcSweep,
    MeasuredIip3,
    render_bias_page,
)
from tonebench.report.html import check_report_path, write_html_file
from tonebench.run.dc_transfer import DcTransfer, measure_dc_transfer
from tonebench.run.ending import RunOutcome
from tonebench.store.bias_store import add_study
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import BiasFinding as StoredFinding
from tonebench.store.models import Point, Run
from tonebench.units import KELVIN_AT_0C, format_freq

_TABLE_HEADER = re.compile(r"^\s*\[+\s*([A-Za-z0-9_.\-\" ]+?)\s*\]+\s*(#.*)?$")
_TEMPERATURES_LINE = re.compile(r"^\s*temperatures_c\s*=\s*([^#]*)")


@dataclass
class BiasStudy:
    """The study at one temperature (or with no chamber, temperature_c None)."""

    guid: str  # the stored study (store/models/bias.py)
    temperature_c: float | None  # chamber set point
    temp_k: float | None  # the chamber's reading after the soak
    transfer: DcTransfer
    derivatives: TransconductanceResult
    predicted: SweetSpotFinding | None
    runs: list[RunOutcome]  # coarse, then fine
    points: DrivePoints
    measured: SweetSpotFinding
    input_offset_db: float | None
    truth: list[str]  # what the simulator knows, on a simulated bench
    truth_zero_v: float | None = None  # the simulated FET's g3 zero at the DUT's temperature
    verdict: tuple[str, str] | None = None  # the measured finding's, against the part's spec limits


@dataclass
class BiasSeries:
    """Every temperature's study, and the sweet spot's drift (two temperatures or more)."""

    series_guid: str | None
    studies: list[BiasStudy]
    drift: SweetSpotDrift | None
    truth_drift_mv_per_k: float | None
    page_path: Path


def study_settings(plan: LoadedPlan, origin: str):
    bias = plan.settings.bias
    if bias is None or bias.dc is None or bias.search is None:
        raise InputError(f"{origin}: `tonebench bias search` needs [bias] with its [bias.dc] and [bias.search] tables")
    sweep = plan.settings.sweep
    if len(sweep.center_freqs_hz) != 1 or len(sweep.spacings_hz) != 1:
        raise InputError(f"{origin}: `tonebench bias search` measures at one centre frequency and one spacing; "
                         f"the plan gives {len(sweep.center_freqs_hz)} and {len(sweep.spacings_hz)} "
                         "(one study per frequency: one plan each)")
    if bias.search.drive_tone_dbm not in plan.settings.sweep.tone_levels():
        raise InputError(f"{origin}: [bias.search] drive_tone_dbm {bias.search.drive_tone_dbm:g} dBm is not one of the "
                         f"[sweep] tone levels ({', '.join(f'{v:g}' for v in plan.settings.sweep.tone_levels())})")
    return bias


def _without_tables(text: str, dropped: Callable[[str], bool]) -> list[str]:
    kept, dropping = [], False
    for line in text.splitlines():
        header = _TABLE_HEADER.match(line)
        if header:
            dropping = dropped(header.group(1).strip())
        if not dropping:
            kept.append(line)
    return kept


def fine_plan_text(text: str, gates_v: list[float], drain_v: float | None) -> str:
    """The plan with its [bias] table (and subtables) replaced by these gate voltages."""
    kept = _without_tables(text, lambda name: name == "bias" or name.startswith("bias."))
    table = ["", "[bias]", "gate_v = [" + ", ".join(repr(v) for v in gates_v) + "]"]
    if drain_v is not None:
        table.append(f"drain_v = {drain_v!r}")
    return "\n".join(kept + table) + "\n"


def at_temperature_text(text: str, temp_c: float, origin: str) -> str:
    """The plan with its [sweep] temperatures_c replaced by this one temperature. The line is
    replaced in place (the plan text is stored with each run); a plan whose temperatures_c spans
    several lines is refused rather than rewritten blindly."""
    lines, in_sweep, replaced = [], False, 0
    for line in text.splitlines():
        header = _TABLE_HEADER.match(line)
        if header:
            in_sweep = header.group(1).strip() == "sweep"
        if in_sweep and _TEMPERATURES_LINE.match(line):
            if not _TEMPERATURES_LINE.match(line).group(1).rstrip().endswith("]"):
                raise InputError(f"{origin}: write [sweep] temperatures_c on one line for `tonebench bias search`")
            line, replaced = f"temperatures_c = [{temp_c!r}]", replaced + 1
        lines.append(line)
    if replaced != 1:
        raise InputError(f"{origin}: [sweep] temperatures_c not found on a line of its own")
    return "\n".join(lines) + "\n"


def run_points(db_url: str, guid: str) -> list[Point]:
    engine = open_database(db_url)
    try:
        with session_factory(engine)() as session:
            return list(session.scalars(select(Point).join(Run).where(Run.guid == guid)))
    finally:
        engine.dispose()


def run_bias_study(plan_path: Path, bench_path: Path, db_url: str, page_path: Path,
                   execute: Callable[..., RunOutcome], say: Callable[[str], None] = print) -> BiasSeries:
    """The whole study, at each of the plan's temperatures in turn (or once without a chamber);
    `execute(plan, bench, db_url, on_sim_started, held_at_c=)` measures one plan (held_at_c: the
    temperature the chamber was just soaked at)."""
    check_report_path(page_path, "bias page path")
    plan, bench = load_plan(plan_path), load_bench(bench_path)
    origin = f"plan {plan_path}"
    bias = study_settings(plan, origin)
    # Everything refusable is refused before the first line is said and anything is switched on.
    check_plan_parts(expand(plan.settings), plan.settings, bench.settings, origin)
    check_bias_voltages(bench.settings.bias, bias.dc.gate_voltages_v(), bias.drain_v, f"{origin} [bias.dc]")
    temperatures_c = plan.settings.sweep.temperatures_c or [None]
    texts = {t: plan.text if t is None else at_temperature_text(plan.text, t, origin) for t in temperatures_c}
    series_guid = None if temperatures_c == [None] else str(uuid.uuid4())
    studies = []
    with tempfile.TemporaryDirectory() as folder:
        for temp_c in temperatures_c:
            if temp_c is None:
                at_path = plan_path
            else:
                say(f"at {temp_c:g} degC")
                at_path = Path(folder) / f"{plan_path.stem}-{temp_c:g}C.toml"
                at_path.write_text(texts[temp_c])
            studies.append(_study_at(plan, at_path, texts[temp_c], temp_c, series_guid, bench, bench_path, db_url,
                                     execute, say, origin))
    drift = None
    measured = [s for s in studies if s.temp_k is not None]
    if len(measured) >= 2:
        drift = sweet_spot_drift([s.temp_k - KELVIN_AT_0C for s in measured],
                                 [s.measured.sweet_spot_v for s in measured],
                                 [s.measured.sweet_spot_bound_v for s in measured])
    truth_drift = None
    truths = [s for s in measured if s.truth_zero_v is not None]
    if len(truths) >= 2:
        truth_drift = 1e3 * float(np.polyfit([s.temp_k for s in truths], [s.truth_zero_v for s in truths], 1)[0])
    series = BiasSeries(series_guid, studies, drift, truth_drift, page_path)
    write_html_file(page_path, render_bias_page(page_data(series, plan, bias)), "bias page path")
    return series


def _study_at(plan: LoadedPlan, plan_path: Path, plan_text: str, temp_c: float | None, series_guid: str | None,
              bench: LoadedBench, bench_path: Path, db_url: str, execute, say, origin: str) -> BiasStudy:
    """DC sweep, prediction, coarse and fine two-tone runs, and the study stored, at one temperature."""
    bias = plan.settings.bias
    search = bias.search
    sims = []
    say(f"DC transfer sweep: {bias.dc.gate_count()} gate voltages, {bias.dc.gate_start_v:g} to {bias.dc.gate_stop_v:g} V")
    transfer = measure_dc_transfer(bench, bias.dc, bias.drain_v, origin, on_sim_started=sims.append,
                                   temperature_c=temp_c)
    derivatives, predicted = predicted_sweet_spot(
        transfer.gate_v, transfer.drain_current_a, transfer.current_sigma_a, bias.dc.window_points, bias.dc.polyorder,
        search.window_threshold_dbm, search.window_below_peak_db)
    say("two-tone run over the coarse gate steps")
    coarse = execute(plan_path, bench_path, db_url, None, held_at_c=temp_c)
    points = drive_points(run_points(db_url, coarse.guid), search.drive_tone_dbm)
    limits = bench.settings.bias
    fine_gates = [v for v in refined_gates_v(points, search.fine_step_v, search.fine_points)
                  if limits.gate_min_v <= v <= limits.gate_max_v]
    runs, rows = [coarse], run_points(db_url, coarse.guid)
    if fine_gates:
        say(f"two-tone run at {len(fine_gates)} fine steps around {null_estimate_v(points):.4f} V (the null the coarse points put)")
        with tempfile.TemporaryDirectory() as folder:
            fine_path = Path(folder) / f"{plan_path.stem}-fine.toml"
            fine_path.write_text(fine_plan_text(plan_text, fine_gates, bias.drain_v))
            fine = execute(fine_path, bench_path, db_url, None, held_at_c=temp_c)
        runs.append(fine)
        rows += run_points(db_url, fine.guid)
    points = drive_points(rows, search.drive_tone_dbm)
    measured = measured_sweet_spot(points, search.window_threshold_dbm, search.window_below_peak_db,
                                   fit_points=search.fine_points + 2)
    offset_db = input_offset_db(points, derivatives)
    truth = simulated_truth(sims[0], measured.window_threshold_dbm) if sims else []
    temp_k = None if transfer.chamber_read_c is None else transfer.chamber_read_c + KELVIN_AT_0C
    engine, verdicts = open_database(db_url), []
    try:
        study_guid = add_study(
            session_factory(engine), part_number=plan.settings.device.part_number, serial=plan.settings.device.serial,
            bench_name=bench.settings.bench.name, transfer=transfer, window_points=bias.dc.window_points,
            polyorder=bias.dc.polyorder, step_v=bias.dc.gate_step_v, run_guids=[run.guid for run in runs],
            findings=[predicted, measured], input_offset_db=offset_db, temp_k=temp_k, temperature_c=temp_c,
            center_hz=plan.settings.sweep.center_freqs_hz[0], series_guid=series_guid,
            judge=lambda session, study_id: verdicts.extend(_judged(session, study_id)))
    finally:
        engine.dispose()
    truth_zero_v = None
    if sims and sims[0].bench.fet_bias is not None:
        fet_bias = sims[0].bench.fet_bias
        truth_zero_v = fet_bias.fet.g3_zero_v(fet_bias.temp_k)
    return BiasStudy(study_guid, temp_c, temp_k, transfer, derivatives, predicted, runs, points, measured, offset_db,
                     truth, truth_zero_v, verdicts[0] if verdicts else None)


def _judged(session, study_id: int) -> list[tuple[str, str]]:
    """The measured finding's (verdict, detail) against the part's spec limits, stored."""
    apply_finding_verdicts(session, study_id)
    return [(found.verdict, found.verdict_detail) for found in session.scalars(
        select(StoredFinding).where(StoredFinding.study_id == study_id, StoredFinding.kind == "two-tone"))]


def simulated_truth(sim, threshold_dbm: float | None) -> list[str]:
    """The simulated FET's own sweet spot and small-signal window (at the DUT input plane)."""
    fet_bias = sim.bench.fet_bias
    if fet_bias is None:
        return []
    temp_k, fet = fet_bias.temp_k, fet_bias.fet
    match_db = 20 * math.log10(fet_bias.scenario.input_voltage_gain)
    line = f"simulated truth: g3 zero {fet.g3_zero_v(temp_k):.4f} V at {temp_k:g} K, input match {match_db:+.2f} dB"
    if threshold_dbm is not None:
        low_v, high_v = fet.iip3_window_v(threshold_dbm + match_db, temp_k)
        line += f"; small-signal window above {threshold_dbm:+.1f} dBm {low_v:.4f} to {high_v:.4f} V"
    return [line]


def _finding(found: SweetSpotFinding | None, offset_db: float | None, temp_k: float | None) -> list[BiasFinding]:
    if found is None:
        return []
    return [BiasFinding(kind=found.kind, temperature_k=temp_k, drive_tone_dbm=found.drive_tone_dbm, sweet_spot_v=found.sweet_spot_v,
                        sweet_spot_bound_v=found.sweet_spot_bound_v, peak_iip3_dbm=found.peak_iip3_dbm,
                        window_threshold_dbm=found.window_threshold_dbm, window_low_v=found.window_low_v,
                        window_low_bound_v=found.window_bound_v, window_high_v=found.window_high_v,
                        window_high_bound_v=found.window_bound_v, drain_current_a=found.drain_current_a,
                        gain_db=found.gain_db, input_gain_offset_db=offset_db if found.kind == "two-tone" else None)]


def page_data(series: BiasSeries, plan: LoadedPlan, bias) -> BiasPageData:
    device = plan.settings.device
    center_hz = plan.settings.sweep.center_freqs_hz[0]
    studies = series.studies
    first = studies[0]
    summary = {
        "device": f"{device.part_number} {device.serial}" + (f" (lot {device.lot})" if device.lot else ""),
        "studies": ", ".join(s.guid[:8] for s in studies),
        "runs": ", ".join(run.guid[:8] for s in studies for run in s.runs),
        "drain": f"{first.transfer.drain_v:g} V",
        "DC sweep": f"{first.transfer.gate_v.size} points, {bias.dc.gate_step_v * 1e3:g} mV step, "
                    f"current noise {first.transfer.current_sigma_a * 1e9:.0f} nA (measured)",
        "prediction": "no g3 zero in the sweep" if first.predicted is None else first.predicted.method,
        "measurement": first.measured.method,
    }
    if series.drift is not None:
        summary["drift with temperature"] = (f"{series.drift.mv_per_k:+.3f} ± {series.drift.bound_mv_per_k:.3f} mV/K "
                                             f"({series.drift.method})")
    for s in studies:
        if s.verdict is not None and s.verdict[0] != "no-limit":
            at = "" if s.temperature_c is None else f" at {s.temperature_c:g} degC"
            summary[f"spec limits{at}"] = f"{s.verdict[0]}: {s.verdict[1]}"
    truth = [line for s in studies for line in s.truth]
    if series.truth_drift_mv_per_k is not None:
        truth.append(f"simulated truth: drift {series.truth_drift_mv_per_k:+.3f} mV/K")
    summary.update({f"truth {i + 1}" if i else "simulated truth": line.removeprefix("simulated truth: ")
                    for i, line in enumerate(truth)})
    return BiasPageData(
        title=f"Linearity sweet spot: {device.part_number} {device.serial}",
        summary=summary,
        dc_sweeps=[DcSweep(s.temp_k, s.transfer.gate_v, s.transfer.drain_current_a, s.transfer.current_sigma_a,
                           bias.dc.window_points, bias.dc.polyorder) for s in studies],
        measured=[MeasuredIip3(s.temp_k, s.points.drive_tone_dbm, s.points.gate_v, s.points.iip3_dbm,
                               s.points.at_floor) for s in studies],
        findings=[f for s in studies for f in _finding(s.predicted, None, s.temp_k)
                  + _finding(s.measured, s.input_offset_db, s.temp_k)],
        what_if_ohm=(("5 ohm", 5.0), ("10 ohm", 10.0),
                     (f"1 nH at {format_freq(center_hz)}", inductor_ohm(1e-9, center_hz))),
    )
