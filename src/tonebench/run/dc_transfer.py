"""The DC transfer sweep: drain current against gate voltage at a fixed drain voltage, RF off.

Each gate step is settled by read-back: the gate supply must read the set voltage (within a
quarter of the step) before the drain current is read; a gate that does not get there is a
fault, not a point. The current reading's noise, which the derivatives' uncertainty needs, is
measured, not assumed: the drain current read noise_readings times at the first gate voltage
(its sample standard deviation).
"""

from __future__ import annotations

from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass, replace

import numpy as np

from tonebench.config.bench_file import LoadedBench
from tonebench.config.bias_settings import DcSweepSettings
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.bias import BiasSupplies
from tonebench.instruments.rf_guard import stop_signals
from tonebench.plan.limits import check_bias_voltages
from tonebench.run.bench_connection import connect_bench

READBACK_TRIES = 5


@dataclass(frozen=True)
class DcTransfer:
    """One DC transfer sweep (V, A), one entry per gate voltage."""

    drain_v: float
    gate_v: np.ndarray  # as set
    gate_read_v: np.ndarray
    drain_read_v: np.ndarray
    drain_current_a: np.ndarray
    current_sigma_a: float  # measured scatter of one drain-current reading
    chamber_read_c: float | None = None  # the chamber's reading after its soak, with a temperature


def sweep_transfer(bias: BiasSupplies, settings: DcSweepSettings, drain_v: float | None = None,
                   on_progress: Callable[[int, int], None] | None = None) -> DcTransfer:
    """Bias up at the first gate voltage, step the gate and read; the caller biases down."""
    gates_v = settings.gate_voltages_v()
    bias.bias_up(gates_v[0], drain_v)
    noise = [bias.drain.measure_current_a() for _ in range(settings.noise_readings)]
    rows = []
    for index, gate_v in enumerate(gates_v):
        bias.set_gate(gate_v)
        reading = _settled(bias, gate_v, 0.25 * settings.gate_step_v)
        rows.append((reading.gate_read_v, reading.drain_read_v, reading.drain_current_a))
        if on_progress:
            on_progress(index + 1, len(gates_v))
    gate_read, drain_read, drain_a = (np.array(column) for column in zip(*rows))
    return DcTransfer(bias.drain_v, np.array(gates_v), gate_read, drain_read, drain_a,
                      float(np.std(noise, ddof=1)))


def _settled(bias: BiasSupplies, gate_v: float, tolerance_v: float):
    for _ in range(READBACK_TRIES):
        reading = bias.read()
        if abs(reading.gate_read_v - gate_v) <= tolerance_v:
            return reading
        bias.sleep(max(bias.limits.settle_s, 0.01))
    raise InstrumentError(f"{bias.gate.label}: reads {reading.gate_read_v:.6g} V after {READBACK_TRIES} tries, "
                          f"set {gate_v:.6g} V (tolerance {tolerance_v:.3g} V)")


def measure_dc_transfer(bench: LoadedBench, settings: DcSweepSettings, drain_v: float | None,
                        origin: str, on_sim_started=None, on_progress=None,
                        temperature_c: float | None = None) -> DcTransfer:
    """Connect the bench (RF off at every source), soak the chamber at temperature_c (when
    given, before any bias), sweep, and bias down in order on every way out (Ctrl-C and SIGTERM
    raise once; the bias still goes down)."""
    if not bench.settings.has_bias:
        raise InputError(f"{origin}: a DC transfer sweep needs a bench with gate and drain supplies")
    check_bias_voltages(bench.settings.bias, settings.gate_voltages_v(), drain_v, origin)
    if temperature_c is not None and bench.settings.chamber is None:
        raise InputError(f"{origin}: a temperature needs a bench with a chamber (instruments.chamber, [chamber])")
    with ExitStack() as stack, stop_signals():
        instruments, _relay, _supervision = connect_bench(stack, bench, on_sim_started)
        chamber_read_c = None
        if temperature_c is not None:
            chamber_read_c = instruments.chamber.soak(temperature_c).read_c
        try:
            transfer = replace(sweep_transfer(instruments.bias, settings, drain_v, on_progress),
                               chamber_read_c=chamber_read_c)
        except BaseException:
            instruments.switch_bias_off()  # in its order; the error that ended the sweep is the one said
            raise
        failures = instruments.switch_bias_off()
        if failures:
            raise InstrumentError("bias off failed: " + "; ".join(failures))
        return transfer
