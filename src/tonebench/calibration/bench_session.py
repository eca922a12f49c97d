"""A bench opened for one calibration job: the simulator started for a simulated bench, the DUT or a
thru in place, RF off on connecting and on every way out (read back), Ctrl-C and SIGTERM raised once.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager

from tonebench.config.bench_file import LoadedBench
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.open_bench import OpenBench, open_bench
from tonebench.instruments.rf_guard import (
    SIGINT_EXIT,
    SIGTERM_EXIT,
    Terminated,
    attach_note,
    stop_signals,
)
from tonebench.sim.launch import start_sim_bench


@contextmanager
def calibration_bench(bench: LoadedBench, thru: bool, thru_in_place: bool,
                      on_sim_started: Callable[[object], None] | None = None,
                      on_warning: Callable[[str], None] | None = None) -> Iterator[OpenBench]:
    """Open the bench (starting the simulator for a simulated one) with the DUT or a thru in place.

    Like a run: RF off at every source on connecting (a command killed with RF on is warned
    about) and on every way out, confirmed by read-back; Ctrl-C and SIGTERM raise once."""
    if thru and not bench.settings.simulated and not thru_in_place:
        raise InputError(
            f"bench file {bench.path}: this measurement needs a thru in place of the DUT; connect one and "
            "confirm with --thru-in-place"
        )
    with stop_signals(), ExitStack() as stack:
        if bench.settings.simulated:
            sim = stack.enter_context(start_sim_bench(bench.scenario))
            with sim.bench.lock:
                sim.bench.set_thru(thru)
            resources = dict(sim.resources)
            if on_sim_started:
                on_sim_started(sim)
        else:
            resources = {role: entry.resource for role, entry in bench.settings.instruments.items()}
        opened = open_bench(bench.settings, resources)  # with the bench file's rf_off_s budget
        stack.callback(opened.close)
        for line in opened.switch_off_at_connect():
            (on_warning or _print_warning)(line)
        with _rf_off_on_the_way_out(opened):
            yield opened


def _print_warning(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr, flush=True)


@contextmanager
def _rf_off_on_the_way_out(opened: OpenBench) -> Iterator[None]:
    """RF off (read back, retried) however the block ends; a signal or a source left on gets
    the one line the command line prints. Nothing is stored before the block ends."""
    try:
        yield
    except BaseException as exc:
        report = opened.switch_rf_off()
        if isinstance(exc, (KeyboardInterrupt, Terminated)):
            what = "terminated by SIGTERM" if isinstance(exc, Terminated) else "interrupted by Ctrl-C"
            code = (SIGTERM_EXIT if isinstance(exc, Terminated) else SIGINT_EXIT) if report.ok else 1
            attach_note(exc, f"{what}: {report.line()}; calibration not stored", code)
        elif not report.ok:
            attach_note(exc, f"error: {exc}; {report.line()}", 1)
        raise
    report = opened.switch_rf_off()
    if not report.ok:
        raise InstrumentError(f"calibration: {report.line()}; nothing stored")


def provenance(opened: OpenBench, roles: tuple[str, ...], step: str) -> list[dict]:
    return [{"step": step, "role": i.role, "resource": i.resource, "idn": i.idn}
            for i in opened.instruments if i.role in roles]
