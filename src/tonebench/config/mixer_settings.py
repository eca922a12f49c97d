"""`[mixer]` in a plan file: the frequency plan of a frequency-translating DUT (a mixer).

The tones of [sweep] are at the RF input; the analyzer reads at the IF. The LO is given by its
frequency (`lo_hz`, one for the whole plan) or by the IF wanted (`if_hz`, the LO then follows each
centre frequency). Injection says where the LO sits: "low" below every RF product, "high" above.
Output: "difference" (IF = |f - f_LO|) or "sum" (IF = f + f_LO). Derivation and checks:
plan/frequency_plan.py.

LO power: `lo_dbm` (one level for the whole run) or `lo_levels_dbm` (a list: the "lo" plan axis,
plan/axes.py, one set of sweeps per level), exactly one of them.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

from tonebench.config.loading import StrictModel

LO_MIN_DBM, LO_MAX_DBM = -150.0, 30.0


class MixerSettings(StrictModel):
    lo_hz: float | None = Field(default=None, gt=0.0, le=1e12)
    if_hz: float | None = Field(default=None, gt=0.0, le=1e12)
    injection: Literal["low", "high"] = "low"
    output: Literal["difference", "sum"] = "difference"
    # LO power at the LO source's connector (checked against the bench's [limits] max_lo_dbm).
    lo_dbm: float | None = Field(default=None, ge=LO_MIN_DBM, le=LO_MAX_DBM)
    # LO power stepped as a plan axis (each level checked against max_lo_dbm like lo_dbm).
    lo_levels_dbm: list[float] | None = Field(default=None, min_length=1)
    # Spurious products m*LO +/- n*RF with |m|, |n| up to this are predicted near each IM3 at the
    # IF, and flagged within spur_window_rbw RBWs of it.
    spur_max_order: int = Field(default=3, ge=1, le=7)
    spur_window_rbw: float = Field(default=3.0, gt=0.0, le=100.0)

    @model_validator(mode="after")
    def _one_lo(self) -> MixerSettings:
        if (self.lo_hz is None) == (self.if_hz is None):
            raise ValueError("[mixer] give exactly one of lo_hz (the LO frequency) and if_hz (the IF wanted)")
        if (self.lo_dbm is None) == (self.lo_levels_dbm is None):
            raise ValueError("[mixer] give exactly one of lo_dbm (one LO power) and lo_levels_dbm (a list of LO "
                             "powers, stepped as a plan axis)")
        if self.lo_levels_dbm is not None:
            if any(not LO_MIN_DBM <= level <= LO_MAX_DBM for level in self.lo_levels_dbm):
                raise ValueError(f"[mixer] lo_levels_dbm values must lie within {LO_MIN_DBM:g}..{LO_MAX_DBM:g} dBm")
            if len(set(self.lo_levels_dbm)) != len(self.lo_levels_dbm):
                raise ValueError("[mixer] lo_levels_dbm repeats a level")
        return self

    def lo_levels(self) -> list[float]:
        """Every LO power the run sets (dBm at the LO source's connector)."""
        return list(self.lo_levels_dbm) if self.lo_levels_dbm is not None else [self.lo_dbm]
