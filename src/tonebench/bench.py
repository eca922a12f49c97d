"""Open the instruments a bench file names and hold them for one run."""

from __future__ import annotations

from dataclasses import dataclass, field

from tonebench.config.bench_file import OPTIONAL_ROLES, BenchFile
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.analyzer import SpectrumAnalyzer
from tonebench.instruments.dialect import load_dialect
from tonebench.instruments.power_meter import PowerMeter
from tonebench.instruments.scpi import ScpiInstrument
from tonebench.instruments.source import SignalSource
from tonebench.instruments.supervision import Supervision
from tonebench.instruments.transport import open_resource
from tonebench.safety import SourceRange

# Which kind of dialect each bench role takes.
ROLE_KINDS = {"source1": "source", "source2": "source", "analyzer": "analyzer", "power_meter": "power_meter"}


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

    def sources(self) -> tuple[SignalSource, SignalSource]:
        return self.source1, self.source2

    def rf_on(self) -> None:
        self.source1.rf_on()
        self.source2.rf_on()

    def rf_off_all(self) -> None:
        """Switch RF off at both sources; try both even if one fails, then report the failure."""
        failures = []
        for source in (self.source1, self.source2):
            try:
                source.rf_off()
            except Exception as exc:  # noqa: BLE001 - the other source must still be switched off
                failures.append(f"{source.label}: {exc}")
        if failures:
            raise InstrumentError("RF off failed: " + "; ".join(failures))

    @property
    def connections(self) -> list[ScpiInstrument]:
        """Every open instrument connection (their epochs tell a reopened one)."""
        return list(self._scpi)

    def restore_all(self) -> None:
        """Send every driver's last settings again (after a reset or a reopened connection)."""
        for driver in (self.source1, self.source2, self.analyzer):
            driver.restore()
        if self.power_meter is not None:
            self.power_meter.prepare()

    def force_rf_off_all(self) -> list[str]:
        """RF off at both sources from another thread (the watchdog); returns one line per source."""
        said = []
        for source in (self.source1, self.source2):
            try:
                said.append(f"{source.label} RF off {source.force_rf_off()}")
            except Exception as exc:  # noqa: BLE001 - the other source must still be switched off
                said.append(f"{source.label} RF off FAILED: {exc}")
        return said

    def close(self) -> None:
        for instrument in self._scpi:
            try:
                instrument.close()
            except Exception:  # noqa: BLE001 - closing is best effort, nothing is measured here
                pass


def open_bench(settings: BenchFile, resources: dict[str, str], supervision: Supervision | None = None) -> OpenBench:
    """Connect to source1, source2, analyzer and (if the bench file has one) the power meter;
    `resources` maps each role to a VISA resource. With `supervision`, timeouts and dropped
    connections are retried and reconnected per its policy.

    Refused (InputError) before anything else is sent: two roles on one resource or one
    instrument (*IDN? maker, model, serial), and an instrument that does not answer its role's
    probe (tonebench.instruments.role_check)."""
    from tonebench.instruments.role_check import check_distinct_identities, check_distinct_resources, check_role

    opened: list[ScpiInstrument] = []
    roles = ["source1", "source2", "analyzer"] + [r for r in OPTIONAL_ROLES if r in settings.instruments]
    try:
        for index, role in enumerate(roles):
            # Before opening each: an unreachable first instrument is reported as that.
            check_distinct_resources(resources, roles[: index + 1])
            dialect = load_dialect(settings.instruments[role].dialect)
            if dialect.role != ROLE_KINDS[role]:
                raise InputError(
                    f"instruments.{role}: dialect {dialect.name} is for a {dialect.role}; this role needs a {ROLE_KINDS[role]} dialect"
                )
            opened.append(ScpiInstrument(open_resource(resources[role], dialect), dialect, role, supervision))
        for inst in opened:
            check_role(inst, ROLE_KINDS[inst.label])
        check_distinct_identities(opened)
        scpi1, scpi2, scpi_analyzer = opened[:3]
        meter = PowerMeter(opened[3]) if len(opened) > 3 else None
        if meter is not None:
            # After a reopened connection the meter may have lost its mode and frequency.
            opened[3].add_restore_hook(meter.prepare)
        source1, source2 = SignalSource(scpi1), SignalSource(scpi2)
        ranges = tuple(
            SourceRange(s.label, s.min_power_dbm, s.max_power_dbm) for s in (source1, source2)
        )
        infos = [
            InstrumentInfo(inst.label, resources[inst.label], inst.dialect.name, inst.idn) for inst in opened
        ]
        analyzer = SpectrumAnalyzer(scpi_analyzer)
        # The bench file knows this unit; its figures win over the dialect's typical ones.
        analyzer.performance = {**analyzer.performance, **settings.instruments["analyzer"].performance}
        return OpenBench(source1, source2, analyzer, ranges, infos, opened, meter)
    except BaseException:
        for instrument in opened:
            instrument.close()
        raise
