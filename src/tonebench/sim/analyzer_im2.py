"""The simulated analyzer's own second-order products (f2-f1, f1+f2), from its mixer's second-harmonic
intercept: the mixer IIP2 is SHI - 6 dB (two-tone IM2 6 dB over the harmonic at equal tone
power, from memory), rising dB for dB with the input attenuation."""

from __future__ import annotations

import numpy as np

from tonebench.sim import physics
from tonebench.units import dbm_to_vpeak, vpeak_to_dbm

SHI_TO_IIP2_DB = 6.0


def add_analyzer_im2(amp_v: np.ndarray, low_v: complex, high_v: complex, atten_db: float,
                     mixer_shi_dbm: float | None) -> None:
    """Add the analyzer's IM2 (referred to its input) to the f2-f1 and f1+f2 bins of amp_v, in phase
    with what is there (the worst case); nothing when mixer_shi_dbm is None."""
    if mixer_shi_dbm is None:
        return
    iip2_dbm = mixer_shi_dbm - SHI_TO_IIP2_DB + atten_db
    level_dbm = float(vpeak_to_dbm(abs(low_v))) + float(vpeak_to_dbm(abs(high_v))) - iip2_dbm
    for pq in ((-1, 1), (1, 1)):
        index = physics.product_bin(*pq)
        angle_rad = np.angle(amp_v[index]) if abs(amp_v[index]) > 0.0 else np.angle(low_v * high_v)
        amp_v[index] += complex(float(dbm_to_vpeak(level_dbm)) * np.exp(1j * angle_rad))
