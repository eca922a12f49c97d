"""`tonebench bias`: a FET's linearity sweet spot in gate bias, predicted from a DC transfer sweep
and measured by two-tone runs."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from tonebench.cli.common import DbOption, database, one_line_errors, out

BenchOption = Annotated[Path, typer.Option("--bench", "-b", help="Bench file with gate and drain supplies and [bias] limits.")]
PlanArgument = Annotated[Path, typer.Argument(help="Plan file with [bias], [bias.dc] and (for search) [bias.search].")]


def _mv(value_v: float | None) -> str:
    return "-" if value_v is None else f"{value_v * 1e3:.1f} mV"


def finding_line(label: str, found) -> str:
    """One line per sweet-spot finding: the spot with its bound, the peak, the window."""
    if found is None:
        return f"{label}: no g3 zero found in the sweep"
    line = (f"{label}: sweet spot {found.sweet_spot_v:.4f} V +/- {_mv(found.sweet_spot_bound_v)}, "
            f"peak IIP3 {found.peak_iip3_dbm:+.1f} dBm")
    if found.window_width_v is not None:
        line += (f", IIP3 >= {found.window_threshold_dbm:+.1f} dBm from {found.window_low_v:.4f} to "
                 f"{found.window_high_v:.4f} V ({_mv(found.window_width_v)} +/- {_mv(found.window_bound_v)} per edge)")
    elif found.window_threshold_dbm is not None:
        line += f", IIP3 never reaches {found.window_threshold_dbm:+.1f} dBm"
    if found.drain_current_a is not None:
        line += f", Id {found.drain_current_a * 1e3:.2f} mA"
    if found.gain_db is not None:
        line += f", gain {found.gain_db:.1f} dB"
    return line


def register_bias_commands(app: typer.Typer, run_with_progress) -> None:
    bias_app = typer.Typer(rich_markup_mode=None, no_args_is_help=True,
                           help="A FET's linearity sweet spot in gate bias: DC prediction and two-tone search.")
    app.add_typer(bias_app, name="bias")

    @bias_app.command("dc")
    def bias_dc(plan: PlanArgument, bench: BenchOption) -> None:
        """DC transfer sweep only ([bias.dc], RF off): g1, g2, g3 and the sweet spot and window they predict."""
        from tonebench.analysis.bias_search import predicted_sweet_spot
        from tonebench.config.bench_file import load_bench
        from tonebench.config.plan_file import load_plan
        from tonebench.errors import InputError
        from tonebench.run.dc_transfer import measure_dc_transfer

        with one_line_errors():
            loaded = load_plan(plan)
            bias = loaded.settings.bias
            if bias is None or bias.dc is None:
                raise InputError(f"plan {plan}: `tonebench bias dc` needs a [bias.dc] table "
                                 "(gate_start_v, gate_stop_v, gate_step_v)")
            search = bias.search
            loaded_bench = load_bench(bench)
            for temp_c in loaded.settings.sweep.temperatures_c or [None]:
                transfer = measure_dc_transfer(loaded_bench, bias.dc, bias.drain_v, f"plan {plan}",
                                               temperature_c=temp_c)
                _, predicted = predicted_sweet_spot(
                    transfer.gate_v, transfer.drain_current_a, transfer.current_sigma_a, bias.dc.window_points,
                    bias.dc.polyorder, None if search is None else search.window_threshold_dbm,
                    None if search is None else search.window_below_peak_db)
                at = "" if temp_c is None else f" at {transfer.chamber_read_c:.2f} degC (set {temp_c:g})"
                out.print(f"DC transfer sweep{at}: {transfer.gate_v.size} points at drain {transfer.drain_v:g} V, "
                          f"current noise {transfer.current_sigma_a * 1e9:.0f} nA (measured); bias off",
                          highlight=False)
                out.print(finding_line("predicted from DC", predicted), highlight=False)

    @bias_app.command("search")
    def bias_search(
        plan: PlanArgument,
        bench: BenchOption,
        db: DbOption = None,
        page: Annotated[Path | None, typer.Option("--page", help="Write the bias page here (default: bias-<serial>.html in the current folder).")] = None,
    ) -> None:
        """DC sweep and prediction, two-tone runs at the [bias] steps and then at fine steps around the
        measured IIP3 peak; the measured sweet spot and window beside the prediction, and the bias page."""
        from tonebench.config.plan_file import load_plan
        from tonebench.run.bias_study import run_bias_study

        with one_line_errors():
            db_url = database(db)
            serial = load_plan(plan).settings.device.serial
            page_path = page or Path(f"bias-{serial}.html")

            def execute(plan_path, bench_path, url, on_sim_started, held_at_c=None):
                return run_with_progress(plan_path, bench_path, url, None, on_sim_started, held_at_c=held_at_c)

            say = lambda line: out.print(line, highlight=False)
            series = run_bias_study(plan, bench, db_url, page_path, execute, say)
            for study in series.studies:
                say_study(study, say)
            if series.drift is not None:
                say(f"sweet spot drift: {series.drift.mv_per_k:+.3f} mV/K +/- {series.drift.bound_mv_per_k:.3f} "
                    f"over {min(series.drift.temperatures_c):.1f} to {max(series.drift.temperatures_c):.1f} degC"
                    + ("" if series.series_guid is None else f" (series {series.series_guid})"))
            if series.truth_drift_mv_per_k is not None:
                say(f"simulated truth: drift {series.truth_drift_mv_per_k:+.3f} mV/K")
            say(f"bias page: {series.page_path.resolve()}")


def say_study(study, say) -> None:
    """What one temperature's study found, a line per finding."""
    if study.temperature_c is not None:
        say(f"at {study.temperature_c:g} degC (chamber read {study.temp_k - 273.15:.2f} degC):")
    for run in study.runs:
        say(f"run {run.guid[:8]}: {run.status}: {run.reason}")
    say(f"study {study.guid}: stored with its {study.transfer.gate_v.size} DC points and findings")
    say(finding_line("predicted from DC", study.predicted))
    say(finding_line(f"measured at {study.measured.drive_tone_dbm:g} dBm per tone", study.measured))
    if study.verdict is not None and study.verdict[0] != "no-limit":
        say(f"spec limits: {study.verdict[0]}: {study.verdict[1]}")
    if study.input_offset_db is not None:
        say(f"predicted less measured IIP3 away from the null: {study.input_offset_db:+.2f} dB "
            f"(input match voltage gain {10 ** (study.input_offset_db / 20):.3f})")
    for line in study.truth:
        say(line)
