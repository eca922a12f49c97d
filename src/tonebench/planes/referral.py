"""From raw readings and path losses to DUT-referred values: one formula for the sequencer (at
measurement time) and for re-referring a stored run to another calibration set.

Inputs: a tone's power at the DUT input plane is the source setting less the input loss, unless
the point was leveled with the power meter; then the meter measured it at the plane and no path
loss enters. Outputs: the analyzer reading plus the output loss at that frequency. The
arithmetic itself is planes/arithmetic.py.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

from tonebench.errors import InputError
from tonebench.planes import arithmetic
from tonebench.planes.loss_table import LossTable
from tonebench.units import format_freq

PATHS = ("in1", "in2", "out")

# DUT-referred output column -> (raw reading column, output-loss column).
OUTPUT_COLUMNS = {
    "pout_f1_dbm": ("raw_f1_dbm", "out_loss_f1_db"),
    "pout_f2_dbm": ("raw_f2_dbm", "out_loss_f2_db"),
    "im3_lower_dbm": ("raw_lower_dbm", "out_loss_lower_db"),
    "im3_upper_dbm": ("raw_upper_dbm", "out_loss_upper_db"),
    "noise_lower_dbm": ("raw_noise_lower_dbm", "out_loss_lower_db"),
    "noise_upper_dbm": ("raw_noise_upper_dbm", "out_loss_upper_db"),
    "im2_diff_dbm": ("raw_diff_dbm", "out_loss_diff_db"),
    "im2_sum_dbm": ("raw_sum_dbm", "out_loss_sum_db"),
}
OFFSET_COLUMNS = (
    "in1_loss_db", "in2_loss_db", "out_loss_f1_db", "out_loss_f2_db", "out_loss_lower_db",
    "out_loss_upper_db", "out_loss_diff_db", "out_loss_sum_db",
)


def tone_frequencies_hz(f1_hz: float, f2_hz: float) -> dict[str, float]:
    """The frequencies each path is needed at: tones on the inputs; tones and IM3 on the output."""
    return {"f1": f1_hz, "f2": f2_hz, "lower": 2.0 * f1_hz - f2_hz, "upper": 2.0 * f2_hz - f1_hz}


def point_offsets(tables: Mapping[str, LossTable], f1_hz: float, f2_hz: float,
                  second_order: bool = False, out_tones_hz: tuple[float, float] | None = None) -> dict[str, float | None]:
    """Path losses (dB) one point uses, by column name. Raises InputError outside a table's range.
    out_tones_hz: the tones where they leave the DUT, when not at f1, f2 (a mixer's IF, run/mixer_run.py)."""
    freqs = tone_frequencies_hz(*(out_tones_hz or (f1_hz, f2_hz)))
    out = tables["out"]
    offsets: dict[str, float | None] = {
        "in1_loss_db": tables["in1"].loss_db(f1_hz),
        "in2_loss_db": tables["in2"].loss_db(f2_hz),
        "out_loss_f1_db": out.loss_db(freqs["f1"]),
        "out_loss_f2_db": out.loss_db(freqs["f2"]),
        "out_loss_lower_db": out.loss_db(freqs["lower"]),
        "out_loss_upper_db": out.loss_db(freqs["upper"]),
        "out_loss_diff_db": None,
        "out_loss_sum_db": None,
    }
    if second_order:
        offsets["out_loss_diff_db"] = out.loss_db(f2_hz - f1_hz)
        offsets["out_loss_sum_db"] = out.loss_db(f1_hz + f2_hz)
    return offsets


def referred_values(row: Mapping[str, object], offsets: Mapping[str, float | None]) -> dict[str, float | None]:
    """DUT-referred columns of one point from its raw columns and the given offsets.

    `row` needs source1_dbm, source2_dbm, source1/2_correction_db, pin1/2_dbm (used only for a
    leveled tone) and the raw_* readings; a missing raw reading gives None.
    """
    values: dict[str, float | None] = {}
    for index in (1, 2):
        if row.get(f"source{index}_correction_db") is not None:
            values[f"pin{index}_dbm"] = row[f"pin{index}_dbm"]  # measured at the plane by the meter
        else:
            values[f"pin{index}_dbm"] = arithmetic.tone_at_plane_dbm(row[f"source{index}_dbm"], offsets[f"in{index}_loss_db"])
    for column, (raw_column, loss_column) in OUTPUT_COLUMNS.items():
        raw = row.get(raw_column)
        loss = offsets.get(loss_column)
        values[column] = None if raw is None or loss is None else arithmetic.dut_output_dbm(raw, loss)
    return values


def check_coverage(tables: Mapping[str, LossTable], tone_pairs_hz: Iterable[tuple[float, float]], what: str) -> None:
    """Refuse (one-line InputError) unless every tone and every IM3 product lies in its path's range.

    `what` names the calibration in the message, e.g. "calibration set lab-cal-3".
    """
    for path in PATHS:
        if path not in tables:
            raise InputError(f"{what} has no '{path}' path; a run needs in1, in2 and out")
    for f1_hz, f2_hz in tone_pairs_hz:
        freqs = tone_frequencies_hz(f1_hz, f2_hz)
        needs = [("in1", "f1", freqs["f1"]), ("in2", "f2", freqs["f2"])] + [
            ("out", name, freqs[name]) for name in ("lower", "f1", "f2", "upper")
        ]
        for path, name, freq_hz in needs:
            table = tables[path]
            # 1 Hz tolerance, as LossTable.loss_db allows for rounding in f1/f2 arithmetic.
            if not table.freqs_hz[0] - 1.0 <= freq_hz <= table.freqs_hz[-1] + 1.0:
                label = {"f1": "f1", "f2": "f2", "lower": "2f1-f2", "upper": "2f2-f1"}[name]
                raise InputError(
                    f"{what}: '{path}' covers {format_freq(table.freqs_hz[0])} to {format_freq(table.freqs_hz[-1])}; "
                    f"the plan needs {format_freq(freq_hz)} ({label} of tones {format_freq(f1_hz)}/{format_freq(f2_hz)}) "
                    "and tonebench does not extrapolate"
                )
