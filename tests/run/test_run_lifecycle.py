"""The sequencer on the simulated bench: RF off on every way out, each point committed as measured,
and a truthful run status. RF state is asserted from the simulator, not from what tonebench believes."""

import signal

import pytest
from conftest import SAMPLE_RUNS
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.errors import InstrumentError
from tonebench.instruments.rf_guard import Terminated
from tonebench.run.start import execute_run
from tonebench.store.models import Point, Run

PLAN = SAMPLE_RUNS / "demo_plan.toml"
BENCH = SAMPLE_RUNS / "sim_bench.toml"


class StopAfter:
    """A progress callback that raises once `count` points are stored, and keeps the simulator."""

    def __init__(self, count: int, make_exception):
        self.count = count
        self.make_exception = make_exception
        self.sim = None

    def started(self, sim) -> None:
        self.sim = sim

    def __call__(self, done: int, total: int) -> None:
        if done == self.count:
            self.make_exception()


def rf_states(sim) -> list[bool]:
    return [sim.bench.source(index).effective.rf_on or sim.bench.source(index).commanded.rf_on for index in (1, 2)]


def stored(db_path):
    engine = create_engine(f"sqlite:///{db_path}")
    with Session(engine) as session:
        run = session.scalars(select(Run)).one()
        keys = session.scalars(select(Point.point_key).where(Point.run_id == run.id)).all()
        return run.status, run.end_reason, keys


def raise_keyboard_interrupt():
    raise KeyboardInterrupt


def send_sigterm():
    signal.raise_signal(signal.SIGTERM)


def raise_instrument_error():
    raise InstrumentError("analyzer: -410, Query INTERRUPTED")


@pytest.mark.parametrize(
    "make_exception, expected_type, status, reason",
    [
        (raise_keyboard_interrupt, KeyboardInterrupt, "aborted", "Ctrl-C"),
        (send_sigterm, Terminated, "aborted", "SIGTERM"),
        (raise_instrument_error, InstrumentError, "failed", "Query INTERRUPTED"),
    ],
)
def test_rf_off_and_points_kept_on_every_way_out(tmp_path, make_exception, expected_type, status, reason):
    stopper = StopAfter(5, make_exception)
    db_path = tmp_path / "t.db"
    with pytest.raises(expected_type):
        execute_run(PLAN, BENCH, f"sqlite:///{db_path}", None, stopper, stopper.started)
    assert stopper.sim is not None
    assert rf_states(stopper.sim) == [False, False]
    # The simulator's own record shows RF was switched on, then off again at both sources.
    lines = [(instrument, line) for _, instrument, line in stopper.sim.bench.command_log]
    for source in ("source1", "source2"):
        rf_commands = [line for instrument, line in lines if instrument == source and line.startswith("OUTP ")]
        # RF off on connecting (a killed run may have left it on), on for the points, off at the end.
        assert rf_commands[:2] == ["OUTP OFF", "OUTP ON"] and rf_commands[-1] == "OUTP OFF", rf_commands
    run_status, end_reason, keys = stored(db_path)
    assert run_status == status and reason in end_reason
    assert len(keys) == 5 and len(set(keys)) == 5  # every measured point committed, once


def test_complete_run_ends_with_rf_off(tmp_path):
    captured = {}
    outcome = execute_run(PLAN, BENCH, f"sqlite:///{tmp_path / 't.db'}", tmp_path / "r.html",
                          None, lambda sim: captured.update(sim=sim))
    assert outcome.status == "complete"
    assert rf_states(captured["sim"]) == [False, False]
    run_status, end_reason, keys = stored(tmp_path / "t.db")
    assert run_status == "complete" and len(keys) == 51


def test_source_power_commands_stay_within_the_plan(tmp_path):
    """Every power command the simulator received is the tone target plus that arm's input loss."""
    captured = {}
    execute_run(PLAN, BENCH, f"sqlite:///{tmp_path / 't.db'}", tmp_path / "r.html", None,
                lambda sim: captured.update(sim=sim))
    bench = captured["sim"].bench
    powers_dbm = [float(line.split()[1]) for _, instrument, line in bench.command_log
                  if instrument.startswith("source") and line.startswith("SOUR:POW ")]
    assert len(powers_dbm) == 2 * 51
    # Demo plan: -40 .. -8 dBm per tone; the sample bench's input losses are 6.38 to 7.04 dB.
    assert min(powers_dbm) >= -40.0 + 6.38 - 0.01
    assert max(powers_dbm) <= -8.0 + 7.04 + 0.01


def test_exception_deep_in_a_point_still_ends_with_rf_off(tmp_path):
    """Another analyzer answers at the analyzer's address mid-run (IdentityChanged, never retried):
    the run fails with that reason, and both sources end with RF off in the simulator."""
    from tonebench.instruments.scpi import IdentityChanged
    from tonebench.sim.instruments import SimAnalyzer
    from tonebench.sim.server import InstrumentServer

    captured, servers = {}, []

    def swap_analyzer_after_four(done: int, total: int) -> None:
        if done != 4:
            return
        sim = captured["sim"]
        port = int(sim.resources["analyzer"].split("::")[2])
        sim.switch_off("analyzer")
        impostor = SimAnalyzer(sim.bench)
        impostor.idn = "tonebench,simulated spectrum analyzer,SIM-SA-0999,0.1"
        servers.append(InstrumentServer(impostor, sim.bench.lock, port=port))
        servers[-1].start()

    try:
        with pytest.raises(IdentityChanged, match="SIM-SA-0999"):
            execute_run(PLAN, BENCH, f"sqlite:///{tmp_path / 't.db'}", None, swap_analyzer_after_four,
                        lambda sim: captured.update(sim=sim))
    finally:
        for server in servers:
            server.stop()
    assert rf_states(captured["sim"]) == [False, False]
    run_status, end_reason, keys = stored(tmp_path / "t.db")
    assert run_status == "failed" and "IdentityChanged" in end_reason and len(keys) == 4
