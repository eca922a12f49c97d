"""Path losses from files: a CSV table (freq_hz, loss_db) or Touchstone 2-port files (|S21|).

Every problem is one InputError line naming the file, what is wrong and what is allowed; nothing
is stored unless every file of an import is good.
"""

from __future__ import annotations

import csv
import functools
import hashlib
import math
from pathlib import Path

import numpy as np

from tonebench.errors import InputError
from tonebench.planes.loss_table import LossTable
from tonebench.units import format_freq

CSV_COLUMNS = ("freq_hz", "loss_db")
# A passive path: a little gain is allowed for measurement scatter, as in the bench file.
MIN_LOSS_DB, MAX_LOSS_DB = -1.0, 80.0


def file_sha256(path: Path) -> str:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except FileNotFoundError:
        raise InputError(f"{path}: file not found") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None


def check_losses(where: str, freqs_hz: np.ndarray, losses_db: np.ndarray) -> None:
    """Frequencies > 0 and strictly increasing, losses finite and within the passive range."""
    if freqs_hz.size == 0:
        raise InputError(f"{where}: no data rows; give at least one {', '.join(CSV_COLUMNS)} row")
    if not np.all(np.isfinite(freqs_hz)) or not np.all(np.isfinite(losses_db)):
        raise InputError(f"{where}: every frequency and loss must be a finite number")
    if np.any(freqs_hz <= 0):
        bad = float(freqs_hz[freqs_hz <= 0][0])
        raise InputError(f"{where}: frequency {format_freq(bad)}; frequencies must be > 0 Hz")
    steps = np.diff(freqs_hz)
    if np.any(steps <= 0):
        i = int(np.argmax(steps <= 0))
        raise InputError(
            f"{where}: frequency {freqs_hz[i + 1]:.9g} Hz follows {freqs_hz[i]:.9g} Hz; frequencies must increase strictly"
        )
    outside = (losses_db < MIN_LOSS_DB) | (losses_db > MAX_LOSS_DB)
    if np.any(outside):
        i = int(np.argmax(outside))
        raise InputError(
            f"{where}: loss {losses_db[i]:.3f} dB at {freqs_hz[i]:.9g} Hz; losses must lie between "
            f"{MIN_LOSS_DB:g} and {MAX_LOSS_DB:g} dB (positive dB means loss)"
        )


def read_table(path: Path, offset_path: str) -> tuple[LossTable, dict]:
    """A CSV file with the header `freq_hz,loss_db` and one row per frequency ('#' starts a comment).

    Returns the table and its provenance {offset_path, file, sha256}.
    """
    digest = file_sha256(path)
    where = f"calibration table {path}"
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{where}: not a text file (UTF-8 CSV with columns {','.join(CSV_COLUMNS)})") from None
    lines = [(number, line) for number, line in enumerate(text.splitlines(), start=1)
             if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{where}: empty; expected a header {','.join(CSV_COLUMNS)} and data rows")
    rows = list(csv.reader([line for _, line in lines]))
    header = tuple(cell.strip().lower() for cell in rows[0])
    if header != CSV_COLUMNS:
        raise InputError(f"{where} line {lines[0][0]}: columns {','.join(header)!r}; expected exactly {','.join(CSV_COLUMNS)}")
    values = []
    for (number, _), row in zip(lines[1:], rows[1:]):
        if len(row) != 2:
            raise InputError(f"{where} line {number}: {len(row)} fields; expected 2 ({','.join(CSV_COLUMNS)})")
        try:
            values.append((float(row[0]), float(row[1])))
        except ValueError:
            raise InputError(f"{where} line {number}: {','.join(row)!r} is not two numbers ({','.join(CSV_COLUMNS)})") from None
    table = np.array(values, dtype=float).reshape(-1, 2)
    check_losses(where, table[:, 0], table[:, 1])
    origin = f"table {path.name}"
    loss_table = LossTable(offset_path, table[:, 0], table[:, 1], origin)
    return loss_table, {"offset_path": offset_path, "file": str(path), "sha256": digest}


def _skrf():
    try:
        import skrf
    except ImportError:
        raise InputError("Touchstone import needs scikit-rf: pip install scikit-rf") from None
    return skrf


def read_network(path: Path):
    """One Touchstone 2-port file as a scikit-rf Network (frequencies in Hz)."""
    skrf = _skrf()
    file_sha256(path)  # not found / unreadable: the same one line as for tables
    try:
        network = skrf.Network(str(path))
    except Exception as exc:  # noqa: BLE001 - scikit-rf raises many kinds for a bad file
        reason = (str(exc).splitlines() or [type(exc).__name__])[0].strip() or type(exc).__name__
        raise InputError(f"Touchstone file {path}: cannot be read as Touchstone ({reason})") from None
    if network.nports != 2:
        raise InputError(
            f"Touchstone file {path}: has {network.nports} port(s); a path is a 2-port (.s2p) file, |S21| is its loss"
        )
    freqs_hz = np.asarray(network.f, dtype=float)
    if freqs_hz.size == 0:
        raise InputError(f"Touchstone file {path}: no frequency points")
    if np.any(np.abs(network.s[:, 1, 0]) == 0.0):
        raise InputError(f"Touchstone file {path}: |S21| is 0 at some frequency; that is no path")
    return network


def _cascade(networks: list, files: list[Path]):
    """The pieces interpolated by scikit-rf onto the union of their frequencies inside the range they
    share, then cascaded as 2-ports (so mismatch between the pieces is included)."""
    skrf = _skrf()
    low_hz = max(float(n.f[0]) for n in networks)
    high_hz = min(float(n.f[-1]) for n in networks)
    if low_hz > high_hz:
        ranges = ", ".join(f"{f.name} {format_freq(n.f[0])} to {format_freq(n.f[-1])}" for f, n in zip(files, networks))
        raise InputError(f"Touchstone files to cascade do not share any frequency range ({ranges})")
    grid_hz = np.unique(np.concatenate([n.f[(n.f >= low_hz) & (n.f <= high_hz)] for n in networks]))
    frequency = skrf.Frequency.from_f(grid_hz, unit="hz")
    pieces = [n if np.array_equal(n.f, grid_hz) else n.interpolate(frequency) for n in networks]
    return functools.reduce(lambda a, b: a ** b, pieces)


def read_touchstone(files: list[Path], offset_path: str) -> tuple[LossTable, list[dict]]:
    """One path from one or more Touchstone 2-port files in signal order (cascaded).

    Loss = -20 log10 |S21| of the cascade, at the files' own frequencies (their union inside the
    range all of them cover). Returns the table and the provenance of each file.
    """
    if not files:
        raise InputError(f"path '{offset_path}': give at least one Touchstone file")
    networks = [read_network(path) for path in files]
    provenance = [{"offset_path": offset_path, "file": str(p), "sha256": file_sha256(p)} for p in files]
    network = networks[0] if len(networks) == 1 else _cascade(networks, files)
    freqs_hz = np.asarray(network.f, dtype=float)
    losses_db = -20.0 * np.log10(np.abs(network.s[:, 1, 0]))
    names = " + ".join(path.name for path in files)
    check_losses(f"Touchstone {names}", freqs_hz, losses_db)
    if not math.isfinite(float(losses_db.max())):
        raise InputError(f"Touchstone {names}: |S21| is not finite")
    return LossTable(offset_path, freqs_hz, losses_db, f"touchstone {names}"), provenance
