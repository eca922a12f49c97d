"""Instrument layer: transport (pyvisa), the SCPI exchange (scpi, scpi_errors) and its supervision
(retries, reconnects), dialect files, role drivers (source, analyzer, power meter), the right
instrument behind each role (role_check), opening a bench real or simulated (open_bench) and RF
off confirmed on every way out (rf_guard). A simulated bench is started by the run (run/bench_connection)
and opened here like any other, by its resource strings.

May import config/, plan/ (source ranges) and the top-level errors, units and packaged; never the
store, the analysis or a run.
"""

from tonebench.errors import LimitError
from tonebench.instruments.analyzer import (
    AnalyzerSetup,
    MarkerReading,
    SpectrumAnalyzer,
)
from tonebench.instruments.dialect import Dialect, drivers_dirs, load_dialect
from tonebench.instruments.scpi import ScpiInstrument
from tonebench.instruments.source import SignalSource
from tonebench.instruments.transport import open_resource, resource_manager

__all__ = [
    "AnalyzerSetup",
    "Dialect",
    "LimitError",
    "MarkerReading",
    "ScpiInstrument",
    "SignalSource",
    "SpectrumAnalyzer",
    "drivers_dirs",
    "load_dialect",
    "open_resource",
    "resource_manager",
]
