"""The HTML report of one stored run, built from its stored results (report/stored_sweeps.py)."""

from __future__ import annotations

import dataclasses
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.analysis.conventions import reported_intercepts
from tonebench.analysis.sweep_fit import exclusion_reasons
from tonebench.calibration.sets import load_set_by_id
from tonebench.report.level_table import (
    CONVENTION_WORDS,
    convention_text,
    level_section,
)
from tonebench.report.run_archive import archive_html
from tonebench.report.run_report import SweepPlotData, sweep_title, write_report
from tonebench.report.run_report import result_row as report_result_row
from tonebench.report.run_summary import SweepSummary
from tonebench.report.spacing_table import spacing_section
from tonebench.report.stored_sweeps import report_sweeps
from tonebench.results.levels import run_choice
from tonebench.store.lookups import find_run
from tonebench.units import format_freq


def sweep_plot(group: dict, arrays: dict, assessment) -> SweepPlotData:
    """What one sweep's figure shows, from its group axis values, arrays and assessment."""
    fit = assessment.fit
    return SweepPlotData(
        title=sweep_title(group["center_hz"], group["spacing_hz"], group["bias_v"], group["temperature_c"],
                          group["lo_dbm"]),
        pin_dbm=(arrays["pin1_dbm"] + arrays["pin2_dbm"]) / 2.0,
        pout_dbm=(arrays["pout_f1_dbm"] + arrays["pout_f2_dbm"]) / 2.0,
        im3_lower_dbm=arrays["im3_lower_dbm"],
        im3_upper_dbm=arrays["im3_upper_dbm"],
        noise_dbm=(arrays["noise_lower_dbm"] + arrays["noise_upper_dbm"]) / 2.0,
        valid_mask=fit.valid_mask,
        result=fit,
        assessment=assessment,
        exclusions=exclusion_reasons(arrays, fit.valid_mask),
    )


def write_run_report(sessions: sessionmaker, run_guid: str, path: Path) -> Path:
    """Write the run's self-contained HTML report: its stored points and stored results."""
    with sessions() as session:
        run = find_run(session, run_guid)
        # The report shows what the stored results were fitted from: re-referred if they were.
        result_sets = {r.calibration_set_id for r in run.results}
        tables = None
        referred_to = None
        if len(result_sets) == 1 and None not in result_sets and result_sets != {run.calibration_set_id}:
            referred_to = load_set_by_id(session, result_sets.pop())
            tables = referred_to.tables
        sweeps, rows = [], []
        set_id = referred_to.id if referred_to is not None else run.calibration_set_id
        summaries, bounds = [], []
        convention, _ = run_choice(run)
        for group, arrays, assessment in report_sweeps(session, run, set_id, tables):
            # The sweep is assessed again here: its reported pair follows the run's convention,
            # as the stored result's does (results/stored_results.py).
            fit = assessment.fit
            iip3_dbm, oip3_dbm = reported_intercepts(fit.iip3_lower_dbm, fit.iip3_upper_dbm, fit.oip3_lower_dbm,
                                                     fit.oip3_upper_dbm, convention)
            fit = dataclasses.replace(fit, iip3_dbm=iip3_dbm, oip3_dbm=oip3_dbm)
            center_hz, spacing_hz, bias_v = group["center_hz"], group["spacing_hz"], group["bias_v"]
            temperature_c, lo_dbm = group["temperature_c"], group["lo_dbm"]
            summaries.append(SweepSummary(center_hz, spacing_hz, bias_v, fit.iip3_lower_dbm, fit.iip3_upper_dbm,
                                          fit.iip3_dbm, fit.oip3_lower_dbm, fit.oip3_upper_dbm, fit.oip3_dbm,
                                          assessment.iip3_bound_db, temperature_c, lo_dbm,
                                          CONVENTION_WORDS[convention]))
            plot = sweep_plot(group, arrays, assessment)
            bounds.append((plot.title, assessment.iip3_bound_db, assessment.bound_terms_db))
            sweeps.append(plot)
            row = report_result_row(center_hz, spacing_hz, fit, assessment)
            if bias_v is not None:
                row = {"bias (V)": f"{bias_v:.4f}", **row}
            if lo_dbm is not None:
                row = {"LO (dBm)": f"{lo_dbm:+.2f}", **row}
            if temperature_c is not None:
                row = {"temperature (degC)": f"{temperature_c:.1f}", **row}
            rows.append(row)
        device = run.device
        summary = [
            {"label": "Run", "value": run.guid},
            {"label": "Device", "value": f"{device.part_number} serial {device.serial}" + (f", lot {device.lot}" if device.lot else "")},
            {"label": "Bench", "value": run.bench.name + (" (simulated)" if run.simulated else "")},
            {"label": "Started (UTC)", "value": run.started_at.strftime("%Y-%m-%d %H:%M:%S")},
            {"label": "Status", "value": run.status + (f": {run.end_reason}" if run.end_reason else "")},
            {"label": "IIP3 and OIP3 reported", "value": convention_text(list(run.results))},
        ]
        mixer = (run.metadata_json or {}).get("mixer")
        if mixer:
            summary.append({"label": "Frequency plan", "value": frequency_plan_text(mixer)})
        if run.calibration_set is not None:
            summary.append({"label": "Calibration", "value": f"{run.calibration_set.name} ({run.calibration_set.method})"})
        if referred_to is not None:
            summary.append({"label": "Re-referred to", "value": f"{referred_to.name} ({referred_to.method})"})
        return write_report(path, f"Two-tone intercepts, {run.plan.name}", summary, sweeps, rows, summaries,
                            spacing_section(summaries) + level_section(session, run)
                            + archive_html(run, bounds))


def frequency_plan_text(mixer: dict) -> str:
    """A mixer run's frequency plan as stored in its metadata (config/mixer_settings.py), in words."""
    lo = f"LO {format_freq(mixer['lo_hz'])}" if mixer.get("lo_hz") else f"LO for an IF of {format_freq(mixer['if_hz'])}"
    output = "IF = |f - f_LO|" if mixer.get("output", "difference") == "difference" else "IF = f + f_LO"
    if mixer.get("lo_levels_dbm"):
        power = "LO power stepped over " + ", ".join(f"{level:+.1f}" for level in mixer["lo_levels_dbm"]) + " dBm"
    else:
        power = f"at {mixer['lo_dbm']:.1f} dBm"
    return (f"{lo} {power}, {mixer.get('injection', 'low')}-side injection, {output}; "
            "IIP3 referred to the RF input, OIP3 to the IF output, gain is conversion gain")
