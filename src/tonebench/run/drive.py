"""Measuring a prepared run: ownership, supervision and the watchdog
around the sequencer, then the end stored truthfully (tonebench.run.ending)."""

from __future__ import annotations

from collections.abc import Callable

from tonebench.config.plan_file import AnalyzerSettings
from tonebench.errors import InstrumentError
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.instruments.rf_guard import Terminated, stop_signals
from tonebench.instruments.supervision import RecoveryStopped
from tonebench.run import ending
from tonebench.run.ending import RunOutcome
from tonebench.run.mixer_run import MixerDrive
from tonebench.run.prepared import PreparedRun
from tonebench.run.sequencer import ProgressCallback, Sequencer
from tonebench.run.stopped import RunStopped
from tonebench.run.watchdog import Watchdog, WatchdogTripped
from tonebench.store.ownership import Heartbeat, take_ownership


def sweep_setup(settings: AnalyzerSettings) -> AnalyzerSetup:
    """The analyzer set-up the plan asks for, as the sequencer applies it."""
    return AnalyzerSetup(span_hz=settings.effective_span_hz, rbw_hz=settings.rbw_hz,
                         vbw_hz=settings.effective_vbw_hz, atten_db=settings.atten_db,
                         ref_level_dbm=settings.ref_level_dbm)


def plan_drain_v(plan_settings) -> float | None:
    """The drain voltage the plan's [bias] holds; None leaves the bench file's [bias] drain_v."""
    bias = getattr(plan_settings, "bias", None)
    return None if bias is None else bias.drain_v


def watchdog_seconds(run: PreparedRun) -> float:
    """The bench file's watchdog_s, raised if one sweep may legitimately take longer (narrow RBW)."""
    analyzer = run.instruments.analyzer
    settings = run.plan.settings.analyzer
    # A narrow IM3 read may take up to half the point's narrowing budget.
    sweep_s = max(analyzer.predicted_sweep_time_s(sweep_setup(settings)), (settings.narrowing_budget_s or 0.0) / 2)
    longest_wait_s = 2 * sweep_s + analyzer.instrument.dialect.io.query_timeout_s
    return max(run.bench.settings.unattended.watchdog_s, 2 * longest_wait_s)


def mixer_drive(run: PreparedRun) -> MixerDrive | None:
    """The LO and IF reading of a [mixer] plan (run/mixer_run.py); None for any other plan."""
    mixer = run.plan.settings.mixer
    if mixer is None:
        return None
    return MixerDrive(mixer, run.instruments.lo, run.plan.settings.analyzer.rbw_hz, run.log)


def drive(run: PreparedRun, on_progress: ProgressCallback | None,
          on_run_started: Callable[[str], None] | None, held_at_c: float | None = None) -> RunOutcome:
    """Measure what is left of the run with supervision, the run-time power guard and the
    watchdog; store the end truthfully; analyze and report the measured points.

    Ctrl-C and SIGTERM raise once (later signals cannot interrupt the cleanup); RF goes off in
    the sequencer's `finally`, confirmed by read-back, before the run's end is stored."""
    with stop_signals():
        watchdog = _take_over(run, on_run_started)
        sequencer = Sequencer(run.instruments, run.offsets, run.bench.settings.limits, run.plan.settings.analyzer,
                              run.recorder, run.leveler, second_order=run.plan.settings.sweep.second_order,
                              unattended=run.bench.settings.unattended, log=run.log, watchdog=watchdog,
                              drain_v=plan_drain_v(run.plan.settings),
                              target_drain_a=getattr(run.plan.settings.bias, "drain_current_a", None),
                              held_at_c=held_at_c, mixer=mixer_drive(run))
        heartbeat = Heartbeat(run.sessions, run.recorder.run_id)

        def progress(done: int, total: int) -> None:
            heartbeat.beat()
            if on_progress:
                on_progress(done, total)

        try:
            with watchdog:
                sequencer.run(run.points, progress, run.done_keys)
        except RunStopped as stop:
            return ending.stopped(run, sequencer.rf_report, stop.status, str(stop))
        except (KeyboardInterrupt, Terminated) as exc:
            ending.interrupted(run, sequencer.rf_report, exc)
            raise
        except Exception as exc:
            if watchdog.tripped is not None and isinstance(exc, (WatchdogTripped, RecoveryStopped, InstrumentError)):
                return ending.stopped(run, sequencer.rf_report, "aborted", watchdog.tripped)
            ending.failed(run, sequencer.rf_report, exc)
            raise
        return ending.measured(run, sequencer.rf_report, sequencer.failed_keys)


def _take_over(run: PreparedRun, on_run_started: Callable[[str], None] | None) -> Watchdog:
    """Make the run ours (said in a 'resume' event when resuming), route the instruments' events
    and activity to it; returns the watchdog, not yet started."""
    take_ownership(run.sessions, run.recorder.run_id, resuming=run.resume_note is not None)
    if run.resume_note is not None:
        run.log.event("info", "resume", run.resume_note, {"done": len(run.done_keys),
                                                          "remaining": len(run.points) - len(run.done_keys)})
    watchdog = Watchdog(watchdog_seconds(run), lambda reason: _trip(run, reason))
    run.relay.attach(run.log, watchdog.kick)
    if on_run_started:
        on_run_started(run.recorder.guid)
    return watchdog


def _trip(run: PreparedRun, reason: str) -> None:
    """The watchdog's action, in its own thread: stop recovery, RF off by any connection, retried
    until read back off (or the time allowed is spent), then the bias down in its order through
    the supplies' connections when they are free."""
    run.supervision.stop.set()  # no more retries, and no source turns RF on again
    report = run.instruments.force_rf_off_all()
    line = f"{reason}; {report.line()}"
    if run.instruments.bias is not None and run.instruments.bias.up:
        failures = run.instruments.force_bias_off() if report.ok else None  # never bias off under RF
        line += ("; bias left to the run's ending (RF not read back off, or a supply busy)" if failures is None
                 else f"; bias off failed: {'; '.join(failures)}" if failures else "; bias switched off in order")
    run.log.event("error", "watchdog", line)
