"""The point record of one accepted (or failed) point, from what the sequencer set and read.

Path losses and the DUT-referred values come from planes/referral.py (the same formula that
re-refers a stored run); the second-order products are referred with the output loss at their own
frequencies. What has no column of its own (how the attenuation was chosen, the step check's
noise reads, drift) goes in extra_json.
"""

from __future__ import annotations

from tonebench.calibration.leveling import LevelResult
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.plan.points import PlannedPoint
from tonebench.planes import arithmetic
from tonebench.planes.loss_table import LossTable
from tonebench.planes.referral import point_offsets, referred_values
from tonebench.run.narrowing import snr_db
from tonebench.run.readings import Measured, SecondOrderReadings, StepReadings
from tonebench.store.point_record import PointRecord


def planned_fields(point: PlannedPoint) -> dict:
    """The record fields a point has from its plan alone."""
    return dict(point_key=point.key, seq=point.seq, center_hz=point.center_hz, spacing_hz=point.spacing_hz,
                f1_hz=point.f1_hz, f2_hz=point.f2_hz, tone_dbm=point.tone_dbm, bias_v=point.bias_v,
                temperature_c=point.temperature_c, lo_dbm=point.lo_dbm)


def failed_record(point: PlannedPoint, reason: str, elapsed_s: float) -> PointRecord:
    return PointRecord(status="failed", fail_reason=reason, bench_clock_s=elapsed_s, **planned_fields(point))


def measured_record(point: PlannedPoint, measured: Measured, elapsed_s: float, tables: dict[str, LossTable],
                    settings_dbm: tuple[float, float], levels: tuple[LevelResult | None, LevelResult | None],
                    drift: str | None, out_point: PlannedPoint | None = None) -> PointRecord:
    """The record of an accepted point: source settings, leveling, losses, readings, DUT-referred values."""
    readings, setup = measured.readings, measured.setup
    # out_point: the point as the analyzer saw it (a mixer's IF view); output losses are taken there.
    offsets = point_offsets(tables, point.f1_hz, point.f2_hz,
                            out_tones_hz=None if out_point is None else (out_point.f1_hz, out_point.f2_hz))
    level1, level2 = levels
    fields = dict(
        status="measured",
        bench_clock_s=elapsed_s,
        **planned_fields(point),
        source1_dbm=settings_dbm[0],
        source2_dbm=settings_dbm[1],
        source1_correction_db=None if level1 is None else level1.correction_db,
        source2_correction_db=None if level2 is None else level2.correction_db,
        # A leveled tone is at its target plus the error the meter last saw; an open-loop one
        # is worked out from the input loss (referred_values).
        pin1_dbm=None if level1 is None else point.tone_dbm + level1.error_db,
        pin2_dbm=None if level2 is None else point.tone_dbm + level2.error_db,
        **{column: value for column, value in offsets.items() if value is not None},
        raw_f1_dbm=readings.f1_dbm,
        raw_f2_dbm=readings.f2_dbm,
        raw_lower_dbm=readings.lower_dbm,
        raw_upper_dbm=readings.upper_dbm,
        raw_noise_lower_dbm=readings.noise_lower_dbm,
        raw_noise_upper_dbm=readings.noise_upper_dbm,
        **_setup_fields(setup),
        overload=readings.overload,
    )
    # DUT-referred: inputs at the input plane, analyzer readings plus the output loss.
    fields.update(referred_values(fields, offsets))
    fields.update(_step_fields(measured.step))
    fields.update(_second_order_fields(point, measured.second, tables["out"]))
    if measured.bias is not None:
        fields.update(vars(measured.bias))  # gate_read_v, gate_current_a, drain_read_v, drain_current_a
    fields["chamber_read_c"] = measured.chamber_c
    extra_time_s = sum(r.sweep_time_s for r in (measured.step, measured.second, measured.narrow) if r is not None)
    fields["sweep_time_s"] = readings.sweep_time_s + extra_time_s
    fields["extra_json"] = _extra(measured, drift)
    return PointRecord(**fields)


def _setup_fields(setup: AnalyzerSetup) -> dict:
    return dict(span_hz=setup.span_hz, rbw_hz=setup.rbw_hz, vbw_hz=setup.vbw_hz, atten_db=setup.atten_db,
                ref_level_dbm=setup.ref_level_dbm)


def _step_fields(step: StepReadings | None) -> dict:
    if step is None:
        return {}
    return dict(step_atten_db=step.step_atten_db, raw_lower_step_dbm=step.lower_dbm,
                raw_upper_step_dbm=step.upper_dbm)


def _second_order_fields(point: PlannedPoint, second: SecondOrderReadings | None, out: LossTable) -> dict:
    if second is None:
        return {}
    diff_loss_db = out.loss_db(point.f2_hz - point.f1_hz)
    sum_loss_db = out.loss_db(point.f1_hz + point.f2_hz)
    return dict(raw_diff_dbm=second.diff_dbm, raw_sum_dbm=second.sum_dbm, out_loss_diff_db=diff_loss_db,
                out_loss_sum_db=sum_loss_db, im2_diff_dbm=arithmetic.dut_output_dbm(second.diff_dbm, diff_loss_db),
                im2_sum_dbm=arithmetic.dut_output_dbm(second.sum_dbm, sum_loss_db))


def _extra(measured: Measured, drift: str | None) -> dict:
    """What has no column, in the order it has always been stored (the JSON text keeps it)."""
    extra: dict = {"atten_choice": measured.choice}
    step, second = measured.step, measured.second
    if step is not None:
        extra.update(raw_noise_lower_step_dbm=step.noise_lower_dbm, raw_noise_upper_step_dbm=step.noise_upper_dbm,
                     step_reason=step.reason, step_sweep_time_s=step.sweep_time_s)
    if second is not None:
        extra.update(raw_noise_diff_dbm=second.noise_diff_dbm, raw_noise_sum_dbm=second.noise_sum_dbm)
    if drift:
        extra["source_drift"] = drift
    if measured.tone_rbw_hz is not None:  # rbw_hz and span_hz are the products'
        extra["tone_rbw_hz"] = measured.tone_rbw_hz
    target = measured.target
    if target is not None:  # the products' RBW chosen per point for the plan's accuracy
        extra["predicted_snr_db"] = round(target.predicted_snr_db, 2)
        if snr_db(measured.readings) < target.target_db:  # not even at the narrowest RBW allowed
            extra["short_of_target"] = True
    narrow = measured.narrow
    if narrow is not None:  # the IM3 columns hold this narrower read
        extra.update(im3_rbw_hz=narrow.rbw_hz, im3_sweep_time_s=narrow.sweep_time_s,
                     im3_snr_at_plan_rbw_db=narrow.snr_before_db)
    return extra
