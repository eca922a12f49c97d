"""Shared pieces of the calibration tests: simulated benches whose path losses are drawn per seed and
written only into the [simulation] table (the tool never sees them), short plans, truth lookups."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from tonebench.sim.signal_chain import BenchTruth
from tonebench.sim.scenario import Scenario

PATH_NAMES = ("in1", "in2", "out")


def drawn_paths(seed: int) -> dict:
    """Losses sloped with frequency, the two input arms different (combiner arms are never equal)."""
    rng = np.random.default_rng(seed)
    in1_db = rng.uniform(3.0, 9.0)
    return {
        "ref_freq_hz": 2.45e9,
        "in1_loss_db": round(in1_db, 4),
        "in1_slope_db_per_ghz": round(rng.uniform(0.3, 1.5), 4),
        "in2_loss_db": round(in1_db + rng.uniform(0.4, 1.5), 4),
        "in2_slope_db_per_ghz": round(rng.uniform(-0.5, 2.0), 4),
        "out_loss_db": round(rng.uniform(0.8, 4.0), 4),
        "out_slope_db_per_ghz": round(rng.uniform(0.1, 1.2), 4),
    }


def simulation_table(seed: int, **overrides) -> dict:
    """The [simulation] table: the sample bench's DUT, paths drawn from the seed, meter accuracy drawn too."""
    rng = np.random.default_rng(seed + 1000)
    table = {
        "seed": seed,
        "coherent_phase_deg": 0.0,
        "dut": {"ref_freq_hz": 2.45e9, "gain_db": 15.0, "gain_slope_db_per_ghz": -2.0, "iip3_dbm": -2.0,
                "iip3_slope_db_per_ghz": 1.0, "p1db_dbm": -12.0, "nf_db": 1.2},
        "paths": drawn_paths(seed),
        "sources": {"system_ip3_dbm": 45.0, "settle_time_s": 0.005},
        "analyzer": {"mixer_toi_dbm": 15.0, "danl_dbm_per_hz": -150.0, "level_error_db": 0.0, "noise_averages": 16,
                     "overload_mixer_dbm": -10.0},
        "power_meter": {"accuracy_db": round(rng.uniform(-0.05, 0.05), 4), "reading_noise_db": 0.01},
    }
    for key, value in overrides.items():
        if isinstance(value, dict):
            table[key] = {**table.get(key, {}), **value}
        else:
            table[key] = value
    return table


def truth(simulation: dict) -> BenchTruth:
    return BenchTruth(Scenario.model_validate(simulation))


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(float(value)) if isinstance(value, float) else str(value)


def _toml_table(name: str, table: dict) -> list[str]:
    lines = [f"[{name}]"]
    nested = []
    for key, value in table.items():
        if isinstance(value, dict):
            nested.append((f"{name}.{key}", value))
        else:
            lines.append(f"{key} = {_toml_value(value)}")
    for sub_name, sub in nested:
        lines += ["", *_toml_table(sub_name, sub)]
    return lines


def write_bench(folder: Path, simulation: dict, *, name: str = "cal-bench", power_meter: bool = True,
                offsets: dict | None = None, leveling: dict | None = None, calibration: str | None = None,
                file_name: str = "bench.toml") -> Path:
    """A simulated bench file; offsets={'in1': [[f, loss], ...], ...} only when given."""
    bench = {"name": name}
    if calibration:
        bench["calibration"] = calibration
    lines = _toml_table("bench", bench)
    roles = [("source1", "generic-source"), ("source2", "generic-source"), ("analyzer", "generic-analyzer")]
    if power_meter:
        roles.append(("power_meter", "generic-power-meter"))
    for role, dialect in roles:
        lines += ["", f"[instruments.{role}]", f'dialect = "{dialect}"']
    if offsets is not None:
        lines += ["", *_toml_table("offsets", offsets)]
    lines += ["", "[limits]", "max_tone_dbm = 0.0", "max_analyzer_input_dbm = 20.0", "expected_gain_db = 16.0"]
    if leveling is not None:
        lines += ["", *_toml_table("leveling", leveling)]
    lines += ["", *_toml_table("simulation", simulation), ""]
    path = folder / file_name
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def write_plan(folder: Path, centers_hz=(2.40e9, 2.48e9), spacing_hz: float = 1.0e6, start_dbm: float = -30.0,
               stop_dbm: float = -14.0, step_db: float = 2.0, atten_db: float = 20.0, rbw_hz: float = 1000.0,
               file_name: str = "plan.toml") -> Path:
    text = f"""
[plan]
name = "cal-check"
[device]
part_number = "KLN-2417A"
serial = "KLN24031-0555"
[sweep]
center_freqs_hz = [{", ".join(repr(float(c)) for c in centers_hz)}]
spacings_hz = [{spacing_hz!r}]
tone_start_dbm = {start_dbm!r}
tone_stop_dbm = {stop_dbm!r}
tone_step_dbm = {step_db!r}
[analyzer]
rbw_hz = {rbw_hz!r}
atten_db = {atten_db!r}
"""
    path = folder / file_name
    path.write_text(text, encoding="utf-8")
    return path


def true_rows(simulation: dict, freqs_hz) -> dict[str, list[list[float]]]:
    """[freq_hz, loss_db] rows of the true losses: what a perfect calibration would hold."""
    t = truth(simulation)
    return {path: [[float(f), float(t.true_loss_db(path, f))] for f in freqs_hz] for path in PATH_NAMES}
