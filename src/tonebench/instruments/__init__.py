"""Instrument layer: role drivers (source, analyzer) over SCPI dialect files, through pyvisa."""

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
