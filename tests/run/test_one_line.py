"""Operations joined on one line (`[io] one_line = true` in a dialect): the same run as one
operation per line, the same stored readings, in fewer lines; faults on a joined line still
handled; a reply with the wrong number of parts taken as a late reply."""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import SAMPLE_RUNS
from stored_rows import stored
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.config.bench_file import load_bench
from tonebench.instruments import load_dialect, open_resource
from tonebench.instruments.scpi import CommandRefused, ConnectionFault, ScpiError, ScpiInstrument, split_replies
from tonebench.packaged import data_dir
from tonebench.run.start import execute_run
from tonebench.sim.faults import FaultSpec
from tonebench.sim.launch import start_sim_bench
from tonebench.store.models import Point


def one_line_bench(folder: Path, one_line: bool) -> Path:
    """The sample simulated bench with its dialects copied, joining operations or not."""
    text = (SAMPLE_RUNS / "sim_bench.toml").read_text()
    for name in ("generic-source", "generic-analyzer"):
        dialect = (data_dir("drivers") / f"{name}.toml").read_text()
        if one_line:
            dialect = dialect.replace("query_timeout_s = 5.0", "query_timeout_s = 5.0\none_line = true")
        path = folder / f"{name}-{one_line}.toml"
        path.write_text(dialect)
        text = text.replace(f'dialect = "{name}"', f'dialect = "{path}"')
    bench = folder / f"bench-{one_line}.toml"
    bench.write_text(text)
    return bench


def test_a_run_on_one_line_stores_the_same_readings_in_fewer_lines(tmp_path):
    runs = {}
    for one_line in (False, True):
        sims = []
        db = f"sqlite:///{tmp_path / f'{one_line}.db'}"
        outcome = execute_run(SAMPLE_RUNS / "demo_plan.toml", one_line_bench(tmp_path, one_line), db, None,
                              on_sim_started=sims.append)
        assert outcome.status == "complete", outcome.reason
        with Session(create_engine(db)) as session:
            readings = [(p.point_key, p.raw_f1_dbm, p.raw_f2_dbm, p.raw_lower_dbm, p.raw_upper_dbm, p.raw_noise_lower_dbm)
                        for p in session.scalars(select(Point).order_by(Point.seq))]
        lines = [line for _, _, line in sims[0].bench.command_log]
        runs[one_line] = (readings, lines, outcome)
    (apart, apart_lines, apart_run), (joined, joined_lines, joined_run) = runs[False], runs[True]
    assert joined == apart  # same commands in the same order: the same simulated readings
    assert [r.iip3_dbm for r in joined_run.results] == [r.iip3_dbm for r in apart_run.results]
    assert len(joined_lines) < 0.6 * len(apart_lines), (len(joined_lines), len(apart_lines))
    # Each read's status, both markers, its sweep time and the error queue come back on one line;
    # each source's *OPC? and its error queue too: no error query on a line of its own per point.
    assert any(line.startswith("STAT:QUES:COND?;:CALC:MARK1:X ") and line.endswith(";:SWE:TIME?;:SYST:ERR?")
               for line in joined_lines)
    assert "*OPC?;:SYST:ERR?" in joined_lines
    assert joined_lines.count("SYST:ERR?") < 10 < apart_lines.count("SYST:ERR?") / 10
    assert not any(";" in line for line in apart_lines)


def test_a_reply_with_the_wrong_number_of_parts_is_a_late_reply(tmp_path):
    bench = load_bench(one_line_bench(tmp_path, True))
    dialect = load_dialect(str(tmp_path / "generic-analyzer-True.toml"))
    with start_sim_bench(bench.scenario) as sim:
        inst = ScpiInstrument(open_resource(sim.resources["analyzer"], dialect, "analyzer"), dialect, "analyzer")
        status, sweep_time_s = inst.call_many([("read_status", {}), ("read_sweep_time", {})])
        assert status == 0 and sweep_time_s > 0
        assert sim.bench.command_log[-1][2] == "STAT:QUES:COND?;:SWE:TIME?"
        # Two queries on the line, three parts in the reply: not this line's answer.
        inst.resource.write("*OPC?")  # its reply "1" arrives first, as a late reply would
        with pytest.raises(ConnectionFault, match="expected 2 replies joined by ';'"):
            inst.call_many([("read_status", {}), ("read_sweep_time", {})])


def test_an_error_entry_on_a_joined_line_is_split_outside_its_quotes(tmp_path):
    """The simulator's error text holds a ';' (device info after the standard text, SCPI-1999
    vol 2 21.8, from memory): the entry on the line of the refused setting is read whole."""
    bench = load_bench(one_line_bench(tmp_path, True))
    dialect = load_dialect(str(tmp_path / "generic-analyzer-True.toml"))
    with start_sim_bench(bench.scenario) as sim:
        inst = ScpiInstrument(open_resource(sim.resources["analyzer"], dialect, "analyzer"), dialect, "analyzer")
        assert inst.call_many_checked([("read_sweep_time", {})])[0] > 0
        assert sim.bench.command_log[-1][2] == "SWE:TIME?;:SYST:ERR?"
        inst.resource.write("BANDX 10")  # an undefined header, as a wrong dialect would send
        with pytest.raises(CommandRefused, match=r"-113, Undefined header;BANDX") as refused:
            inst.call_many_checked([("read_sweep_time", {})])
        assert refused.value.entries == [ScpiError(-113, "Undefined header;BANDX")]
        lines = [line for _, _, line in sim.bench.command_log]
        assert lines[-2:] == ["SWE:TIME?;:SYST:ERR?", "SYST:ERR?"]  # the rest of the queue, then empty
        # Read empty and nothing sent since: a drain has nothing to read and sends nothing.
        inst.check_errors()
        assert len(sim.bench.command_log) == len(lines)
        inst.call("read_sweep_time")
        inst.check_errors()
        assert sim.bench.command_log[-1][2] == "SYST:ERR?"


def test_a_joined_reply_with_an_open_quote_is_one_clear_fault(tmp_path):
    bench = load_bench(one_line_bench(tmp_path, True))
    dialect = load_dialect(str(tmp_path / "generic-analyzer-True.toml"))
    with start_sim_bench(bench.scenario) as sim:
        inst = ScpiInstrument(open_resource(sim.resources["analyzer"], dialect, "analyzer"), dialect, "analyzer")
        inst.resource.write('*OPC?;:SYST:ERR?;:SYST:ERR?')  # late: 1;0,"No error";0,"No error"
        with pytest.raises(ConnectionFault, match=r"expected 2 replies joined by ';' \(quotes closed\)"):
            inst.call_many([("read_sweep_time", {}), ("next_error", {})])
    assert split_replies('1;-113,"Undefined header;BANDX"') == ["1", '-113,"Undefined header;BANDX"']
    assert split_replies('0,"say ""a;b"""') == ['0,"say ""a;b"""']
    assert split_replies('1;0,"No error') is None


JOINED_FAULTS = [
    {"instrument": "analyzer", "kind": "stall", "on": "STAT:QUES:COND?", "nth": 20, "duration_s": 1.2},
    {"instrument": "analyzer", "kind": "drop", "on": "STAT:QUES:COND?", "nth": 45},
    {"instrument": "source1", "kind": "reboot", "on": "*ESR?", "nth": 10},
    {"instrument": "source2", "kind": "reboot", "on": "SOUR:POW", "nth": 20, "keep_connection": True},
    {"instrument": "analyzer", "kind": "reboot", "on": "FREQ:CENT", "nth": 60, "keep_connection": True},
]


def test_faults_on_joined_lines_are_recovered(tmp_path):
    from sim_runs import rf_is_off, write_bench, write_plan

    bench = write_bench(tmp_path, faults=JOINED_FAULTS)
    for dialect in tmp_path.glob("*-fast.toml"):
        dialect.write_text(dialect.read_text().replace("[io]\n", "[io]\none_line = true\n", 1))
    sims = []
    outcome = execute_run(write_plan(tmp_path), bench, f"sqlite:///{tmp_path / 't.db'}", None,
                          on_sim_started=sims.append)
    assert outcome.status == "complete", outcome.reason
    sim = sims[0]
    assert sim.faults.pending() == [] and len(sim.faults.fired) == len(JOINED_FAULTS)
    assert any(";" in line for _, _, line in sim.bench.command_log)
    with Session(create_engine(f"sqlite:///{tmp_path / 't.db'}")) as session:
        points = session.scalars(select(Point)).all()
    assert points and all(p.status == "measured" for p in points)
    assert len({p.point_key for p in points}) == len(points)
    assert rf_is_off(sim)


def test_the_error_query_rides_on_a_points_last_read_and_an_error_on_any_read_remeasures_it(tmp_path):
    """With one_line a plain point's error query goes on its last read's line only; an error
    entry left by any earlier read of the point is still read before the point is accepted, and
    the point is measured again (run/sequencer.py, instruments/analyzer.errors_read_once)."""
    bench = one_line_bench(tmp_path, True)
    # Error entries on three read lines far enough apart to fall in three different points.
    faults = "".join(f'\n[[simulation.faults]]\ninstrument = "analyzer"\nkind = "error"\n'
                     f'on = "STAT:QUES:COND?"\nnth = {nth}\ncode = -222\n' for nth in (41, 62, 83))
    bench.write_text(bench.read_text() + faults)
    sims = []
    db = tmp_path / "faults.db"
    outcome = execute_run(SAMPLE_RUNS / "demo_plan.toml", bench, f"sqlite:///{db}", None, on_sim_started=sims.append)
    assert outcome.status == "complete", outcome.reason
    status, _, points, keys, events = stored(db)
    assert status == "complete"
    assert len(keys) == len(set(keys)) == 51 and all(p.status == "measured" for p in points.values())
    assert len(sims[0].faults.fired) == 3
    retries = [message for kind, message in events if kind == "point-retry"]
    assert len(retries) == 3 and all("simulated fault" in message for message in retries), retries
    analyzer = [line for _, instrument, line in sims[0].bench.command_log if instrument == "analyzer"]
    reads = [line for line in analyzer if line.startswith("STAT:QUES:COND?;")]
    with_errors = [line for line in reads if line.endswith(";:SYST:ERR?")]
    # Every point's last read carries it (51 points and 3 retries), not all four of its reads.
    assert 51 + 3 <= len(with_errors) < 0.5 * len(reads), (len(with_errors), len(reads))


def test_a_read_after_the_one_carrying_the_error_query_still_has_its_errors_read(tmp_path):
    """Inside errors_read_once(on_every_read=False), a read sent after the one that carried the
    error query leaves the queue unchecked: the drain at the end reads it and raises."""
    from tonebench.instruments.open_bench import open_bench
    from tonebench.instruments.scpi import ScpiErrors

    bench = load_bench(one_line_bench(tmp_path, True))
    with start_sim_bench(bench.scenario) as sim:
        instruments = open_bench(bench.settings, sim.resources)
        try:
            analyzer = instruments.analyzer
            analyzer.prepare()
            with analyzer.errors_read_once(on_every_read=False):
                analyzer.read_markers(2.45e9, [2.45e9], errors_now=True)
                assert sim.bench.command_log[-1][2].endswith(";:SYST:ERR?")
            sim.faults.add(FaultSpec(instrument="analyzer", kind="error", on="STAT:QUES:COND?", nth=2, code=-222))
            with pytest.raises(ScpiErrors, match="-222"), analyzer.errors_read_once(on_every_read=False):
                analyzer.read_markers(2.45e9, [2.45e9], errors_now=True)
                analyzer.read_markers(2.45e9, [2.45e9])  # the entry is left by this one
                assert not sim.bench.command_log[-1][2].endswith("SYST:ERR?")
        finally:
            instruments.close()
