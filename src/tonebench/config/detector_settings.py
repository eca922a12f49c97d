"""What a plan asks of the analyzer's detector and trace averaging ([analyzer] detector, averaging,
average_count), as one value the instruments layer sends (instruments/detector_setup.py) and a
point records (extra_json keys the analysis reads, analysis/detectors.py)."""

from __future__ import annotations

from dataclasses import dataclass

DETECTORS = ("rms", "sample", "peak")
AVERAGE_TYPES = ("power", "log")


@dataclass(frozen=True)
class DetectorSetup:
    """detector: rms, sample or peak; average_type: power or log; count: sweeps per trace (1: none)."""

    detector: str
    average_type: str
    count: int

    def extra(self) -> dict:
        """What a point stores of it (extra_json keys the analysis reads, analysis/detectors.py)."""
        return {"detector": self.detector, "average_type": self.average_type, "average_count": self.count}
