"""The simulated analyzer's detector, video filter domain and trace averaging, on noise and lines.

Model (each trace point, one sweep): the envelope behind the RBW filter is a line's phasor plus
circular complex Gaussian noise, so one envelope-power sample is |a + n|^2 (exponential for noise
alone: the Rayleigh envelope; Rician with a line). The detector sees `bin_samples` independent
samples per trace point (the scenario's noise_averages), each first smoothed by the video filter
over `video_samples` = max(1, RBW/VBW) samples, in power (average type POWER) or in dB (LOG: the
log-scale video filter). Then:
  rms    - the power mean of every sample in the bin;
  sample - one video-filtered sample;
  peak   - the largest video-filtered sample of the bin;
and trace averaging over `count` sweeps takes the power mean (POWER) or the mean in dB (LOG).

Known biases on noise alone (tests/sim/test_detector.py measures them):
  rms, either type: unbiased in power (a power mean); with LOG the dB mean of Gamma(k) readings
    is 10 log10(e) (psi(k) - ln k) dB, k = bin_samples * video_samples: -0.14 dB at k = 16.
  sample + LOG: the mean of 10 log10 of an exponential variable is -10 log10(e) * gamma_Euler =
    -2.507 dB re its mean, whatever the count (from memory: the textbook Rayleigh-envelope
    result behind the 2.51 dB log-averaging correction of spectrum-analyzer noise markers).
  sample + POWER: unbiased in power.
  peak: E[max of M exponential samples] = H_M (harmonic number) times the mean, +5.3 dB at
    M = 16 with no video smoothing; less with a narrow VBW. Not corrected by the analysis.
A line far above the noise reads the same with every detector (|a + n|^2 -> |a|^2).

The default (rms, POWER, no trace averaging) is the simulator's model before detectors were
modelled, draw for draw: signal_chain keeps calling physics.trace_power_w for it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.sim import physics

DETECTORS = ("rms", "sample", "peak")
AVERAGE_TYPES = ("power", "log")
MAX_AVERAGE_COUNT = 10_000
# Samples drawn per trace point are capped (the video smoothing beyond this changes the mean of
# the dB readings by far less than 0.01 dB; it only narrows their scatter).
MAX_VIDEO_SAMPLES = 64
EULER_GAMMA = 0.5772156649015329
# Mean of 10 log10 of an exponential variable re 10 log10 of its mean (see above).
LOG_SAMPLE_BIAS_DB = -10.0 * EULER_GAMMA / math.log(10.0)


@dataclass
class DetectorState:
    """What the analyzer was told: detector, average type, trace averaging on and its count."""

    detector: str = "rms"
    average_type: str = "power"
    averaging: bool = False
    average_count: int = 1

    @property
    def sweeps(self) -> int:
        """Sweeps one INITiate takes: the count with averaging on, else one."""
        return self.average_count if self.averaging else 1

    @property
    def is_default(self) -> bool:
        return self.detector == "rms" and self.average_type == "power" and self.sweeps == 1


def peak_bias_db(bin_samples: int) -> float:
    """Mean peak-detected noise power re its mean, in dB: 10 log10(H_M) (no video smoothing)."""
    return 10.0 * math.log10(sum(1.0 / k for k in range(1, bin_samples + 1)))


def line_power_w(trace_freq_hz: np.ndarray, line_freq_hz: np.ndarray, line_power_w_: np.ndarray,
                 rbw_hz: float) -> np.ndarray:
    """Power (W) of the spectral lines through the RBW filter at each trace frequency."""
    out = np.zeros(trace_freq_hz.shape)
    reach_hz = physics._LINE_REACH_RBW * rbw_hz  # the lines physics.trace_power_w takes
    near = ((line_freq_hz > trace_freq_hz.min() - reach_hz) & (line_freq_hz < trace_freq_hz.max() + reach_hz)
            & (line_power_w_ > 0.0))
    if near.any():
        response = physics.rbw_power_response(trace_freq_hz[:, None] - line_freq_hz[near][None, :], rbw_hz)
        out = response @ line_power_w_[near]
    return out


def _video(power: np.ndarray, log: bool) -> np.ndarray:
    """Video-filter the last axis (its samples): a power mean, or a dB mean returned in W."""
    if log:
        return 10.0 ** np.mean(np.log10(power), axis=-1)
    return np.mean(power, axis=-1)


def detected_power_w(lines_w: np.ndarray, noise_mean_w: np.ndarray, state: DetectorState, bin_samples: int,
                     video_samples: float, rng: np.random.Generator) -> np.ndarray:
    """The reading (W) at each trace point after detector, video filter and trace averaging."""
    log = state.average_type == "log"
    video = int(min(MAX_VIDEO_SAMPLES, max(1, round(video_samples))))
    points = np.shape(lines_w)[0]
    noise_mean_w = np.broadcast_to(np.asarray(noise_mean_w, dtype=float), (points,))
    sweeps = []
    for _ in range(state.sweeps):
        if state.detector == "rms":
            # The power mean of many samples: the line adds in power (its cross term with the
            # noise averages out), the noise a Gamma(k, 1/k) multiple of its mean.
            k = bin_samples * video_samples
            sweeps.append(lines_w + noise_mean_w * rng.gamma(k, 1.0 / k, size=points))
            continue
        per_bin = 1 if state.detector == "sample" else bin_samples
        shape = (points, per_bin, video)
        noise = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * np.sqrt(noise_mean_w / 2.0)[:, None, None]
        envelope_w = np.abs(np.sqrt(lines_w)[:, None, None] + noise) ** 2
        filtered_w = _video(envelope_w, log)  # (points, per_bin)
        sweeps.append(filtered_w.max(axis=1))
    stack = np.array(sweeps)
    return _video(stack.T, log)


def trace_reading_w(trace_freq_hz: np.ndarray, line_freq_hz: np.ndarray, line_w: np.ndarray, rbw_hz: float,
                    vbw_hz: float, noise_dbm_per_hz, bin_samples: int, state: DetectorState,
                    rng: np.random.Generator) -> np.ndarray:
    """One (averaged) trace read with a detector other than the default: physics.trace_power_w's
    lines and noise, then detected_power_w."""
    trace_freq_hz = np.asarray(trace_freq_hz, dtype=float)
    noise_mean_w = 1e-3 * 10.0 ** (np.asarray(noise_dbm_per_hz, dtype=float) / 10.0) * physics.noise_bandwidth_hz(rbw_hz)
    lines = line_power_w(trace_freq_hz, np.asarray(line_freq_hz, dtype=float), np.asarray(line_w, dtype=float), rbw_hz)
    return detected_power_w(lines, noise_mean_w, state, bin_samples, max(1.0, rbw_hz / vbw_hz), rng)
