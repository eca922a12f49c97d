"""Device registry, spec limits and verdicts, and the catalog commands, on SQLite and PostgreSQL;
plus the whole catalog on the rows of real runs of the simulated bench."""

from __future__ import annotations

import csv
import io
import json
import re
import textwrap

import numpy as np
import pytest
import sqlalchemy as sa
from conftest import SAMPLE_RUNS
from cli_invoke import invoke

from tonebench.catalog.devices import add_device, get_device, list_devices
from tonebench.catalog.limits import LimitRule, add_limit, apply_verdicts, judge, list_limits, remove_limit
from tonebench.catalog.query import ResultFilter, find_results
from tonebench.catalog.synthetic import Layout, fill
from tonebench.errors import InputError
from tonebench.store import open_database, session_factory
from tonebench.store.models import Device, Result, Run


SMALL = Layout(centers_hz=(2.40e9, 2.45e9, 2.50e9), spacings_hz=(1.0e6, 10.0e6), biases_v=(None, 3.3),
               tones_dbm=(-30.0, -20.0, -10.0))


# --- devices ------------------------------------------------------------------------------------

def test_register_list_and_find_devices(engine):
    sessions = session_factory(engine)
    with sessions.begin() as session:
        add_device(session, "ZRX-310", "A001", lot="L1", wafer="W01", position="R1C1", tags=["qual", " lna ", "qual"])
        add_device(session, "ZRX-310", "A002", lot="L1", tags=["eng"])
        add_device(session, "ZRX-311", "B001", lot="L2")
    with sessions() as session:
        device = get_device(session, " ZRX-310 ", "A001")
        assert (device.lot, device.wafer, device.position, device.tags) == ("L1", "W01", "R1C1", ["lna", "qual"])
        assert [d.device.serial for d in list_devices(session, lot="L1")] == ["A001", "A002"]
        assert [d.device.serial for d in list_devices(session, tag="eng")] == ["A002"]
        assert [d.device.serial for d in list_devices(session, part_number="ZRX-311")] == ["B001"]
        assert all(d.n_runs == 0 for d in list_devices(session))


def test_duplicate_or_empty_device_is_refused(engine):
    sessions = session_factory(engine)
    with sessions.begin() as session:
        add_device(session, "ZRX-310", "A001")
    with sessions() as session:
        with pytest.raises(InputError, match="already registered"):
            add_device(session, "ZRX-310", "A001", lot="other")
        with pytest.raises(InputError, match="serial"):
            add_device(session, "ZRX-310", "  ")
        with pytest.raises(InputError, match="empty tag"):
            add_device(session, "ZRX-310", "A009", tags=["ok", ""])
        with pytest.raises(InputError, match="not registered"):
            get_device(session, "ZRX-310", "nope")


# --- limits and verdicts ------------------------------------------------------------------------

def rule(**kw) -> LimitRule:
    base = dict(id=1, parameter="iip3_dbm", min_value=5.0, max_value=None, freq_min_hz=2.4e9, freq_max_hz=2.5e9)
    return LimitRule(**{**base, **kw})


def test_judge_hand_cases():
    rules = [rule(), rule(id=2, parameter="gain_db", min_value=10.0, max_value=12.0)]
    assert judge({"iip3_dbm": 5.0, "gain_db": 11.0}, 2.45e9, 1e6, None, rules)[0] == "pass"  # bounds inclusive
    verdict, detail = judge({"iip3_dbm": 4.99, "gain_db": 11.0}, 2.45e9, 1e6, None, rules)
    assert verdict == "fail" and detail.startswith("iip3_dbm (limit 1): +4.99 dBm below min +5.00")
    assert judge({"iip3_dbm": 9.0, "gain_db": 12.5}, 2.45e9, 1e6, None, rules)[1].startswith("gain_db (limit 2): +12.50 dB above max")
    assert judge({"iip3_dbm": None, "gain_db": 11.0}, 2.45e9, 1e6, None, rules)[1].startswith("iip3_dbm (limit 1): not measured")
    assert judge({"iip3_dbm": 0.0}, 2.6e9, 1e6, None, rules)[0] == "no-limit"  # outside the frequency range
    biased = [rule(bias_min_v=3.0, bias_max_v=3.6)]
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, None, biased)[0] == "no-limit"  # no bias: does not apply
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, 3.3, biased)[0] == "fail"
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, 5.0, biased)[0] == "no-limit"
    spaced = [rule(spacing_max_hz=2e6)]
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 10e6, None, spaced)[0] == "no-limit"
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, None, spaced)[0] == "fail"
    warm = [rule(temp_min_c=20.0, temp_max_c=30.0)]
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, None, warm)[0] == "no-limit"  # no chamber: does not apply
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, None, warm, temperature_c=30.0)[0] == "fail"
    assert judge({"iip3_dbm": 0.0}, 2.45e9, 1e6, None, warm, temperature_c=85.0)[0] == "no-limit"


def test_judge_sweet_spot_findings_in_volts():
    rules = [rule(parameter="sweet_spot_v", min_value=0.55, max_value=0.60), rule(id=2, min_value=-5.0)]
    verdict, detail = judge({"sweet_spot_v": 0.6012, "window_width_v": 0.012}, 2.45e9, None, None, rules)
    # The IIP3 limit judges results only; the finding's own parameter with four decimals in volts.
    assert (verdict, detail) == ("fail", "sweet_spot_v (limit 1): 0.6012 V above max 0.6000")
    assert judge({"sweet_spot_v": 0.57}, None, None, None, rules)[0] == "no-limit"  # no frequency known


BAD_LIMITS = [
    (dict(parameter="nf_db"), "parameter 'nf_db'"),
    (dict(min_value=None, max_value=None), "minimum, a maximum"),
    (dict(min_value=6.0, max_value=5.0), "min_value=6 is above max_value=5"),
    (dict(freq_min_hz=3e9), "freq_min_hz=3e+09 is above"),
    (dict(bias_min_v=float("inf")), "bias_min_v"),
    (dict(part_number=" "), "part_number"),
    (dict(temp_min_c=85.0, temp_max_c=-40.0), "temp_min_c=85 is above temp_max_c=-40"),
    (dict(parameter="sweet_spot_v", spacing_max_hz=2e6), "limit sweet_spot_v: a sweet-spot finding has no single spacing"),
]


def test_bad_limits_are_one_line_input_errors(engine):
    with session_factory(engine)() as session:
        for kwargs, words in BAD_LIMITS:
            args = dict(part_number="ZRX-310", parameter="iip3_dbm", freq_min_hz=2.4e9, freq_max_hz=2.5e9,
                        min_value=5.0)
            args.update(kwargs)
            with pytest.raises(InputError) as caught:
                add_limit(session, args.pop("part_number"), args.pop("parameter"), **args)
            assert words in str(caught.value) and "\n" not in str(caught.value)
        assert list_limits(session) == []


LIMITS = [  # (part, parameter, min, max, freq range, spacing range, bias range)
    ("QMX-4410", "iip3_dbm", 4.0, None, (2.40e9, 2.46e9), (None, None), (None, None)),
    ("QMX-4410", "oip3_dbm", None, 19.0, (2.45e9, 2.50e9), (None, 2e6), (None, None)),
    ("VRA-2205", "iip3_dbm", -2.0, 1.0, (2.30e9, 2.60e9), (None, None), (3.0, 3.5)),
]


def expected_verdicts(truths) -> dict[tuple[str, str], str]:
    """Verdicts from numpy masks over the written values, one limit at a time."""
    part = np.array([t.part_number for t in truths])
    center = np.array([t.center_hz for t in truths])
    spacing = np.array([t.spacing_hz for t in truths])
    bias = np.array([np.nan if t.bias_v is None else t.bias_v for t in truths])
    applies_any = np.zeros(len(truths), bool)
    fails = np.zeros(len(truths), bool)
    for name, parameter, low, high, (f0, f1), (s0, s1), (b0, b1) in LIMITS:
        value = np.array([np.nan if getattr(t, parameter) is None else getattr(t, parameter) for t in truths])
        applies = (part == name) & (center >= f0) & (center <= f1)
        if s0 is not None:
            applies &= spacing >= s0
        if s1 is not None:
            applies &= spacing <= s1
        if b0 is not None:
            applies &= bias >= b0  # NaN (no bias) is False: a bias-bound limit skips it
        if b1 is not None:
            applies &= bias <= b1
        broken = np.isnan(value)
        if low is not None:
            broken |= value < low
        if high is not None:
            broken |= value > high
        applies_any |= applies
        fails |= applies & broken
    verdict = np.where(fails, "fail", np.where(applies_any, "pass", "no-limit"))
    return {(t.run_guid, t.group_key): str(v) for t, v in zip(truths, verdict)}


def test_apply_verdicts_matches_an_independent_judgement(engine):
    truths = fill(engine, 24, seed=5, layout=SMALL, keep_truth=True).truths
    sessions = session_factory(engine)
    with sessions.begin() as session:
        for part, parameter, low, high, (f0, f1), (s0, s1), (b0, b1) in LIMITS:
            add_limit(session, part, parameter, min_value=low, max_value=high, freq_min_hz=f0, freq_max_hz=f1,
                      spacing_min_hz=s0, spacing_max_hz=s1, bias_min_v=b0, bias_max_v=b1)
        counts = apply_verdicts(session)
    expected = expected_verdicts(truths)
    assert {"pass", "fail", "no-limit"} <= set(expected.values())  # every outcome is exercised
    with sessions() as session:
        stored = session.execute(sa.select(Run.guid, Result.group_key, Result.verdict, Result.verdict_detail)
                                 .join(Run, Run.id == Result.run_id)).all()
    assert {(g, k): v for g, k, v, _ in stored} == expected
    assert sum(counts.values()) == len(expected)
    assert all(detail for *_, detail in stored)


def test_apply_verdicts_for_one_run_and_on_loaded_results(engine):
    fill(engine, 3, seed=2, layout=SMALL)
    sessions = session_factory(engine)
    with sessions.begin() as session:
        add_limit(session, "QMX-4410", "gain_db", min_value=-100.0, freq_min_hz=1e9, freq_max_hz=9e9)
        add_limit(session, "VRA-2205", "gain_db", min_value=-100.0, freq_min_hz=1e9, freq_max_hz=9e9)
        add_limit(session, "LNT-0930B", "gain_db", min_value=-100.0, freq_min_hz=1e9, freq_max_hz=9e9)
        run_ids = session.scalars(sa.select(Run.id).order_by(Run.id)).all()
        loaded = session.scalars(sa.select(Result).where(Result.run_id == run_ids[0])).all()
        counts = apply_verdicts(session, run_ids[0])
        assert counts == {"pass": len(loaded)}
        assert {r.verdict for r in loaded} == {"pass"}  # objects already in the session see it
    with sessions() as session:
        by_run = dict(session.execute(sa.select(Result.run_id, sa.func.count()).where(Result.verdict.is_(None))
                                      .group_by(Result.run_id)).all())
    assert run_ids[0] not in by_run and set(by_run) == set(run_ids[1:])


def test_apply_verdicts_for_one_part(engine):
    fill(engine, 6, seed=2, layout=SMALL)
    sessions = session_factory(engine)
    with sessions.begin() as session:
        add_limit(session, "VRA-2205", "gain_db", min_value=-100.0, freq_min_hz=1e9, freq_max_hz=9e9)
        counts = apply_verdicts(session, part_number="VRA-2205")
    with sessions() as session:
        judged = dict(session.execute(
            sa.select(Device.part_number, sa.func.count()).select_from(Result).join(Run, Run.id == Result.run_id)
            .join(Device, Device.id == Run.device_id).where(Result.verdict.is_not(None))
            .group_by(Device.part_number)).all())
    assert judged == {"VRA-2205": counts["pass"]} and counts["pass"] > 0


def test_removing_a_limit(engine):
    sessions = session_factory(engine)
    with sessions.begin() as session:
        limit = add_limit(session, "ZRX-310", "iip3_dbm", min_value=1.0, freq_min_hz=1e9, freq_max_hz=2e9)
        limit_id = limit.id
    with sessions.begin() as session:
        remove_limit(session, limit_id)
        assert list_limits(session) == []
        with pytest.raises(InputError, match=f"limit {limit_id}: no such limit"):
            remove_limit(session, limit_id)


# --- the commands ---------------------------------------------------------------------------------

def test_device_and_limit_commands(db_url):
    assert invoke("device", "add", "ZRX-310", "A001", "--lot", "L7", "--tag", "qual", "--tag", "lna",
                  "--db", db_url).exit_code == 0
    again = invoke("device", "add", "ZRX-310", "A001", "--db", db_url)
    assert again.exit_code == 2 and again.output.count("\n") == 1 and "already registered" in again.output
    listed = invoke("device", "list", "--tag", "qual", "--db", db_url)
    assert listed.exit_code == 0 and "A001" in listed.output and "L7" in listed.output
    shown = invoke("device", "show", "ZRX-310", "A001", "--db", db_url)
    assert shown.exit_code == 0 and "lna, qual" in shown.output

    added = invoke("limit", "add", "ZRX-310", "iip3_dbm", "--freq-min-hz", "2.4e9", "--freq-max-hz", "2.5e9",
                   "--min", "5", "--db", db_url)
    assert added.exit_code == 0, added.output
    bad = invoke("limit", "add", "ZRX-310", "noise_db", "--freq-min-hz", "2.4e9", "--freq-max-hz", "2.5e9",
                 "--min", "5", "--db", db_url)
    assert bad.exit_code == 2 and "parameter 'noise_db'" in bad.output
    listed = invoke("limit", "list", "--db", db_url)
    assert listed.exit_code == 0 and "iip3_dbm" in listed.output and "+5.00" in listed.output
    limit_id = re.search(r"limit (\d+) added", added.output).group(1)
    assert invoke("limit", "remove", limit_id, "--db", db_url).exit_code == 0
    assert "iip3_dbm" not in invoke("limit", "list", "--db", db_url).output


def test_find_outputs_table_csv_and_json_alike(engine, db_url, tmp_path):
    fill(engine, 8, seed=3, layout=SMALL, flag_fraction=0.5, n_lots=3)
    with session_factory(engine)() as session:
        lots = sorted(session.scalars(sa.select(Device.lot).distinct()))
        expected = find_results(session, ResultFilter(lots=tuple(lots[:2])))
        everything = find_results(session, ResultFilter())
    assert 0 < len(expected) < len(everything) and any(e.flags for e in expected)
    args = ["find", "--lot", lots[0], "--lot", lots[1], "--db", db_url]
    table = invoke(*args)
    assert table.exit_code == 0 and f"{len(expected)} results" in table.output
    as_csv = invoke(*args, "--csv")
    rows = list(csv.DictReader(io.StringIO(as_csv.output)))
    assert [(r["run_guid"], float(r["center_hz"]), r["flags"]) for r in rows] == \
        [(e.run_guid, e.center_hz, ";".join(e.flags)) for e in expected]
    out = tmp_path / "found.json"
    assert invoke(*args, "--json", "--out", out).exit_code == 0
    loaded = json.loads(out.read_text())
    assert [(r["serial"], r["iip3_dbm"], r["flags"]) for r in loaded] == \
        [(e.serial, e.iip3_dbm, list(e.flags)) for e in expected]
    both = invoke(*args, "--csv", "--json")
    assert both.exit_code == 2 and "not both" in both.output
    bad = invoke("find", "--since", "yesterday", "--db", db_url)
    assert bad.exit_code == 2 and "--since 'yesterday'" in bad.output


# --- on real runs of the simulated bench ---------------------------------------------------------

PLAN = textwrap.dedent(
    """
    [plan]
    name = "catalog-check"
    [device]
    part_number = "KLN-2417A"
    serial = "{serial}"
    lot = "TB26-007"
    wafer = "W03"
    tags = ["catalog-test"]
    [sweep]
    center_freqs_hz = [2.40e9, 2.48e9]
    spacings_hz = [1.0e6]
    tone_start_dbm = -34.0
    tone_stop_dbm = -20.0
    tone_step_dbm = 2.0
    [analyzer]
    rbw_hz = 1000.0
    atten_db = 20.0
    """
)


def test_catalog_on_real_simulated_runs(tmp_path):
    from tonebench.catalog.transfer import export_runs, import_runs
    from tonebench.run.start import execute_run

    db = f"sqlite:///{tmp_path / 'bench.db'}"
    for serial in ("KLN26007-0001", "KLN26007-0002"):
        plan = tmp_path / f"{serial}.toml"
        plan.write_text(PLAN.format(serial=serial))
        outcome = execute_run(plan, SAMPLE_RUNS / "sim_bench.toml", db, tmp_path / f"{serial}.html")
        assert outcome.status == "complete"

    engine = open_database(db)
    sessions = session_factory(engine)
    with sessions() as session:
        rows = find_results(session, ResultFilter(lots=("TB26-007",), tags=("catalog-test",)))
        assert sorted({r.serial for r in rows}) == ["KLN26007-0001", "KLN26007-0002"]
        assert len(rows) == 4 and all(r.iip3_dbm is not None for r in rows)
        device = session.scalars(sa.select(Device).where(Device.serial == "KLN26007-0001")).one()
        assert device.wafer == "W03" and device.tags == ["catalog-test"]
        high_band = find_results(session, ResultFilter(freq_min_hz=2.45e9))
        assert {r.center_hz for r in high_band} == {2.48e9}
    # A limit between the two bands' IIP3 splits them (the simulated IIP3 rises 1 dB per GHz).
    low_iip3 = max(r.iip3_dbm for r in rows if r.center_hz == 2.40e9)
    high_iip3 = min(r.iip3_dbm for r in rows if r.center_hz == 2.48e9)
    assert low_iip3 < high_iip3
    with sessions.begin() as session:
        add_limit(session, "KLN-2417A", "iip3_dbm", min_value=(low_iip3 + high_iip3) / 2,
                  freq_min_hz=2.3e9, freq_max_hz=2.5e9)
        apply_verdicts(session)
    with sessions() as session:
        failed = find_results(session, ResultFilter(verdicts=("fail",)))
        passed = find_results(session, ResultFilter(verdicts=("pass",)))
    assert {r.center_hz for r in failed} == {2.40e9} and {r.center_hz for r in passed} == {2.48e9}

    compare = invoke("compare", "--lot", "TB26-007", "--out", tmp_path / "cmp.html", "--db", db)
    assert compare.exit_code == 0, compare.output
    page = (tmp_path / "cmp.html").read_text()
    assert "KLN-2417A KLN26007-0002" in page and "min" in page

    # The real rows (instruments, offsets, events) survive export and import unchanged.
    with sessions() as session:
        first = export_runs(session, tmp_path / "a.jsonl.gz")
    other = open_database(f"sqlite:///{tmp_path / 'lab.db'}")
    imported = import_runs(session_factory(other), tmp_path / "a.jsonl.gz")
    assert imported.runs_added == 2 and imported.points_added == 2 * 2 * 8  # runs x centers x tones
    with session_factory(other)() as session:
        second = export_runs(session, tmp_path / "b.jsonl.gz")
        assert session.scalar(sa.select(sa.func.count()).select_from(Result).where(Result.verdict == "fail")) == 2
    assert (tmp_path / "a.jsonl.gz").read_bytes() == (tmp_path / "b.jsonl.gz").read_bytes()
    assert first.sha256 == second.sha256
    engine.dispose()
    other.dispose()
