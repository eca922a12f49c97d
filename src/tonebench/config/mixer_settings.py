"""`[mixer]` in a plan file: the frequency plan of a frequency-translating DUT (a mixer).

The tones of [sweep] are at the RF input; the analyzer reads at the IF. The LO is given by its
frequency (`lo_hz`, one for the whole plan) or by the IF wanted (`if_hz`, the LO then follows each
centre frequency). Injection says where the LO sits: "low" below every RF product, "high" above.
Output: "difference" (IF = |f - f_LO|) or "sum" (IF = f + f_LO). Derivation and checks:
plan/frequency_plan.py.
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
    lo_dbm: float = Field(ge=LO_MIN_DBM, le=LO_MAX_DBM)
    # Spurious products m*LO +/- n*RF with |m|, |n| up to this are predicted near each IM3 at the
    # IF, and flagged within spur_window_rbw RBWs of it.
    spur_max_order: int = Field(default=3, ge=1, le=7)
    spur_window_rbw: float = Field(default=3.0, gt=0.0, le=100.0)

    @model_validator(mode="after")
    def _one_lo(self) -> MixerSettings:
        if (self.lo_hz is None) == (self.if_hz is None):
            raise ValueError("[mixer] give exactly one of lo_hz (the LO frequency) and if_hz (the IF wanted)")
        return self
