"""Result queries: random filters give exactly what a brute-force numpy filter over the written
data gives, on SQLite and on a real PostgreSQL server.

The expected side never reads through the code under test: it filters the records the synthetic
generator says it wrote (catalog.synthetic.Truth), with numpy masks.
"""

from __future__ import annotations

import datetime as dt
import uuid

import numpy as np
import pytest
import sqlalchemy as sa
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from tonebench.catalog.query import ResultFilter, count_results, find_results
from tonebench.catalog.synthetic import PARTS, TAGS, Layout, fill
from tonebench.errors import InputError
from tonebench.store import open_database, result_group_key, session_factory
from tonebench.store.models import FLAGS, VERDICTS

# Two layouts so that some results have a bias and some have none, and frequencies differ.
LAYOUT_PLAIN = Layout(centers_hz=(2.40e9, 2.45e9, 2.50e9), spacings_hz=(1.0e6, 5.0e6), biases_v=(None,),
                      tones_dbm=(-30.0, -25.0, -20.0, -15.0, -10.0))
LAYOUT_BIASED = Layout(centers_hz=(2.45e9, 5.80e9), spacings_hz=(1.0e6,), biases_v=(3.0, 3.3, 5.0),
                       tones_dbm=(-30.0, -25.0, -20.0, -15.0))


def fresh_postgres_database(server_url: str) -> tuple[str, callable]:
    name = f"q_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(server_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.exec_driver_sql(f'CREATE DATABASE "{name}"')

    def drop() -> None:
        with admin.connect() as connection:
            connection.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.dispose()

    return server_url.replace("/postgres?", f"/{name}?"), drop


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def filled(request, tmp_path_factory):
    """(engine, truths): one database per backend, filled once for every example."""
    drop = None
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path_factory.mktemp('query') / 'q.db'}"
    else:
        url, drop = fresh_postgres_database(request.getfixturevalue("postgres_server"))
    engine = open_database(url)
    first = fill(engine, 36, seed=11, layout=LAYOUT_PLAIN, n_lots=4, flag_fraction=0.3, random_verdicts=True,
                 keep_truth=True, bench_name="bench-a")
    second = fill(engine, 18, seed=12, layout=LAYOUT_BIASED, n_lots=4, flag_fraction=0.3, random_verdicts=True,
                  keep_truth=True, bench_name="bench-b", serial_offset=500)
    yield engine, first.truths + second.truths
    engine.dispose()
    if drop:
        drop()


def brute_force(truths, flt: ResultFilter) -> set[tuple[str, str]]:
    """The expected (run GUID, group key) set, from numpy masks over the written records."""
    def col(name, dtype=object):
        return np.array([getattr(t, name) for t in truths], dtype=dtype)

    mask = np.ones(len(truths), dtype=bool)
    for name, wanted in (("part_number", flt.parts), ("lot", flt.lots), ("wafer", flt.wafers),
                         ("serial", flt.serials), ("verdict", flt.verdicts)):
        if wanted:
            mask &= np.isin(col(name), list(wanted))
    if flt.tags:
        mask &= np.array([bool(set(t.tags) & set(flt.tags)) for t in truths])
    bias = np.array([np.nan if t.bias_v is None else t.bias_v for t in truths])
    for values, low, high in ((col("center_hz", float), flt.freq_min_hz, flt.freq_max_hz),
                              (col("spacing_hz", float), flt.spacing_min_hz, flt.spacing_max_hz),
                              (bias, flt.bias_min_v, flt.bias_max_v)):
        # NaN (no bias) compares False, as NULL does in SQL.
        if low is not None:
            mask &= values >= low
        if high is not None:
            mask &= values <= high
    started = np.array([t.started_at.replace(tzinfo=None) for t in truths], dtype="datetime64[us]")
    if flt.since is not None:
        mask &= started >= np.datetime64(flt.since.astimezone(dt.timezone.utc).replace(tzinfo=None), "us")
    if flt.until is not None:
        mask &= started < np.datetime64(flt.until.astimezone(dt.timezone.utc).replace(tzinfo=None), "us")
    if flt.flags:
        mask &= np.array([bool(t.flags & set(flt.flags)) for t in truths])
    if flt.flagged is not None:
        mask &= np.array([bool(t.flags) == flt.flagged for t in truths])
    return {(t.run_guid, t.group_key) for t, keep in zip(truths, mask) if keep}


def _bounds(draw, values: list[float]):
    """Optional inclusive (low, high) drawn from the data's own values and points between them."""
    values = sorted(set(values))
    candidates = values + [(a + b) / 2 for a, b in zip(values, values[1:])] + [values[0] - 1.0, values[-1] + 1.0]
    low = draw(st.sampled_from(candidates)) if draw(st.sampled_from((False, False, True))) else None
    high = draw(st.sampled_from(candidates)) if draw(st.sampled_from((False, False, True))) else None
    if low is not None and high is not None and low > high:
        low, high = high, low
    return low, high


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_random_filters_match_brute_force(filled, data):
    engine, truths = filled
    draw = data.draw

    def active() -> bool:
        # Each filter is on about a third of the time, so that most combinations still match
        # something and the comparison is not between two empty sets.
        return draw(st.sampled_from((False, False, True)))

    def some(values, extra=()):
        if not active():
            return ()
        return tuple(draw(st.lists(st.sampled_from(sorted(set(values)) + list(extra)), min_size=1, max_size=2,
                                   unique=True)))

    freq_min, freq_max = _bounds(draw, [t.center_hz for t in truths])
    spacing_min, spacing_max = _bounds(draw, [t.spacing_hz for t in truths])
    bias_min, bias_max = _bounds(draw, [t.bias_v for t in truths if t.bias_v is not None])
    starts = sorted(t.started_at for t in truths)
    since = draw(st.sampled_from(starts)) if active() else None
    until = draw(st.sampled_from(starts)) if active() else None
    if since is not None and until is not None and since >= until:
        since, until = None, until
    flt = ResultFilter(
        parts=some([p[0] for p in PARTS], ["NO-SUCH-PART"]),
        lots=some([t.lot for t in truths]),
        wafers=some([t.wafer for t in truths]),
        serials=some(draw(st.sampled_from([[t.serial for t in truths[:40]], [t.serial for t in truths[-40:]]]))),
        tags=some(TAGS),
        freq_min_hz=freq_min, freq_max_hz=freq_max, spacing_min_hz=spacing_min, spacing_max_hz=spacing_max,
        bias_min_v=bias_min, bias_max_v=bias_max,
        # A time two hours ahead of UTC checks that zones are converted, not dropped.
        since=since and since.astimezone(dt.timezone(dt.timedelta(hours=2))), until=until,
        flags=some(FLAGS), flagged=draw(st.booleans()) if active() else None, verdicts=some(VERDICTS),
    )
    expected = brute_force(truths, flt)
    event("matches something" if expected else "matches nothing")
    with session_factory(engine)() as session:
        rows = find_results(session, flt)
        got = {(r.run_guid, result_group_key(r.center_hz, r.spacing_hz, r.bias_v)) for r in rows}
        assert got == expected, flt.describe()
        assert len(rows) == len(got)  # no result twice
        assert count_results(session, flt) == len(got)


def test_the_data_covers_what_the_filters_test(filled):
    # Without this, a filter could pass the comparison only because nothing it selects exists.
    _, truths = filled
    assert {t.bias_v is None for t in truths} == {True, False}
    assert any(t.flags for t in truths) and not all(t.flags for t in truths)
    assert {t.verdict for t in truths} == set(VERDICTS) | {None}
    assert any(t.tags for t in truths) and not all(t.tags for t in truths)


def test_flags_and_a_bias_range_select_as_documented(filled):
    engine, truths = filled
    with session_factory(engine)() as session:
        flagged = find_results(session, ResultFilter(flagged=True))
        assert flagged and all(r.flags for r in flagged)
        biased = find_results(session, ResultFilter(bias_min_v=-100.0))
        assert biased and all(r.bias_v is not None for r in biased)
        first = find_results(session, ResultFilter(), limit=5)
        assert len(first) == 5
        # since is inclusive, until exclusive, at the exact start time of a run
        start = sorted(t.started_at for t in truths)[len(truths) // 2]
        at_start = {t.run_guid for t in truths if t.started_at == start}
        assert {r.run_guid for r in find_results(session, ResultFilter(since=start))} >= at_start
        assert not {r.run_guid for r in find_results(session, ResultFilter(until=start))} & at_start


def test_user_text_is_data_not_sql(filled):
    engine, truths = filled
    hostile = ("x' OR '1'='1", "'; DROP TABLE results; --", '" OR 1=1 --')
    with session_factory(engine)() as session:
        before = count_results(session, ResultFilter())
        for text in hostile:
            assert find_results(session, ResultFilter(parts=(text,), lots=(text,))) == []
            assert find_results(session, ResultFilter(tags=(text,))) == []
        assert count_results(session, ResultFilter()) == before == len(truths)


@pytest.mark.parametrize("flt, words", [
    (ResultFilter(verdicts=("passed",)), "verdicts"),
    (ResultFilter(flags=("noisy",)), "flags"),
    (ResultFilter(freq_min_hz=3e9, freq_max_hz=2e9), "freq_min_hz"),
    (ResultFilter(bias_min_v=float("nan")), "bias_min_v"),
    (ResultFilter(since=dt.datetime(2026, 1, 1)), "timezone"),
])
def test_bad_filters_are_one_line_input_errors(flt, words):
    with pytest.raises(InputError) as caught:
        flt.check()
    assert words in str(caught.value) and "\n" not in str(caught.value)
