"""Path-loss tables: linear in dB versus frequency inside the table, an error outside it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tonebench.errors import InputError
from tonebench.units import format_freq


@dataclass(frozen=True)
class LossTable:
    """Loss of one path (in1, in2 or out), positive dB, at increasing frequencies."""

    path: str
    freqs_hz: np.ndarray
    losses_db: np.ndarray
    origin: str

    @classmethod
    def from_rows(cls, path: str, rows, origin: str) -> LossTable:
        table = np.asarray(rows, dtype=float).reshape(-1, 2)
        return cls(path, table[:, 0], table[:, 1], origin)

    def loss_db(self, freq_hz):
        """Interpolated loss at freq_hz (scalar or array). Never extrapolates."""
        freqs_hz = np.asarray(freq_hz, dtype=float)
        lowest_hz, highest_hz = self.freqs_hz[0], self.freqs_hz[-1]
        # A tolerance of 1 Hz keeps rounding in f1/f2 arithmetic from tripping an exact edge.
        outside = (freqs_hz < lowest_hz - 1.0) | (freqs_hz > highest_hz + 1.0)
        if np.any(outside):
            bad_hz = float(np.atleast_1d(freqs_hz)[np.atleast_1d(outside)][0])
            raise InputError(
                f"{self.origin}: no '{self.path}' loss at {format_freq(bad_hz)}; the table covers "
                f"{format_freq(lowest_hz)} to {format_freq(highest_hz)} and tonebench does not extrapolate"
            )
        if self.freqs_hz.size == 1:
            return np.full_like(freqs_hz, self.losses_db[0]) if freqs_hz.ndim else float(self.losses_db[0])
        value = np.interp(freqs_hz, self.freqs_hz, self.losses_db)
        return value if freqs_hz.ndim else float(value)
