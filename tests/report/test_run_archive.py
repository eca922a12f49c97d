"""The run report holds what an archive needs: instruments with their *IDN?, software and
calibration, each ± bound with its terms, every point's analyzer settings, the events. Read
from a stored database (the pre-layout fixture, copied)."""

from __future__ import annotations

import html
import math
import re
import shutil
from pathlib import Path

import pytest
from sqlalchemy import select

from tonebench.analysis.uncertainty import RANDOM_TERMS, SYSTEMATIC_TERMS
from tonebench.report.run_page import write_run_report
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Run

FIXTURE = Path(__file__).resolve().parent.parent / "data" / "pre_layout" / "tonebench.db"


@pytest.fixture
def stored(tmp_path):
    db = tmp_path / "archive.db"
    shutil.copy(FIXTURE, db)
    sessions = session_factory(open_database(f"sqlite:///{db}"))  # brought to today's schema
    with sessions() as session:
        run = session.scalars(select(Run).where(Run.status == "complete")).first()
        guid = run.guid
        facts = dict(idns=[i.idn for i in run.instruments], version=run.software_version,
                     points=len(run.points), rbws={p.rbw_hz for p in run.points if p.rbw_hz},
                     events=[e.message for e in run.events],
                     bounds=[(r.iip3_bound_db, (r.details_json or {}).get("bound_terms_db")) for r in run.results])
    page = write_run_report(sessions, guid, tmp_path / "r.html").read_text(encoding="utf-8")
    return page, facts


def test_instruments_software_and_events_are_in_the_page(stored):
    page, facts = stored
    for idn in facts["idns"]:
        assert f"<td>{html.escape(idn)}</td>" in page
    assert f"<dd>{facts['version']}</dd>" in page
    for message in facts["events"]:
        assert html.escape(message) in page


def test_every_point_has_its_analyzer_settings(stored):
    page, facts = stored
    section = page[page.index("<h2>Analyzer settings per point</h2>"):page.index("<h2>Events</h2>")]
    assert section.count("<tr><td>") == facts["points"]
    for rbw_hz in facts["rbws"]:
        assert f'<td class="num">{rbw_hz:g}</td>' in section


def test_each_bound_is_the_sum_of_its_terms(stored):
    """The breakdown adds up: systematic terms linearly, random ones in quadrature (the rule of
    analysis/uncertainty.combine, checked here by hand on the stored terms)."""
    page, facts = stored
    assert "What each ± bound is made of" in page
    checked = 0
    for bound_db, terms in facts["bounds"]:
        if bound_db is None or not terms:
            continue
        systematic = sum(terms.get(name, 0.0) for name in SYSTEMATIC_TERMS)
        random = math.sqrt(sum(terms.get(name, 0.0) ** 2 for name in RANDOM_TERMS))
        assert bound_db == pytest.approx(systematic + random, abs=1e-9)
        assert re.search(rf'<td class="num">{bound_db:.2f}</td>', page)
        checked += 1
    assert checked > 0
