"""Faults on demand for the simulated bench: which instrument, which fault, on which line, how long.

A fault fires on the n-th line an instrument receives that starts with `on` (any line when `on`
is empty), and again every `every` matching lines, `repeat` times in all. "At point k" is the k-th
power command a source receives (on = "SOUR:POW", nth = k). Kinds:

- stall: the instrument stops answering for `duration_s` wall-clock seconds; the triggering
  line is executed, its reply (if any) comes after the stall (`late_reply`) or never, and lines
  arriving meanwhile, on any connection, wait (a busy instrument's input buffer).
- drop: the connection is reset (TCP RST) on receiving the line; the line is lost.
- error: an SCPI error (`code`) is pushed to the error queue; a command is not executed, a query
  is answered as usual.
- reboot: a power cycle: settings back to defaults, RF off, error queue cleared, the power-on bit
  of the event status register set, and every connection it is serving reset (kept when
  `keep_connection`, like a front-panel preset). The triggering line is lost. A connection not
  yet accepted counts as one made after the reboot.
- unsettled: after the triggering line (a power or frequency change on a source), the source's
  level is off by `level_error_db`, decaying with time constant `duration_s` on the bench's
  virtual clock; its *OPC? still says done. Needs a device that supports it (SimSource).
- reading: the reply to the triggering query is replaced by `reading` (e.g. "1e30", "9.91E37",
  "nan"): an instrument that answers with a value it cannot have measured.
- drift: from the triggering line on, a source's actual output level moves by `drift_db_per_s`
  on the bench's virtual clock (a source warming up), while it still reports its set power and
  *OPC? says done. Needs a device that supports it (SimSource).

Built from test code (FaultSchedule([FaultSpec(...)])) or from `[[simulation.faults]]` rows.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator


FaultKind = Literal["stall", "drop", "error", "reboot", "unsettled", "reading", "drift"]
FAULT_KINDS: tuple[str, ...] = ("stall", "drop", "error", "reboot", "unsettled", "reading", "drift")


class FaultSpec(BaseModel):
    """One scheduled fault (a row of `[[simulation.faults]]`)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    instrument: str = Field(min_length=1, description="source1, source2 or analyzer")
    kind: FaultKind
    on: str = Field("", description="line prefix that counts (case-insensitive); empty: every line")
    nth: int = Field(1, ge=1, description="fires on the nth matching line")
    repeat: int = Field(1, ge=1, le=1_000_000, description="how many times it fires")
    every: int = Field(1, ge=1, description="matching lines from one firing to the next")
    duration_s: float = Field(0.0, ge=0.0, le=3600.0,
                              description="stall: wall-clock s; unsettled: decay time constant, virtual s")
    late_reply: bool = True
    code: int = Field(-240, ge=-999, le=-1, description="SCPI error code pushed by an error fault")
    keep_connection: bool = False
    level_error_db: float = Field(3.0, ge=-60.0, le=60.0, description="unsettled: initial level error")
    reading: str = Field("1e30", min_length=1, max_length=100, description="reading: the reply sent instead")
    drift_db_per_s: float = Field(0.0, ge=-10.0, le=10.0, description="drift: level change per virtual second")

    @model_validator(mode="after")
    def _durations(self) -> FaultSpec:
        if self.kind in ("stall", "unsettled") and self.duration_s <= 0.0:
            raise ValueError(f"a {self.kind} fault needs duration_s > 0")
        if self.kind == "drift" and self.drift_db_per_s == 0.0:
            raise ValueError("a drift fault needs drift_db_per_s other than 0")
        if any(char in self.reading for char in "\r\n"):
            raise ValueError("reading: one line, no line breaks")
        return self


@dataclass(frozen=True)
class FiredFault:
    """A fault that fired: wall-clock time (time.monotonic), which spec, on which line."""

    at_s: float
    spec: FaultSpec
    instrument: str
    line: str


class FaultSchedule:
    """Faults for one simulated bench, shared by its instrument servers. Thread-safe."""

    def __init__(self, specs: list[FaultSpec] | tuple[FaultSpec, ...] = ()):
        self.specs: tuple[FaultSpec, ...] = tuple(specs)
        self._matched = [0] * len(self.specs)
        self._fired_count = [0] * len(self.specs)
        self.fired: list[FiredFault] = []
        self._lock = threading.Lock()

    def add(self, spec: FaultSpec) -> None:
        """Schedule one more fault (counting starts now)."""
        with self._lock:
            self.specs = (*self.specs, spec)
            self._matched.append(0)
            self._fired_count.append(0)

    def faults_for(self, instrument: str, line: str) -> list[FaultSpec]:
        """Count this received line and return the faults that fire on it, in schedule order."""
        text = line.strip().upper()
        due = []
        with self._lock:
            for index, spec in enumerate(self.specs):
                if spec.instrument != instrument or not text.startswith(spec.on.strip().upper()):
                    continue
                self._matched[index] += 1
                since_first = self._matched[index] - spec.nth
                if (since_first >= 0 and since_first % spec.every == 0
                        and self._fired_count[index] < spec.repeat):
                    self._fired_count[index] += 1
                    due.append(spec)
                    self.fired.append(FiredFault(time.monotonic(), spec, instrument, line))
        return due

    def pending(self) -> list[FaultSpec]:
        """Faults that have not fired as often as scheduled."""
        with self._lock:
            return [spec for spec, count in zip(self.specs, self._fired_count) if count < spec.repeat]
