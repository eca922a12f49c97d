"""How a run ends, stored truthfully: complete or failed (analysed and reported), paused or
aborted by the failure policy or the watchdog, interrupted by a signal, stopped by an error or a
cancel. RF has gone off (the sequencer's report says how) before the end is stored."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.engine import make_url

from tonebench.errors import TonebenchError
from tonebench.instruments.rf_guard import (
    SIGINT_EXIT,
    SIGTERM_EXIT,
    RfOffReport,
    Terminated,
    attach_note,
    shielded,
)
from tonebench.instruments.scpi import LimitError
from tonebench.report.run_page import write_run_report
from tonebench.results.stored_results import analyze_run
from tonebench.run.prepared import PreparedRun


class RunCancelled(TonebenchError):
    """Raised by a progress callback to stop the run after the point in hand (RF off, the run
    stored as aborted with this message); whoever runs the run decides when (e.g. a queue's cancel)."""


@dataclass
class RunOutcome:
    """How a run ended. status: complete (every point measured), failed (points failed; the
    measured ones analysed), paused or aborted (by the failure policy or the watchdog)."""

    guid: str
    status: str
    db_url: str
    report_path: Path | None
    results: list
    calibration: str | None = None  # the calibration set's name
    reason: str = ""  # the stored end reason
    rf_off: str | None = None  # how RF went off: "RF off at source1, source2 (read back)"
    rf_confirmed: bool = True  # False when a source could not be read back off
    points_measured: int = 0
    points_failed: int = 0
    bench_time: "BenchTimeTaken | None" = None


@dataclass(frozen=True)
class BenchTimeTaken:
    """The bench time estimated before RF went on, and what the run took by `clock`: the
    simulated bench's virtual clock (its instruments' own time), else the wall clock (software
    and command latency included)."""

    estimated_s: float
    taken_s: float
    clock: str  # "virtual" or "wall"

    def line(self) -> str:
        from tonebench.units import format_duration

        change = 100.0 * (self.taken_s / self.estimated_s - 1.0) if self.estimated_s > 0 else 0.0
        where = "the simulated bench's virtual clock" if self.clock == "virtual" else "wall clock, software included"
        return (f"bench time: {format_duration(self.taken_s)} taken, {format_duration(self.estimated_s)} estimated "
                f"({change:+.0f} %, {where})")


def default_report_path(db_url: str, guid: str) -> Path:
    """Beside an SQLite database file, else in the current folder."""
    url = make_url(db_url)
    folder = Path(url.database).resolve().parent if url.get_backend_name() == "sqlite" and url.database else Path.cwd()
    return folder / f"report-{guid[:8]}.html"


def rf_said(report: RfOffReport | None) -> RfOffReport:
    """The sequencer's RF-off report; a run that never got there has one saying so."""
    if report is not None:
        return report
    return RfOffReport(unconfirmed={"source1": "RF off not attempted", "source2": "RF off not attempted"})


def _finish(run: PreparedRun, status: str, reason: str, report: RfOffReport) -> str:
    """Store the run's end (shielded from signals); a source not confirmed off is part of it."""
    if not report.ok:
        reason = f"{reason}; {report.line()}"
    with shielded():
        run.recorder.finish(status, reason)
        run.log.line("info" if status == "complete" else "error", "run-end", f"run {status}: {reason}")
    return reason


def stopped(run: PreparedRun, report: RfOffReport | None, status: str, reason: str) -> RunOutcome:
    """Paused or aborted by the failure policy or the watchdog: RF off, the reason stored."""
    report = rf_said(report)
    reason = _finish(run, status, reason, report)
    return RunOutcome(run.recorder.guid, status, run.db_url, None, [], run.calibration, reason=reason,
                      rf_off=report.line(), rf_confirmed=report.ok)


def interrupted(run: PreparedRun, report: RfOffReport | None, exc: BaseException) -> None:
    """Ctrl-C or SIGTERM: the run stored as aborted, and the one line the command line prints."""
    what = "terminated by SIGTERM" if isinstance(exc, Terminated) else "interrupted by Ctrl-C"
    report = rf_said(report)
    _finish(run, "aborted", what, report)
    short = run.recorder.guid[:8]
    code = (SIGTERM_EXIT if isinstance(exc, Terminated) else SIGINT_EXIT) if report.ok else 1
    attach_note(exc, f"{what}: {report.line()}; run {short} stored as aborted; `tonebench resume {short}` "
                     "continues it", code)


def failed(run: PreparedRun, report: RfOffReport | None, exc: Exception) -> None:
    """An error ended the run: stored as aborted (refused at run time, cancelled) or failed."""
    report = rf_said(report)
    if isinstance(exc, LimitError):
        run.log.event("error", "limit-refused", str(exc))
        _finish(run, "aborted", f"refused at run time: {exc}", report)
    elif isinstance(exc, RunCancelled):
        _finish(run, "aborted", str(exc), report)
    else:
        _finish(run, "failed", f"{type(exc).__name__}: {exc}", report)
    if not report.ok:
        attach_note(exc, f"error: {exc}; {report.line()}", 1)


def measured(run: PreparedRun, report: RfOffReport | None, failed_keys: list[str]) -> RunOutcome:
    """Every point was tried: 'complete' only when every one was measured; 'failed' otherwise,
    with the measured ones (if any) analysed and reported."""
    report = rf_said(report)
    total, failed_count = len(run.points), len(failed_keys)
    measured_count = total - failed_count
    again = "reasons stored with the points; `tonebench resume` measures them again"
    if failed_count == 0:
        status, reason = "complete", f"all {total} points measured"
    elif measured_count == 0:
        status, reason = "failed", f"no point measured: all {total} failed ({again})"
    else:
        status, reason = "failed", f"{measured_count} of {total} points measured, {failed_count} failed ({again})"
    reason = _finish(run, status, reason, report)
    results, report_path = [], None
    if measured_count:
        results = analyze_run(run.sessions, run.recorder.guid)
        report_path = write_run_report(run.sessions, run.recorder.guid,
                                       run.report_path or default_report_path(run.db_url, run.recorder.guid))
    return RunOutcome(run.recorder.guid, status, run.db_url, report_path, results, run.calibration, reason=reason,
                      rf_off=report.line(), rf_confirmed=report.ok, points_measured=measured_count,
                      points_failed=failed_count)
