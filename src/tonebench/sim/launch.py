"""Start a simulated bench in-process: three raw-SCPI instruments on free loopback ports."""

from __future__ import annotations

from tonebench.sim.bench import SimBench
from tonebench.sim.instruments import SimAnalyzer, SimSource
from tonebench.sim.scenario import Scenario
from tonebench.sim.server import InstrumentServer


class RunningSimBench:
    """A started simulated bench; `resources` maps role -> pyvisa resource string. Close it when done."""

    def __init__(self, bench: SimBench, servers: dict[str, InstrumentServer]):
        self.bench = bench
        self._servers = servers
        self.resources: dict[str, str] = {role: server.resource for role, server in servers.items()}

    def close(self) -> None:
        for server in self._servers.values():
            server.stop()

    def __enter__(self) -> RunningSimBench:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def start_sim_bench(scenario: Scenario) -> RunningSimBench:
    """Build the bench and serve source1, source2 and analyzer on free ports of 127.0.0.1."""
    bench = SimBench(scenario)
    devices = {"source1": SimSource(bench, 1), "source2": SimSource(bench, 2), "analyzer": SimAnalyzer(bench)}
    servers: dict[str, InstrumentServer] = {}
    try:
        for role, device in devices.items():
            server = InstrumentServer(device, bench.lock)
            server.start()
            servers[role] = server
    except BaseException:
        for server in servers.values():
            server.stop()
        raise
    return RunningSimBench(bench, servers)
