"""Start a simulated bench in-process: four raw-SCPI instruments on free loopback ports, the
gate and drain supplies when the scenario has a FET, and the chamber when it has one."""

from __future__ import annotations

from tonebench.sim.chamber import SimChamberPanel
from tonebench.sim.signal_chain import SimBench
from tonebench.sim.faults import FaultSchedule
from tonebench.sim.mixer import LO_ROLE, LO_SOURCE_INDEX
from tonebench.sim.instruments import SimAnalyzer, SimPowerMeter, SimSource
from tonebench.sim.scenario import Scenario
from tonebench.sim.server import InstrumentServer
from tonebench.sim.supply_panel import SimSupplyPanel


class RunningSimBench:
    """A started simulated bench; `resources` maps role -> pyvisa resource string. Close it when done."""

    def __init__(self, bench: SimBench, servers: dict[str, InstrumentServer], faults: FaultSchedule):
        self.bench = bench
        self._servers = servers
        self.faults = faults  # add faults while it runs; `faults.fired` records what fired
        self.resources: dict[str, str] = {role: server.resource for role, server in servers.items()}

    def switch_off(self, role: str) -> None:
        """Stop serving one instrument, as if it were switched off (its port refuses connections)."""
        self._servers[role].stop()

    def close(self) -> None:
        for server in self._servers.values():
            server.stop()

    def __enter__(self) -> RunningSimBench:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def start_sim_bench(scenario: Scenario, faults: FaultSchedule | None = None) -> RunningSimBench:
    """Build the bench and serve source1, source2, analyzer, power_meter (and gate, drain with a
    FET scenario, chamber with a chamber) on free ports of 127.0.0.1."""
    bench = SimBench(scenario)
    schedule = faults if faults is not None else FaultSchedule(scenario.faults)
    devices = {"source1": SimSource(bench, 1), "source2": SimSource(bench, 2), "analyzer": SimAnalyzer(bench),
               "power_meter": SimPowerMeter(bench)}
    for number, (role, supply) in enumerate(bench.supplies.items(), start=1):
        devices[role] = SimSupplyPanel(supply, name=role, idn=f"tonebench,simulated DC supply,SIM-PS-{number:04d},0.1",
                                       bench_log=bench.log)
    if scenario.mixer is not None:  # its LO: a third source, same SCPI as the tone sources
        devices[LO_ROLE] = SimSource(bench, LO_SOURCE_INDEX)
    if bench.chamber is not None:
        devices["chamber"] = SimChamberPanel(bench.chamber, bench.log)
    servers: dict[str, InstrumentServer] = {}
    try:
        for role, device in devices.items():
            server = InstrumentServer(device, bench.lock, name=role, faults=schedule)
            server.start()
            servers[role] = server
    except BaseException:
        for server in servers.values():
            server.stop()
        raise
    return RunningSimBench(bench, servers, schedule)
