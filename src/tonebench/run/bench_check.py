"""`tonebench bench check`: is every role of a bench file the instrument it should be, before the
first measurement?

Each role is opened on its own and given its role probe, so that every misfit is named at once
(not only the first). When all fit, the bench is opened as a run opens it (RF off at every
source, bias off in order) and each role answers a few harmless queries: its state, then its
error queue, which must be empty (an entry means a dialect query the instrument does not know).
Nothing is switched on; RF is off at both sources when it ends.
"""

from __future__ import annotations

from contextlib import ExitStack
from dataclasses import dataclass, field

from tonebench.config.bench_file import OPTIONAL_ROLES, REQUIRED_ROLES, LoadedBench
from tonebench.errors import InputError, TonebenchError
from tonebench.instruments.open_bench import (
    ROLE_KINDS,
    OpenBench,
    role_dialects,
    visa_library,
)
from tonebench.instruments.role_check import (
    check_distinct_resources,
    check_role,
    shared_supply,
)
from tonebench.instruments.scpi import ScpiInstrument
from tonebench.instruments.scpi_errors import ScpiErrors
from tonebench.instruments.transport import library_in_use, open_resource
from tonebench.run.bench_connection import bench_resources, open_resources
from tonebench.units import format_freq


@dataclass
class RoleCheck:
    role: str
    resource: str
    dialect: str
    idn: str | None = None
    limits: list[str] = field(default_factory=list)
    state: list[str] = field(default_factory=list)
    problem: str | None = None


@dataclass
class BenchCheck:
    library: str
    roles: list[RoleCheck]
    bench_limits: list[str]


def check_bench(bench: LoadedBench, warn=None) -> BenchCheck:
    """Open every role, check it fits, read its state; never switches anything on."""
    settings = bench.settings
    dialects = role_dialects(settings)  # a wrong dialect is the file's fault: refused at once
    roles = [*REQUIRED_ROLES, *(role for role in OPTIONAL_ROLES if role in settings.instruments)]
    library = visa_library(settings)
    with ExitStack() as stack:
        resources, sim = bench_resources(stack, bench)
        shared = shared_supply(settings, resources, dialects)
        check_distinct_resources(resources, roles, ("gate", "drain") if shared else None)
        checks = [RoleCheck(role, resources[role], dialects[role].name, limits=_limits(bench, role, dialects[role]))
                  for role in roles]
        for check in checks:
            if shared and check.role == "drain":  # the gate's supply, already checked
                gate = next(c for c in checks if c.role == "gate")
                check.idn, check.problem = gate.idn, gate.problem
                continue
            check.idn, check.problem = _fit(check, dialects[check.role], library)
        if all(check.problem is None for check in checks):
            opened, _relay, _supervision = open_resources(stack, bench, resources, sim, warn)
            for check in checks:
                check.state, check.problem = _state(opened, check.role)
    return BenchCheck(library_in_use(library), checks, _bench_limits(bench))


def _fit(check: RoleCheck, dialect, library: str) -> tuple[str | None, str | None]:
    """(identify reply, problem) for one role opened on its own."""
    try:
        inst = ScpiInstrument(open_resource(check.resource, dialect, check.role, library), dialect, check.role,
                              visa_library=library)
    except InputError as exc:
        return None, str(exc)
    idn = None
    try:
        idn = inst.idn
        check_role(inst, ROLE_KINDS[check.role])
        return idn, None
    except TonebenchError as exc:
        return idn, str(exc)
    finally:
        inst.close()


def _state(opened: OpenBench, role: str) -> tuple[list[str], str | None]:
    """A few read-only queries of one role, then its error queue."""
    lines: list[str] = []
    try:
        if role in ("source1", "source2"):
            state = (opened.source1 if role == "source1" else opened.source2).read_state()
            lines.append(f"RF {'on' if state.rf_on else 'off'}, {_freq(state.freq_hz)}, {_dbm(state.power_dbm)}")
        elif role == "analyzer":
            inst = opened.analyzer.instrument
            status = inst.call("read_status") >> inst.dialect.status["overload_bit"]
            lines.append(f"sweep time {inst.call('read_sweep_time') * 1e3:.4g} ms at its present settings, "
                         f"input {'OVERLOADED' if status & 1 else 'not overloaded'}")
        elif role in ("gate", "drain"):
            supply = opened.bias.gate if role == "gate" else opened.bias.drain
            voltage_v, current_a = supply.measure()
            tripped = supply.tripped()
            trip = "" if tripped is None else (", protection TRIPPED" if tripped else ", protection not tripped")
            lines.append(f"channel {supply.channel}: output {'on' if supply.output_is_on() else 'off'}, "
                         f"{voltage_v:.4f} V, {current_a * 1e3:.4g} mA{trip}")
        elif role == "chamber":
            chamber = opened.chamber
            lines.append(f"set point {chamber.instrument.call('read_set_point'):.1f} degC, "
                         f"reads {chamber.temperature_c():.2f} degC")
        _connection(opened, role).check_errors()
        lines.append("error queue empty")
    except ScpiErrors as exc:
        return lines, f"its error queue holds entries after harmless queries (a dialect query it does not know?): {exc}"
    except TonebenchError as exc:
        return lines, str(exc)
    return lines, None


def _connection(opened: OpenBench, role: str) -> ScpiInstrument:
    """The role's connection (gate and drain may share one: two outputs of one supply)."""
    if role in ("gate", "drain"):
        return (opened.bias.gate if role == "gate" else opened.bias.drain).instrument
    return next(inst for inst in opened.connections if inst.label == role)


def _limits(bench: LoadedBench, role: str, dialect) -> list[str]:
    """The limits in force for one role: its dialect's ranges and the bench file's own."""
    limits = dialect.limits
    lines = []
    if "min_freq_hz" in limits:
        lines.append(f"frequency {format_freq(limits['min_freq_hz'])} to {format_freq(limits['max_freq_hz'])} (dialect)")
    if "min_power_dbm" in limits:
        lines.append(f"level {limits['min_power_dbm']:+g} to {limits['max_power_dbm']:+g} dBm (dialect)")
    if "damage_dbm" in limits:
        lines.append(f"damage level {limits['damage_dbm']:+g} dBm, mixer overload above {limits['max_mixer_dbm']:+g} dBm (dialect)")
    settings = bench.settings
    if role == "analyzer":
        figures = {**dialect.performance, **settings.instruments["analyzer"].performance}
        lines.append("figures " + ", ".join(f"{key} {value:g}" for key, value in figures.items()))
    bias = settings.bias
    if role == "gate" and bias is not None:
        lines.append(f"[bias] gate {bias.gate_min_v:g} to {bias.gate_max_v:g} V, idle {bias.gate_idle_v:g} V, "
                     f"current limit {bias.gate_current_limit_a * 1e3:g} mA")
    if role == "drain" and bias is not None:
        lines.append(f"[bias] drain {bias.drain_v:g} V (at most {bias.drain_max_v:g} V), "
                     f"current limit {bias.drain_current_limit_a * 1e3:g} mA, ramp {bias.ramp_v_per_s:g} V/s")
    if role == "chamber" and settings.chamber is not None:
        chamber = settings.chamber
        lines.append(f"[chamber] {chamber.min_c:g} to {chamber.max_c:g} degC, soak within {chamber.tolerance_c:g} degC "
                     f"for {chamber.dwell_s:g} s (dialect {limits['min_temp_c']:g} to {limits['max_temp_c']:g} degC)")
    return lines


def _bench_limits(bench: LoadedBench) -> list[str]:
    limits = bench.settings.limits
    return [f"[limits] at most {limits.max_tone_dbm:+g} dBm per tone at the DUT input, "
            f"{limits.max_analyzer_input_dbm:+g} dBm total at the analyzer input, "
            f"expected gain {limits.expected_gain_db:g} dB"]


def _freq(freq_hz: float | None) -> str:
    return "frequency not readable" if freq_hz is None else format_freq(freq_hz)


def _dbm(power_dbm: float | None) -> str:
    return "level not readable" if power_dbm is None else f"{power_dbm:+.2f} dBm"
