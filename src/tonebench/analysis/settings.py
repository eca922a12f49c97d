"""What the analysis knows about the test system: the analyzer's level accuracy, its mixer limits and
the system's residual intercept (plain values; the results layer fills them from a bench and a
calibration set)."""

from __future__ import annotations

from dataclasses import dataclass

# Default relative level accuracy of the analyzer between a tone and an IM3 reading 40..100 dB
# below it (display scale fidelity and reference-level switching; a typical datasheet figure
# for a swept analyzer, from memory). Configurable per bench.
DEFAULT_LEVEL_ACCURACY_DB = 0.2


@dataclass(frozen=True)
class AnalysisSettings:
    """What the analysis knows about the test system (dB, dBm); None where unknown.

    mixer_toi_dbm, max_mixer_dbm: the analyzer's (dialect [performance]/[limits] or bench file);
    system_ip3_dbm: the system's residual intercept at the DUT input plane (calibration set),
    charged whole to the sources at every attenuation when residual_atten_db is None;
    system_note: why there is none, said when the source-intermod check is skipped.
    With residual_atten_db given, the residual is charged per point at the point's attenuation:
    source_ip3_dbm (the sources' share; a bound, the share at most this large, when
    source_ip3_is_bound) plus analyzer_ip3_dbm (the analyzer's share at residual_atten_db, falling
    with more attenuation); a share None is absent.
    """

    level_accuracy_db: float = DEFAULT_LEVEL_ACCURACY_DB
    mixer_toi_dbm: float | None = None
    mixer_shi_dbm: float | None = None  # the analyzer's second-harmonic intercept (second_order_checks.py)
    max_mixer_dbm: float | None = None
    system_ip3_dbm: float | None = None
    system_note: str | None = None
    source_ip3_dbm: float | None = None
    source_ip3_is_bound: bool = False
    analyzer_ip3_dbm: float | None = None
    residual_atten_db: float | None = None
    # The analyzer's LO phase noise (dialect [performance]) and the sweep's spacing, for the
    # reciprocal-mixing check (analysis/phase_noise.py); None: not checked.
    phase_noise_dbc_per_hz: float | None = None
    phase_noise_offset_hz: float | None = None
    spacing_hz: float | None = None
