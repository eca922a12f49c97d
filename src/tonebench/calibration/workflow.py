"""One calibration job from files to a stored set: check everything, measure or import, store whole.

Bad input is refused (InputError) before anything is stored; a set is written in one transaction
at the end, so a failure half way leaves nothing behind. On a simulated bench the thru is put in
place through Python (the operator's job on a real bench, confirmed with thru_in_place).
"""

from __future__ import annotations

import dataclasses
import getpass
from collections.abc import Callable
from pathlib import Path

import numpy as np

from tonebench.calibration import importers, measure, residual
from tonebench.calibration.bench_session import calibration_bench, provenance
from tonebench.calibration.sets import (
    DEFAULT_VALID_DAYS,
    CalibrationView,
    add_paths,
    check_name,
    check_valid_days,
    create_set,
    find_set,
    load_set,
    replace_residuals,
    table_from_arrays,
)
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan
from tonebench.errors import InputError
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.instruments.open_bench import OpenBench, bench_freq_ranges
from tonebench.plan.limits import (
    TWO_EQUAL_TONES_DB,
    FreqNeed,
    analyzer_limit_dbm,
    check_frequency_needs,
    read_need,
)
from tonebench.plan.points import expand
from tonebench.planes.referral import check_coverage
from tonebench.store.bench_lock import check_free as check_bench_free
from tonebench.store.database import open_database, session_factory
from tonebench.units import format_freq

ProgressCallback = Callable[[int, int], None]  # (readings done, readings in all)

RESIDUAL_LEVELS_BELOW_TOP_DB = (15.0, 10.0, 5.0, 0.0)  # default thru sweep, per tone, under the top level
MARGIN_DB = 1.0


def default_operator() -> str | None:
    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001 - no user name is not worth failing a calibration for
        return None


def _sessions(db_url: str):
    return session_factory(open_database(db_url))


def _require_new_name(sessions, name: str) -> None:
    check_name(name)
    with sessions() as session:
        if find_set(session, name) is not None:
            raise InputError(f"calibration set '{name}' already exists; choose another name (sets are never overwritten)")


def _load(sessions, name: str) -> CalibrationView:
    with sessions() as session:
        return load_set(session, name)


def _analyzer_limit_dbm(bench: LoadedBench, opened: OpenBench) -> float:
    return analyzer_limit_dbm(bench.settings.limits, opened.analyzer.limits.get("damage_dbm"))


def _check_level(bench: LoadedBench, level_dbm: float, gain_db: float, analyzer_limit_dbm: float, what: str) -> None:
    """The source setting is an upper bound on the power at the DUT input plane (paths are lossy).

    One source is on at a time here, so one tone reaches the analyzer: not the two-tone figure of
    plan/limits.py predicted_analyzer_input_dbm, and the output loss is taken as 0 dB (the out path
    may not be measured yet), which can only overstate the analyzer input."""
    limits = bench.settings.limits
    if level_dbm > limits.max_tone_dbm:
        raise InputError(f"{what}: level {level_dbm:.2f} dBm is above the bench limit max_tone_dbm {limits.max_tone_dbm:.2f} dBm")
    if level_dbm + gain_db > analyzer_limit_dbm:
        raise InputError(
            f"{what}: level {level_dbm:.2f} dBm could put {level_dbm + gain_db:.2f} dBm into the analyzer; "
            f"its limit is {analyzer_limit_dbm:.2f} dBm (lower --level-dbm)"
        )


def _default_level(bench: LoadedBench, gain_db: float, analyzer_limit_dbm: float) -> float:
    return min(bench.settings.limits.max_tone_dbm, 0.0, analyzer_limit_dbm - gain_db - MARGIN_DB)


def _plan_and_grid(plan_path: Path, step_hz: float | None) -> tuple[LoadedPlan, np.ndarray]:
    plan = load_plan(plan_path)
    pairs = sorted({(p.f1_hz, p.f2_hz) for p in expand(plan.settings)})
    return plan, measure.calibration_freqs_hz(pairs, step_hz)


def _check_grid(bench: LoadedBench, roles: tuple[str, ...], freqs_hz: np.ndarray, span_hz: float | None,
                origin: str) -> None:
    """Before anything is connected: each role in `roles` must cover the whole grid (the analyzer
    each read's span around every grid frequency), from the dialect files' ranges."""
    low_hz, high_hz = float(freqs_hz[0]), float(freqs_hz[-1])
    needs = []
    for role in roles:
        if role == "analyzer":
            needs += [read_need(f"reading {f:.12g} Hz over a {span_hz:.12g} Hz span", f, span_hz) for f in (low_hz, high_hz)]
        else:
            needs.append(FreqNeed(role, f"stepping {role} over the calibration frequencies", low_hz, high_hz))
    check_frequency_needs(needs, bench_freq_ranges(bench.settings), origin)


def _setup(plan: LoadedPlan) -> AnalyzerSetup:
    a = plan.settings.analyzer
    return AnalyzerSetup(a.effective_span_hz, a.rbw_hz, a.effective_vbw_hz, a.atten_db, a.ref_level_dbm)


# --- measured ---------------------------------------------------------------------------------


def measure_input(db_url: str, name: str, bench_path: Path, plan_path: Path, *, level_dbm: float | None = None,
                  step_hz: float | None = None, valid_days: float = DEFAULT_VALID_DAYS, operator: str | None = None,
                  on_sim_started=None, on_progress: ProgressCallback | None = None) -> CalibrationView:
    """A new set with in1 and in2 measured by the power meter over every frequency of the plan;
    on_progress(done, total) after each reading."""
    bench = load_bench(bench_path)
    if not bench.settings.has_power_meter:
        raise InputError(f"bench file {bench_path}: no [instruments.power_meter]; the input paths are measured with one")
    plan, freqs_hz = _plan_and_grid(plan_path, step_hz)
    check_valid_days(valid_days)
    _check_grid(bench, ("source1", "source2", "power_meter"), freqs_hz, None, f"input calibration {name}: plan {plan_path}")
    sessions = _sessions(db_url)
    check_bench_free(sessions, bench.settings.bench.name)  # never talk to instruments a run drives
    _require_new_name(sessions, name)
    with calibration_bench(bench, thru=False, thru_in_place=False, on_sim_started=on_sim_started) as opened:
        meter = opened.power_meter
        if freqs_hz[0] < meter.min_freq_hz or freqs_hz[-1] > meter.max_freq_hz:
            raise InputError(
                f"plan {plan_path}: needs {format_freq(freqs_hz[0])} to {format_freq(freqs_hz[-1])}; the power meter covers "
                f"{format_freq(meter.min_freq_hz)} to {format_freq(meter.max_freq_hz)}"
            )
        # The DUT may still be connected: its output must stay within the analyzer's limit.
        gain_db = max(bench.settings.limits.expected_gain_db, 0.0)
        analyzer_limit_dbm = _analyzer_limit_dbm(bench, opened)
        level = _default_level(bench, gain_db, analyzer_limit_dbm) if level_dbm is None else level_dbm
        _check_level(bench, level, gain_db, analyzer_limit_dbm, f"input calibration {name}")
        paths = measure.measure_input_paths(opened, freqs_hz, level, _steps(on_progress, 2 * len(freqs_hz)))
        instruments = provenance(opened, ("source1", "source2", "power_meter"), "input paths")
    origin = f"calibration set {name}"
    tables = {
        "in1": table_from_arrays("in1", paths.freqs_hz, paths.in1_loss_db, origin),
        "in2": table_from_arrays("in2", paths.freqs_hz, paths.in2_loss_db, origin),
    }
    for path, table in tables.items():
        importers.check_losses(f"measured {path}", table.freqs_hz, table.losses_db)
    with sessions.begin() as session:
        create_set(
            session, name=name, method="measured", tables=tables, valid_days=valid_days, operator=operator,
            instruments=instruments, source_files=[{"plan": str(plan_path), "sha256": plan.sha256}],
            notes=f"in1, in2 with the power meter at {len(freqs_hz)} frequencies, sources at {level:.2f} dBm",
        )
    return _load(sessions, name)


def measure_output(db_url: str, name: str, bench_path: Path, plan_path: Path, *, level_dbm: float | None = None,
                   step_hz: float | None = None, thru_in_place: bool = False, on_sim_started=None,
                   on_progress: ProgressCallback | None = None) -> CalibrationView:
    """Add 'out' to a set whose input paths are known: a thru in place, read on the analyzer."""
    bench = load_bench(bench_path)
    plan, freqs_hz = _plan_and_grid(plan_path, step_hz)
    _check_grid(bench, ("source1", "analyzer"), freqs_hz, _setup(plan).span_hz, f"output calibration {name}: plan {plan_path}")
    sessions = _sessions(db_url)
    check_bench_free(sessions, bench.settings.bench.name)  # never talk to instruments a run drives
    view = _load(sessions, name)
    if "in1" not in view.tables:
        raise InputError(f"{view.label} has no 'in1' path; measure or import the input paths first")
    if "out" in view.tables:
        raise InputError(f"{view.label} already has an 'out' path; measure into a new set")
    in1 = view.tables["in1"]
    if freqs_hz[0] < in1.freqs_hz[0] - 1.0 or freqs_hz[-1] > in1.freqs_hz[-1] + 1.0:
        raise InputError(
            f"plan {plan_path}: needs {format_freq(freqs_hz[0])} to {format_freq(freqs_hz[-1])}; {view.label} has in1 over "
            f"{format_freq(in1.freqs_hz[0])} to {format_freq(in1.freqs_hz[-1])}"
        )
    with calibration_bench(bench, thru=True, thru_in_place=thru_in_place, on_sim_started=on_sim_started) as opened:
        analyzer_limit_dbm = _analyzer_limit_dbm(bench, opened)
        level = _default_level(bench, 0.0, analyzer_limit_dbm) if level_dbm is None else level_dbm
        _check_level(bench, level, 0.0, analyzer_limit_dbm, f"output calibration {name}")
        losses_db = measure.measure_output_path(opened, in1, freqs_hz, level, _setup(plan),
                                                plan.settings.analyzer.noise_offset_hz,
                                                _steps(on_progress, len(freqs_hz)))
        instruments = provenance(opened, ("analyzer",), "output path")
    table = table_from_arrays("out", freqs_hz, losses_db, view.label)
    importers.check_losses("measured out (is the thru in place?)", table.freqs_hz, table.losses_db)
    with sessions.begin() as session:
        add_paths(session, name, {"out": table}, instruments,
                  f"out through a thru at {len(freqs_hz)} frequencies, source 1 at {level:.2f} dBm, "
                  f"analyzer attenuation {plan.settings.analyzer.atten_db:g} dB")
    return _load(sessions, name)


def residual_levels_dbm(bench: LoadedBench, opened: OpenBench, atten_db: float,
                        start_dbm: float | None, stop_dbm: float | None, step_db: float | None) -> list[float]:
    """Per-tone levels at the DUT input plane for the thru sweep: by default four levels up to the
    highest one the bench limits and the analyzer's mixer allow."""
    limits = bench.settings.limits
    analyzer_limit_dbm = _analyzer_limit_dbm(bench, opened)
    top_dbm = min(limits.max_tone_dbm, analyzer_limit_dbm - TWO_EQUAL_TONES_DB - MARGIN_DB)
    max_mixer_dbm = opened.analyzer.limits.get("max_mixer_dbm")
    if max_mixer_dbm is not None:
        # Through a thru both tones reach the mixer less the attenuation (output loss ignored: a margin).
        top_dbm = min(top_dbm, max_mixer_dbm + atten_db - TWO_EQUAL_TONES_DB - MARGIN_DB)
    if start_dbm is None and stop_dbm is None and step_db is None:
        return [round(top_dbm - below, 2) for below in RESIDUAL_LEVELS_BELOW_TOP_DB]
    stop = top_dbm if stop_dbm is None else stop_dbm
    start = stop - 15.0 if start_dbm is None else start_dbm
    step = 5.0 if step_db is None else step_db
    if step <= 0 or start > stop:
        raise InputError(f"residual sweep {start:g}..{stop:g} dBm in {step:g} dB steps: need start <= stop and a step > 0")
    if stop > top_dbm + 1e-9:
        raise InputError(
            f"residual sweep up to {stop:.2f} dBm per tone: above {top_dbm:.2f} dBm, the most the bench limits and the "
            "analyzer's mixer allow through a thru"
        )
    count = int(np.floor((stop - start) / step + 1e-9)) + 1
    return [round(start + i * step, 6) for i in range(count)]


def measure_residual(db_url: str, name: str, bench_path: Path, plan_path: Path, *, start_dbm: float | None = None,
                     stop_dbm: float | None = None, step_db: float | None = None, rbw_hz: float | None = None,
                     thru_in_place: bool = False, on_sim_started=None,
                     on_progress: ProgressCallback | None = None) -> CalibrationView:
    """System residual per (center, spacing) of the plan, stored with the set (replacing older ones).

    rbw_hz replaces the plan's RBW (span 10 RBW): the residual usually sits far lower than the
    DUT's products, and a narrower RBW lowers the noise floor at the stepped attenuation.
    """
    bench = load_bench(bench_path)
    plan = load_plan(plan_path)
    points = expand(plan.settings)
    sessions = _sessions(db_url)
    check_bench_free(sessions, bench.settings.bench.name)  # never talk to instruments a run drives
    view = _load(sessions, name)
    check_coverage(view.tables, sorted({(p.f1_hz, p.f2_hz) for p in points}), f"plan {plan_path}: {view.label}")
    setup = _setup(plan)
    noise_offset_hz = plan.settings.analyzer.noise_offset_hz
    if rbw_hz is not None:
        if not 0 < 10.0 * rbw_hz < min(plan.settings.sweep.spacings_hz):
            raise InputError(
                f"RBW {format_freq(rbw_hz)}: the span (10 RBW) must be narrower than the tone spacing "
                f"{format_freq(min(plan.settings.sweep.spacings_hz))}"
            )
        setup = dataclasses.replace(setup, rbw_hz=rbw_hz, vbw_hz=rbw_hz, span_hz=10.0 * rbw_hz)
        noise_offset_hz = 0.4 * setup.span_hz
    groups = sorted({(p.center_hz, p.spacing_hz) for p in points})
    _check_residual_freqs(bench, groups, setup.span_hz, f"system residual {name}: plan {plan_path}")
    rows = []
    with calibration_bench(bench, thru=True, thru_in_place=thru_in_place, on_sim_started=on_sim_started) as opened:
        base_db = setup.atten_db
        step_atten_db = measure.stepped_atten_db(base_db, opened.analyzer.limits["max_atten_db"])
        levels = residual_levels_dbm(bench, opened, min(base_db, step_atten_db), start_dbm, stop_dbm, step_db)
        step = _steps(on_progress, len(groups) * 2 * len(levels))
        for center_hz, spacing_hz in groups:
            base, stepped = measure.measure_residual_sweeps(
                opened, view.tables, center_hz, spacing_hz, levels, setup, noise_offset_hz, (base_db, step_atten_db),
                step)
            rows.append(_residual_row(center_hz, spacing_hz, levels, base, stepped, setup))
        instruments = provenance(opened, ("source1", "source2", "analyzer"), "system residual")
    with sessions.begin() as session:
        replace_residuals(session, name, rows)
        add_paths(session, name, {}, instruments, f"system residual at {len(groups)} (center, spacing) pairs")
    return _load(sessions, name)


def _steps(on_progress: ProgressCallback | None, total: int) -> Callable[[], None]:
    """A step counter that reports (done, total) after each reading."""
    done = 0

    def step() -> None:
        nonlocal done
        done += 1
        if on_progress is not None:
            on_progress(done, total)

    return step


def _check_residual_freqs(bench: LoadedBench, groups, span_hz: float, origin: str) -> None:
    """Before anything is connected: both tones at the sources, both IM3 reads at the analyzer."""
    needs = []
    for center_hz, spacing_hz in groups:
        f1_hz, f2_hz = center_hz - spacing_hz / 2.0, center_hz + spacing_hz / 2.0
        at = f"{center_hz:.12g} Hz / {spacing_hz:.12g} Hz"
        needs += [FreqNeed("source1", f"{at} tone f1", f1_hz, f1_hz), FreqNeed("source2", f"{at} tone f2", f2_hz, f2_hz)]
        for product, freq_hz in (("2f1-f2", 2 * f1_hz - f2_hz), ("2f2-f1", 2 * f2_hz - f1_hz)):
            needs.append(read_need(f"{at} reading {product} at {freq_hz:.12g} Hz over a {span_hz:.12g} Hz span",
                                   freq_hz, span_hz))
    check_frequency_needs(needs, bench_freq_ranges(bench.settings), origin)


def _finite(value) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


def _residual_row(center_hz, spacing_hz, levels, base: measure.ResidualSweep, stepped: measure.ResidualSweep,
                  setup: AnalyzerSetup) -> dict:
    estimates = []
    sweeps_json = []
    for sweep in (base, stepped):
        estimate = residual.system_intercept(sweep.p1_dbm, sweep.p2_dbm, sweep.im3_lower_dbm, sweep.im3_upper_dbm,
                                             sweep.noise_lower_dbm, sweep.noise_upper_dbm, sweep.overload)
        estimates.append(estimate)
        sweeps_json.append({
            "atten_db": sweep.atten_db, "ip3_dbm": estimate.ip3_dbm, "ip3_min_dbm": estimate.ip3_min_dbm,
            "n_valid": estimate.n_valid,
            **{name: [_finite(v) for v in getattr(sweep, name)]
               for name in ("p1_dbm", "p2_dbm", "im3_lower_dbm", "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm")},
            "overload": [bool(v) for v in sweep.overload],
        })
    split = residual.split_shares(estimates[0], estimates[1], stepped.atten_db - base.atten_db)
    return {
        "center_hz": center_hz, "spacing_hz": spacing_hz, "atten_db": base.atten_db,
        "system_ip3_dbm": split.system_ip3_dbm, "source_ip3_dbm": split.source_ip3_dbm,
        "analyzer_ip3_dbm": split.analyzer_ip3_dbm,
        "sweep_json": {
            "tone_dbm": list(levels), "rbw_hz": setup.rbw_hz, "span_hz": setup.span_hz, "sweeps": sweeps_json,
            "system_ip3_min_dbm": split.system_ip3_min_dbm, "source_ip3_min_dbm": split.source_ip3_min_dbm,
            "analyzer_ip3_min_dbm": split.analyzer_ip3_min_dbm,
            "note": "intercepts at the DUT input plane; the two shares taken to add in phase",
        },
    }


# --- imported ---------------------------------------------------------------------------------


def import_tables(db_url: str, name: str, files: dict[str, Path], *, valid_days: float = DEFAULT_VALID_DAYS,
                  operator: str | None = None, notes: str | None = None) -> CalibrationView:
    """A new set from CSV tables, one file per path given."""
    check_name(name)
    check_valid_days(valid_days)
    if not files:
        raise InputError("give at least one table: --loss-in1, --loss-in2 or --loss-out")
    tables, provenance = {}, []
    for path, file in files.items():
        tables[path], source = importers.read_table(file, path)
        provenance.append(source)
    return _store_import(db_url, name, "table", tables, provenance, valid_days, operator, notes)


def import_touchstone(db_url: str, name: str, files: dict[str, list[Path]], *, valid_days: float = DEFAULT_VALID_DAYS,
                      operator: str | None = None, notes: str | None = None) -> CalibrationView:
    """A new set from Touchstone 2-port files; several files for one path are cascaded in order."""
    check_name(name)
    check_valid_days(valid_days)
    if not files:
        raise InputError("give at least one Touchstone file: --loss-in1, --loss-in2 or --loss-out")
    tables, provenance = {}, []
    for path, path_files in files.items():
        tables[path], sources = importers.read_touchstone(path_files, path)
        provenance.extend(sources)
    return _store_import(db_url, name, "touchstone", tables, provenance, valid_days, operator, notes)


def _store_import(db_url, name, method, tables, provenance, valid_days, operator, notes) -> CalibrationView:
    sessions = _sessions(db_url)
    origin = f"calibration set {name}"
    tables = {path: table_from_arrays(path, t.freqs_hz, t.losses_db, origin) for path, t in tables.items()}
    with sessions.begin() as session:
        create_set(session, name=name, method=method, tables=tables, valid_days=valid_days, operator=operator,
                   source_files=provenance, notes=notes)
    return _load(sessions, name)
