"""Connecting a run's bench: the simulator for a simulated bench, every instrument under
supervision, RF off at every source, and the check that a resumed run has its own instruments."""

from __future__ import annotations

import sys
from collections.abc import Callable
from contextlib import ExitStack

from tonebench.config.bench_file import LoadedBench
from tonebench.errors import InputError
from tonebench.instruments.dialect import load_dialect
from tonebench.instruments.open_bench import OpenBench, open_bench
from tonebench.instruments.scpi import identity
from tonebench.instruments.supervision import InstrumentEvent, RetryPolicy, Supervision
from tonebench.plan.limits import power_guard
from tonebench.planes.loss_table import LossTable
from tonebench.run.events import EventRelay
from tonebench.sim.launch import start_sim_bench


def print_warning(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr, flush=True)


def run_power_guard(bench: LoadedBench, offsets: dict[str, LossTable]):
    """The run-time check of every source power command: the bench file's limits on the power
    into the DUT and the analyzer (its dialect's damage level), with the run's path losses."""
    damage_dbm = load_dialect(bench.settings.instruments["analyzer"].dialect).limits.get("damage_dbm")
    return power_guard(offsets, bench.settings.limits, damage_dbm)


def connect_bench(stack: ExitStack, bench: LoadedBench, on_sim_started, warn: Callable[[str], None] | None = None,
                  offsets: dict[str, LossTable] | None = None) -> tuple[OpenBench, EventRelay, Supervision]:
    """Start the simulator for a simulated bench, then open every instrument under supervision
    and switch RF off at every source (an earlier command killed with RF on is said in an event
    and a warning); both are closed when `stack` unwinds. With the run's `offsets`, every source
    power command is checked against the bench limits from the sources' first command on."""
    resources, sim = bench_resources(stack, bench, on_sim_started)
    return open_resources(stack, bench, resources, sim, warn, offsets)


def bench_resources(stack: ExitStack, bench: LoadedBench, on_sim_started=None) -> tuple[dict[str, str], object]:
    """role -> VISA resource, and the running simulator (None on hardware); a simulated bench is
    started here and stopped when `stack` unwinds."""
    if not bench.settings.simulated:
        return {role: entry.resource for role, entry in bench.settings.instruments.items()}, None
    sim = stack.enter_context(start_sim_bench(bench.scenario))
    if on_sim_started:
        on_sim_started(sim)
    return dict(sim.resources), sim


def open_resources(stack: ExitStack, bench: LoadedBench, resources: dict[str, str], sim,
                   warn: Callable[[str], None] | None = None,
                   offsets: dict[str, LossTable] | None = None) -> tuple[OpenBench, EventRelay, Supervision]:
    """The second half of connect_bench, on resources already known."""
    relay = EventRelay()
    supervision = supervision_for(bench, relay)
    guard = None if offsets is None else run_power_guard(bench, offsets)
    open_instruments = open_bench(bench.settings, resources, supervision, guard)
    stack.callback(open_instruments.close)
    if sim is not None and open_instruments.chamber is not None:
        # The simulated chamber lives on the virtual clock: the soak's waits pass there.
        open_instruments.chamber.clock = lambda: sim.bench.clock_s
        open_instruments.chamber.sleep = sim.bench.advance
    for line in open_instruments.switch_off_at_connect():
        relay(InstrumentEvent(line.split(" ", 1)[0], "rf-found-on", "warning", line))
        (warn or print_warning)(line)
    return open_instruments, relay, supervision


def supervision_for(bench: LoadedBench, relay: EventRelay) -> Supervision:
    settings = bench.settings.unattended
    policy = RetryPolicy(retries=settings.retries, reconnects=settings.reconnects, backoff_s=settings.backoff_s,
                         max_backoff_s=max(5.0, settings.backoff_s))
    return Supervision(policy, relay, relay.activity)


def check_same_instruments(guid: str, stored_ids: dict[str, str], bench: OpenBench) -> None:
    """A resumed run must be measured with the instruments it started with (maker, model, serial)."""
    now = {info.role: info.idn for info in bench.instruments}
    if set(now) != set(stored_ids):
        raise InputError(
            f"run {guid} was measured with {', '.join(sorted(stored_ids))}; the bench now has {', '.join(sorted(now))}"
        )
    for role, idn in stored_ids.items():
        if identity(now[role]) != identity(idn):
            raise InputError(f"run {guid}: {role} was {idn!r}; the bench now has {now[role]!r}")
