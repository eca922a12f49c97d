"""Bench and plan files for whole runs on the simulated bench: the sample bench with injected
faults, unattended settings and short query timeouts, the sample plan, and the simulator's own
word on whether RF is off."""

from __future__ import annotations

from pathlib import Path

from conftest import SAMPLE_RUNS

from tonebench.packaged import data_dir

PLAN_TEXT = (SAMPLE_RUNS / "demo_plan.toml").read_text()
BENCH_TEXT = (SAMPLE_RUNS / "sim_bench.toml").read_text()
FAST_TIMEOUT_S = 0.5
SETTLE_TOLERANCE_DB = 0.05


def fast_dialects(folder: Path) -> dict[str, Path]:
    """The packaged dialects with a short query timeout, so a stall costs a second, not ten."""
    paths = {}
    for name in ("generic-source", "generic-analyzer"):
        text = (data_dir("drivers") / f"{name}.toml").read_text()
        path = folder / f"{name}-fast.toml"
        path.write_text(text.replace("query_timeout_s = 5.0", f"query_timeout_s = {FAST_TIMEOUT_S}"))
        paths[name] = path
    return paths


def toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def write_bench(folder: Path, *, faults: list[dict] = (), unattended: dict | None = None, fast: bool = True) -> Path:
    text = BENCH_TEXT
    if fast:
        for name, path in fast_dialects(folder).items():
            text = text.replace(f'dialect = "{name}"', f'dialect = "{path}"')
    settings = {"backoff_s": 0.01, "settle_tolerance_db": SETTLE_TOLERANCE_DB, **(unattended or {})}
    text += "\n[unattended]\n" + "".join(f"{key} = {toml_value(value)}\n" for key, value in settings.items())
    for fault in faults:
        text += "\n[[simulation.faults]]\n" + "".join(f"{key} = {toml_value(value)}\n" for key, value in fault.items())
    path = folder / "bench.toml"
    path.write_text(text)
    return path


def write_plan(folder: Path, text: str = PLAN_TEXT, name: str = "plan.toml") -> Path:
    path = folder / name
    path.write_text(text)
    return path


def rf_is_off(sim) -> bool:
    return not any(sim.bench.source(i).commanded.rf_on or sim.bench.source(i).effective.rf_on for i in (1, 2))


def rf_never_on(sim) -> bool:
    """From the simulator itself: no RF-on line ever arrived and both sources are off."""
    lines = [line for _, _, line in sim.bench.command_log]
    return not any(line.upper().startswith("OUTP ON") for line in lines) and not any(
        sim.bench.source(i).commanded.rf_on for i in (1, 2))
