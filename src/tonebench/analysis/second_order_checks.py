"""The analyzer's own second-order products against the IM2 readings: the IM2 counterpart of the
analyzer-limited (distortion) check of IM3 (system_checks.py, mixer_toi_dbm).

The analyzer's first mixer has a second-harmonic intercept SHI (dialect [performance]
mixer_shi_dbm, referred to the mixer at 0 dB attenuation): a tone P at the mixer makes a second
harmonic 2P - SHI. For y = a1 x + a2 x^2 the two-tone products at f2-f1 and f1+f2 have amplitude
a2 A1 A2, the harmonic a2 A^2 / 2, so at equal tone power the IM2 sits 6 dB above the harmonic:
the mixer's IIP2 is SHI - 6 dB (from memory; the usual relation between the two figures). Referred
to the analyzer input the intercept rises dB for dB with the attenuation, so the analyzer's IM2 at
its input is P1 + P2 - (SHI - 6 + A), with P1, P2 the tones at its input.

A point whose predicted analyzer IM2 lies within ANALYZER_IM2_MARGIN_DB under the (noise-corrected)
reading may hold a share of it large enough to move IIP2 by up to 20 log10(1 + 10^(-margin/20))
(in-phase sum; 0.83 dB at 20 dB, from memory): it is left out of that product's IIP2 fit, and
the sweep says how many.
"""

from __future__ import annotations

import numpy as np

from tonebench.analysis.sweep_fit import noise_corrected_dbm

SHI_TO_IIP2_DB = 6.0
ANALYZER_IM2_MARGIN_DB = 20.0  # as the system-made margin of IM3 (flags.SYSTEM_MARGIN_DB)


def analyzer_im2_dbm(tone1_dbm, tone2_dbm, atten_db, mixer_shi_dbm: float) -> np.ndarray:
    """The analyzer's own IM2 (f2-f1 and f1+f2 alike) at its input (dBm), for tones at its input."""
    iip2_dbm = mixer_shi_dbm - SHI_TO_IIP2_DB + np.asarray(atten_db, dtype=float)
    return np.asarray(tone1_dbm, dtype=float) + np.asarray(tone2_dbm, dtype=float) - iip2_dbm


def analyzer_made_im2(a: dict[str, np.ndarray], mixer_shi_dbm: float | None) -> dict[str, np.ndarray]:
    """Per product ("diff", "sum"), the points whose IM2 reading the analyzer's own may share
    (bool arrays); none without the analyzer's figure or its raw readings."""
    if mixer_shi_dbm is None:
        return {}
    predicted = analyzer_im2_dbm(a["raw_f1_dbm"], a["raw_f2_dbm"], a["atten_db"], mixer_shi_dbm)
    out = {}
    for name in ("diff", "sum"):
        # Noise-corrected as DUT-referred, then back at the analyzer input (less the output loss).
        reading, _ = noise_corrected_dbm(a[f"im2_{name}_dbm"], a[f"noise_{name}_dbm"])
        raw_reading = reading - (a[f"im2_{name}_dbm"] - a[f"raw_{name}_dbm"])
        with np.errstate(invalid="ignore"):
            out[name] = raw_reading - predicted < ANALYZER_IM2_MARGIN_DB
    return out


def note_of(made: dict[str, np.ndarray], mixer_shi_dbm: float | None) -> list[str]:
    """The sweep's note on the check: how many points of each product it left out."""
    counts = {name: int(np.sum(mask)) for name, mask in made.items() if np.any(mask)}
    if not counts:
        return []
    listed = ", ".join(f"{n} {name}" for name, n in counts.items())
    return [(f"analyzer-limited (distortion) IM2: {listed} point(s) left out of IIP2, the analyzer's own IM2 "
             f"(mixer SHI {mixer_shi_dbm:g} dBm) predicted within {ANALYZER_IM2_MARGIN_DB:g} dB of the reading")]
