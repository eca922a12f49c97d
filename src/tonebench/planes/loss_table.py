"""Path-loss tables: linear in dB versus frequency inside the table, an error outside it."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tonebench.errors import InputError
from tonebench.units import format_freq


# Bound on the scalar cache (a calibration sweep may ask thousands of frequencies once each).
MAX_CACHED_FREQS = 4096


@dataclass(frozen=True)
class LossTable:
    """Loss of one path (in1, in2 or out), positive dB, at increasing frequencies."""

    path: str
    freqs_hz: np.ndarray
    losses_db: np.ndarray
    origin: str
    # Scalar losses already interpolated: a run asks the same few frequencies at every point.
    _scalar_db: dict[float, float] = field(default_factory=dict, init=False, repr=False, compare=False)

    @classmethod
    def from_rows(cls, path: str, rows, origin: str) -> LossTable:
        table = np.asarray(rows, dtype=float).reshape(-1, 2)
        return cls(path, table[:, 0], table[:, 1], origin)

    def loss_db(self, freq_hz):
        """Interpolated loss at freq_hz (scalar or array). Never extrapolates."""
        if type(freq_hz) is float:
            loss_db = self._scalar_db.get(freq_hz)
            if loss_db is None:
                if len(self._scalar_db) >= MAX_CACHED_FREQS:
                    self._scalar_db.clear()
                loss_db = self._scalar_db[freq_hz] = self._interpolated_db(freq_hz)
            return loss_db
        return self._interpolated_db(freq_hz)

    def _interpolated_db(self, freq_hz):
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
