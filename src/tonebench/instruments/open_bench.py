"""Open the instruments a bench file names and hold them for one run."""

from __future__ import annotations

from dataclasses import dataclass, field

from tonebench.config.bench_file import OPTIONAL_ROLES, BenchFile
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.analyzer import SpectrumAnalyzer
from tonebench.instruments.bias import BiasSupplies
from tonebench.instruments.chamber import Chamber
from tonebench.instruments.dialect import Dialect, load_dialect
from tonebench.instruments.power_meter import PowerMeter
from tonebench.instruments.rf_guard import (
    RF_OFF_BUDGET_S,
    RfOffReport,
    shielded,
    switch_rf_off,
)
from tonebench.instruments.role_check import (
    check_distinct_identities,
    check_distinct_resources,
    check_role,
    shared_supply,
)
from tonebench.instruments.scpi import LimitError, ScpiInstrument
from tonebench.instruments.source import PowerGuard, SignalSource
from tonebench.instruments.supervision import Supervision
from tonebench.instruments.supply import DcSupply
from tonebench.instruments.transport import open_resource
from tonebench.plan.limits import FreqRange, SourceRange

# Which kind of dialect each bench role takes.
ROLE_KINDS = {"source1": "source", "source2": "source", "analyzer": "analyzer", "power_meter": "power_meter",
              "gate": "supply", "drain": "supply", "chamber": "chamber", "lo": "source"}


@dataclass(frozen=True)
class InstrumentInfo:
    role: str
    resource: str
    dialect: str
    idn: str


@dataclass
class OpenBench:
    source1: SignalSource
    source2: SignalSource
    analyzer: SpectrumAnalyzer
    source_ranges: tuple[SourceRange, SourceRange]
    instruments: list[InstrumentInfo] = field(default_factory=list)
    _scpi: list[ScpiInstrument] = field(default_factory=list)
    # At the DUT input plane, for calibration and leveling; only when the bench file names one.
    power_meter: PowerMeter | None = None
    last_rf_off: RfOffReport | None = None  # the last switch_rf_off, for the command's last line
    rf_off_budget_s: float = RF_OFF_BUDGET_S  # the bench file's [unattended] rf_off_s
    bias: BiasSupplies | None = None  # gate and drain, when the bench file names them
    chamber: Chamber | None = None  # when the bench file names one
    lo: SignalSource | None = None  # the LO of a mixer bench, when the bench file names one

    def sources(self) -> tuple[SignalSource, SignalSource]:
        return self.source1, self.source2

    def rf_sources(self) -> tuple[SignalSource, ...]:
        """Every source whose RF goes off on the way out: the two tones, and the LO when there is one."""
        return self.sources() + (() if self.lo is None else (self.lo,))

    def rf_on(self) -> None:
        self.source1.rf_on()
        self.source2.rf_on()

    def rf_off_all(self) -> None:
        """Switch RF off at every source, LO included (each read back); all are tried even if one
        fails or a signal comes (deferred meanwhile), then the failure is reported."""
        failures, interrupted = [], None
        with shielded():
            for source in self.rf_sources():
                try:
                    source.rf_off()
                except BaseException as exc:  # noqa: BLE001 - the other source must still be switched off
                    failures.append(f"{source.label}: {exc or type(exc).__name__}")
                    if not isinstance(exc, Exception) and interrupted is None:
                        interrupted = exc
        if interrupted is not None:
            raise interrupted  # a stop outside stop_signals: after both sources were tried
        if failures:
            raise InstrumentError("RF off failed: " + "; ".join(failures))

    def switch_rf_off(self, budget_s: float | None = None) -> RfOffReport:
        """RF off at both sources on the way out: confirmed by read-back, retried with backoff for
        up to budget_s seconds (default rf_off_budget_s); never raises (the report names any
        source not confirmed off)."""
        report = switch_rf_off(self.rf_sources(), budget_s=self.rf_off_budget_s if budget_s is None else budget_s)
        self.last_rf_off = report
        return report

    def bias_supplies(self) -> tuple[DcSupply, ...]:
        return () if self.bias is None else self.bias.supplies()

    def switch_bias_off(self) -> list[str]:
        """Bias down in its safe order (RF must already be off); a line per step that failed.
        Nothing to do when the watchdog already brought it down."""
        return [] if self.bias is None else self.bias.bias_down_if_up()

    def force_bias_off(self, lock_wait_s: float = 0.5) -> list[str] | None:
        """Bias down in its safe order from the watchdog's thread, after RF is off: a line per
        failed step; None when a supply's connection stayed busy (the run's stuck thread holds
        it), so the run's own ending brings the bias down."""
        return [] if self.bias is None else self.bias.bias_down_if_up(lock_wait_s)

    def switch_off_at_connect(self) -> list[str]:
        """RF off at every source as soon as the bench is connected: a run killed (kill -9, power
        lost) may have left one on. Returns a line per source that was found on (or unreadable)."""
        found = []
        for source in self.rf_sources():
            try:
                was_on = source.rf_is_on()
            except Exception as exc:  # noqa: BLE001 - unknown state: switch it off all the same
                was_on, why = None, f": {exc}"
            else:
                why = ""
            if was_on is not False:
                state = "on" if was_on else f"in an unknown state{why}"
                found.append(f"{source.label} was found with RF {state} (a command before this one ended "
                             "without switching it off)")
        report = self.switch_rf_off()
        if not report.ok:
            raise InstrumentError(f"connecting the bench: {report.line()}")
        lines = [f"{line}; switched off (read back)" for line in found]
        for supply in self.bias_supplies():
            if supply.output_is_on():
                lines.append(f"{supply.label} was found with its output on (a command before this one ended "
                             "without switching it off)")
        if len(lines) > len(found):
            failures = self.bias.bias_down()
            if failures:
                raise InstrumentError(f"connecting the bench: bias off failed: {'; '.join(failures)}")
            lines[len(found):] = [f"{line}; bias switched off in order" for line in lines[len(found):]]
        return lines

    @property
    def connections(self) -> list[ScpiInstrument]:
        """Every open instrument connection (their epochs tell a reopened one)."""
        return list(self._scpi)

    def restore_all(self) -> None:
        """Send every driver's last settings again (after a reset or a reopened connection)."""
        for driver in (*self.rf_sources(), self.analyzer, *self.bias_supplies(),
                       *([self.chamber] if self.chamber else [])):
            driver.restore()
        if self.power_meter is not None:
            self.power_meter.prepare()

    def force_rf_off_all(self, budget_s: float | None = None) -> RfOffReport:
        """RF off at both sources from another thread (the watchdog), while the run's thread may
        be stuck in a call: through a second connection where the first is busy, retried with
        backoff until read back off or budget_s (default rf_off_budget_s) is spent."""
        return switch_rf_off([_Forced(source) for source in self.rf_sources()],
                             budget_s=self.rf_off_budget_s if budget_s is None else budget_s)

    def close(self) -> None:
        for instrument in self._scpi:
            try:
                instrument.close()
            except Exception:  # noqa: BLE001 - closing is best effort, nothing is measured here
                pass


class _Forced:
    """A source whose RF off goes through force_rf_off (usable from another thread)."""

    def __init__(self, source: SignalSource):
        self.source = source
        self.label = source.label

    def rf_off(self) -> None:
        self.source.force_rf_off()

    def force_rf_off(self) -> None:
        self.source.force_rf_off()

    def rf_is_on(self) -> bool:
        # Never wait on a connection the stuck thread holds: the watchdog must go on.
        lock = self.source.instrument.io_lock
        if not lock.acquire(timeout=0.5):
            raise InstrumentError(f"{self.label}: its connection is busy; RF state not read")
        try:
            return self.source.rf_is_on()
        finally:
            lock.release()


def lo_power_guard(max_lo_dbm: float) -> PowerGuard:
    """The LO source's power check (SignalSource.power_guard): at most [limits] max_lo_dbm."""

    def guard(label: str, freq_hz: float, power_dbm: float) -> None:
        if power_dbm > max_lo_dbm + 1e-9:
            raise LimitError(f"{label}: {power_dbm:.2f} dBm would exceed the bench limit max_lo_dbm "
                             f"{max_lo_dbm:.2f} dBm")

    return guard


def bench_freq_ranges(settings: BenchFile) -> dict[str, FreqRange]:
    """role -> frequency range of every instrument a bench file names, from its dialect file; what
    the plan's pre-flight frequency checks (plan/limits.py) are given, before anything is connected."""
    ranges = {}
    for role, entry in settings.instruments.items():
        dialect = load_dialect(entry.dialect)
        limits = dialect.limits
        if "min_freq_hz" in limits and "max_freq_hz" in limits:
            ranges[role] = FreqRange(f"{role} (dialect {dialect.name})", limits["min_freq_hz"], limits["max_freq_hz"])
    return ranges


def role_dialects(settings: BenchFile) -> dict[str, Dialect]:
    """role -> its dialect, each loaded and checked to be of the role's kind (InputError if not)."""
    dialects = {}
    for role, entry in settings.instruments.items():
        dialect = load_dialect(entry.dialect)
        if dialect.role != ROLE_KINDS[role]:
            raise InputError(f"instruments.{role}: dialect {dialect.name} is for a {dialect.role}; "
                             f"this role needs a {ROLE_KINDS[role]} dialect")
        dialects[role] = dialect
    return dialects


def visa_library(settings: BenchFile) -> str:
    """The VISA library the bench is opened with: the bench file's choice, else pyvisa's own
    default on hardware; the simulated bench always goes through pyvisa-py (installed with us)."""
    if settings.bench.visa_library:
        return settings.bench.visa_library
    return "@py" if settings.simulated else ""


def open_bench(settings: BenchFile, resources: dict[str, str], supervision: Supervision | None = None,
               power_guard: PowerGuard | None = None) -> OpenBench:
    """Connect to source1, source2, analyzer and (if the bench file has one) the power meter;
    `resources` maps each role to a VISA resource. With `supervision`, timeouts and dropped
    connections are retried and reconnected per its policy.

    Refused (InputError) before anything else is sent: two roles on one resource or one
    instrument (*IDN? maker, model, serial), and an instrument that does not answer its role's
    probe (tonebench.instruments.role_check)."""
    opened: list[ScpiInstrument] = []
    roles = ["source1", "source2", "analyzer"] + [r for r in OPTIONAL_ROLES if r in settings.instruments]
    # Every role's dialect and resource before the first connection: a misspelled analyzer
    # dialect must not hide behind an unreachable source.
    dialects = role_dialects(settings)
    shared = shared_supply(settings, resources, dialects)
    check_distinct_resources(resources, roles, ("gate", "drain") if shared else None)
    library = visa_library(settings)
    by_role: dict[str, ScpiInstrument] = {}
    try:
        for role in roles:
            if shared and role == "drain":  # the gate's supply: one connection for both outputs
                by_role[role] = by_role["gate"]
                continue
            dialect = dialects[role]
            by_role[role] = ScpiInstrument(open_resource(resources[role], dialect, role, library), dialect, role,
                                           supervision, library)
            opened.append(by_role[role])
        for inst in opened:
            check_role(inst, ROLE_KINDS[inst.label])
        check_distinct_identities(opened)
        scpi1, scpi2, scpi_analyzer = opened[:3]
        meter = PowerMeter(by_role["power_meter"]) if "power_meter" in by_role else None
        if meter is not None:
            # After a reopened connection the meter may have lost its mode and frequency.
            by_role["power_meter"].add_restore_hook(meter.prepare)
        bias = None
        if settings.has_bias:
            gate, drain = (DcSupply(by_role[role], settings.instruments[role].channel, role) for role in ("gate", "drain"))
            bias = BiasSupplies(gate, drain, settings.bias)
            bias.check_limits()
        chamber = Chamber(by_role["chamber"], settings.chamber) if "chamber" in by_role else None
        source1, source2 = SignalSource(scpi1, power_guard), SignalSource(scpi2, power_guard)
        ranges = tuple(
            SourceRange(s.label, s.min_power_dbm, s.max_power_dbm) for s in (source1, source2)
        )
        infos = [InstrumentInfo(role, resources[role], by_role[role].dialect.name, by_role[role].idn) for role in roles]
        # The LO is checked against the bench's own LO limit from its first power command on.
        lo = SignalSource(by_role["lo"], lo_power_guard(settings.limits.max_lo_dbm)) if "lo" in by_role else None
        analyzer = SpectrumAnalyzer(scpi_analyzer)
        # The bench file knows this unit; its figures win over the dialect's typical ones.
        analyzer.performance = {**analyzer.performance, **settings.instruments["analyzer"].performance}
        return OpenBench(source1, source2, analyzer, ranges, infos, opened, meter,
                         rf_off_budget_s=settings.unattended.rf_off_s, bias=bias, chamber=chamber, lo=lo)
    except BaseException:
        for instrument in opened:
            instrument.close()
        raise
