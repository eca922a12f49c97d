"""Hardware bench files whose resources are a simulated bench started by the test, dialects with
narrowed limits, and the one line a refused command prints."""

from __future__ import annotations

from pathlib import Path

from sim_runs import BENCH_TEXT

from tonebench.packaged import data_dir


def dialect_copy(folder: Path, name: str, **limits: float) -> Path:
    """A packaged dialect with some [limits] replaced."""
    lines = []
    for line in (data_dir("drivers") / f"{name}.toml").read_text().splitlines():
        key = line.split("=")[0].strip()
        lines.append(f"{key} = {limits[key]!r}" if key in limits else line)
    path = folder / f"{name}-narrow.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def hardware_bench(folder: Path, sim, *, dialects: dict[str, Path] | None = None, power_meter: bool = False) -> Path:
    """The sample bench as a hardware bench file whose resources are the simulator's."""
    text = BENCH_TEXT.split("[simulation]")[0]
    if power_meter:
        text = text.replace("[offsets]", '[instruments.power_meter]\ndialect = "generic-power-meter"\n\n[offsets]')
    for role, resource in sim.resources.items():
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
    for role, path in (dialects or {}).items():
        head, _, rest = text.partition(f"[instruments.{role}]\n")
        before, _, after = rest.partition("\n\n")
        before = "\n".join(f'dialect = "{path}"' if line.startswith("dialect") else line for line in before.splitlines())
        text = f"{head}[instruments.{role}]\n{before}\n\n{after}"
    path = folder / "bench.toml"
    path.write_text(text)
    return path


def one_error_line(result) -> str:
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.output
    return lines[0]
