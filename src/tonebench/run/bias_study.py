"""The sweet-spot study of one FET (`tonebench bias search`): a DC transfer sweep and its
prediction, a two-tone run over the plan's coarse gate steps, a second run at fine steps around
the measured IIP3 peak (placed from the coarse points, not a fixed grid), then the measured sweet
spot, window and input offset beside the prediction, and the bias page.

Both two-tone runs are ordinary runs (stored, analysed, reported, resumable); the fine run's plan
is the coarse plan with its [bias] table replaced by the fine gate voltages.
"""

from __future__ import annotations

import math
import re
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import select

from tonebench.analysis.bias_search import (
    DrivePoints,
    SweetSpotFinding,
    drive_points,
    input_offset_db,
    measured_sweet_spot,
    predicted_sweet_spot,
    refined_gates_v,
)
from tonebench.analysis.transconductance import TransconductanceResult
from tonebench.config.bench_file import load_bench
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
from tonebench.store.models import Point, Run

_TABLE_HEADER = re.compile(r"^\s*\[+\s*([A-Za-z0-9_.\-\" ]+?)\s*\]+\s*(#.*)?$")


@dataclass
class BiasStudy:
    guid: str  # the stored study (store/models/bias.py)
    transfer: DcTransfer
    derivatives: TransconductanceResult
    predicted: SweetSpotFinding | None
    runs: list[RunOutcome]  # coarse, then fine
    points: DrivePoints
    measured: SweetSpotFinding
    input_offset_db: float | None
    page_path: Path
    truth: list[str]  # what the simulator knows, on a simulated bench


def study_settings(plan: LoadedPlan, origin: str):
    bias = plan.settings.bias
    if bias is None or bias.dc is None or bias.search is None:
        raise InputError(f"{origin}: `tonebench bias search` needs [bias] with its [bias.dc] and [bias.search] tables")
    if bias.search.drive_tone_dbm not in plan.settings.sweep.tone_levels_dbm():
        raise InputError(f"{origin}: [bias.search] drive_tone_dbm {bias.search.drive_tone_dbm:g} dBm is not one of the "
                         f"[sweep] tone levels ({', '.join(f'{v:g}' for v in plan.settings.sweep.tone_levels_dbm())})")
    return bias


def fine_plan_text(text: str, gates_v: list[float], drain_v: float | None) -> str:
    """The plan with its [bias] table (and subtables) replaced by these gate voltages."""
    kept, in_bias = [], False
    for line in text.splitlines():
        header = _TABLE_HEADER.match(line)
        if header:
            name = header.group(1).strip()
            in_bias = name == "bias" or name.startswith("bias.")
        if not in_bias:
            kept.append(line)
    table = ["", "[bias]", "gate_v = [" + ", ".join(repr(v) for v in gates_v) + "]"]
    if drain_v is not None:
        table.append(f"drain_v = {drain_v!r}")
    return "\n".join(kept + table) + "\n"


def run_points(db_url: str, guid: str) -> list[Point]:
    engine = open_database(db_url)
    try:
        with session_factory(engine)() as session:
            return list(session.scalars(select(Point).join(Run).where(Run.guid == guid)))
    finally:
        engine.dispose()


def run_bias_study(plan_path: Path, bench_path: Path, db_url: str, page_path: Path,
                   execute: Callable[..., RunOutcome], say: Callable[[str], None] = print) -> BiasStudy:
    """The whole study; `execute(plan, bench, db_url, on_sim_started)` measures one plan."""
    check_report_path(page_path, "bias page path")
    plan, bench = load_plan(plan_path), load_bench(bench_path)
    origin = f"plan {plan_path}"
    bias = study_settings(plan, origin)
    search = bias.search
    # Everything refusable is refused before the first line is said and anything is switched on.
    check_plan_parts(expand(plan.settings), plan.settings, bench.settings, origin)
    check_bias_voltages(bench.settings.bias, bias.dc.gate_voltages_v(), bias.drain_v, f"{origin} [bias.dc]")
    sims = []
    say(f"DC transfer sweep: {bias.dc.gate_count()} gate voltages, {bias.dc.gate_start_v:g} to {bias.dc.gate_stop_v:g} V")
    transfer = measure_dc_transfer(bench, bias.dc, bias.drain_v, origin, on_sim_started=sims.append)
    derivatives, predicted = predicted_sweet_spot(
        transfer.gate_v, transfer.drain_current_a, transfer.current_sigma_a, bias.dc.window_points, bias.dc.polyorder,
        search.window_threshold_dbm, search.window_below_peak_db)
    say("two-tone run over the coarse gate steps")
    coarse = execute(plan_path, bench_path, db_url, None)
    points = drive_points(run_points(db_url, coarse.guid), search.drive_tone_dbm)
    limits = bench.settings.bias
    fine_gates = [v for v in refined_gates_v(points, search.fine_step_v, search.fine_points)
                  if limits.gate_min_v <= v <= limits.gate_max_v]
    runs, rows = [coarse], run_points(db_url, coarse.guid)
    if fine_gates:
        say(f"two-tone run at {len(fine_gates)} fine steps around {points.gate_v[points.ratio_db.argmin()]:.4f} V")
        with tempfile.TemporaryDirectory() as folder:
            fine_path = Path(folder) / f"{plan_path.stem}-fine.toml"
            fine_path.write_text(fine_plan_text(plan.text, fine_gates, bias.drain_v))
            fine = execute(fine_path, bench_path, db_url, None)
        runs.append(fine)
        rows += run_points(db_url, fine.guid)
    points = drive_points(rows, search.drive_tone_dbm)
    measured = measured_sweet_spot(points, search.window_threshold_dbm, search.window_below_peak_db,
                                   fit_points=search.fine_points + 2)
    offset_db = input_offset_db(points, derivatives)
    truth = simulated_truth(sims[0], measured.window_threshold_dbm) if sims else []
    engine = open_database(db_url)
    try:
        study_guid = add_study(
            session_factory(engine), part_number=plan.settings.device.part_number, serial=plan.settings.device.serial,
            bench_name=bench.settings.bench.name, transfer=transfer, window_points=bias.dc.window_points,
            polyorder=bias.dc.polyorder, step_v=bias.dc.gate_step_v, run_guids=[run.guid for run in runs],
            findings=[predicted, measured], input_offset_db=offset_db)
    finally:
        engine.dispose()
    study = BiasStudy(study_guid, transfer, derivatives, predicted, runs, points, measured, offset_db, page_path, truth)
    write_html_file(page_path, render_bias_page(page_data(study, plan, bias)), "bias page path")
    return study


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


def _finding(found: SweetSpotFinding | None, offset_db: float | None) -> list[BiasFinding]:
    if found is None:
        return []
    return [BiasFinding(kind=found.kind, drive_tone_dbm=found.drive_tone_dbm, sweet_spot_v=found.sweet_spot_v,
                        sweet_spot_bound_v=found.sweet_spot_bound_v, peak_iip3_dbm=found.peak_iip3_dbm,
                        window_threshold_dbm=found.window_threshold_dbm, window_low_v=found.window_low_v,
                        window_low_bound_v=found.window_bound_v, window_high_v=found.window_high_v,
                        window_high_bound_v=found.window_bound_v, drain_current_a=found.drain_current_a,
                        gain_db=found.gain_db, input_gain_offset_db=offset_db if found.kind == "two-tone" else None)]


def page_data(study: BiasStudy, plan: LoadedPlan, bias) -> BiasPageData:
    device = plan.settings.device
    transfer = study.transfer
    summary = {
        "device": f"{device.part_number} {device.serial}" + (f" (lot {device.lot})" if device.lot else ""),
        "study": study.guid,
        "runs": ", ".join(run.guid[:8] for run in study.runs),
        "drain": f"{transfer.drain_v:g} V",
        "DC sweep": f"{transfer.gate_v.size} points, {bias.dc.gate_step_v * 1e3:g} mV step, "
                    f"current noise {transfer.current_sigma_a * 1e9:.0f} nA (measured)",
        "prediction": "no g3 zero in the sweep" if study.predicted is None else study.predicted.method,
        "measurement": study.measured.method,
    }
    summary.update({f"truth {i + 1}" if i else "simulated truth": line.removeprefix("simulated truth: ")
                    for i, line in enumerate(study.truth)})
    points = study.points
    return BiasPageData(
        title=f"Linearity sweet spot: {device.part_number} {device.serial}",
        summary=summary,
        dc_sweeps=[DcSweep(None, transfer.gate_v, transfer.drain_current_a, transfer.current_sigma_a,
                           bias.dc.window_points, bias.dc.polyorder)],
        measured=[MeasuredIip3(None, points.drive_tone_dbm, points.gate_v, points.iip3_dbm,
                               points.at_floor)],
        findings=_finding(study.predicted, None) + _finding(study.measured, study.input_offset_db),
        what_if_ohm=(("5 ohm", 5.0), ("10 ohm", 10.0)),
    )
