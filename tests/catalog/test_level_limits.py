"""IMD limits at a stated tone level, judged without a database (catalog/limits.py judge)."""

from __future__ import annotations

from tonebench.catalog.limits import LimitRule, judge

IMD = LimitRule(7, "im3_dbc", None, -45.0, 2.3e9, 2.5e9, tone_dbm=-25.0)
PEP = LimitRule(8, "im3_dbc_pep", None, -52.0, 2.3e9, 2.5e9, tone_dbm=-25.0)
IIP3 = LimitRule(9, "iip3_dbm", -3.0, None, 2.3e9, 2.5e9)


def levels(dbc: float | None, tone_dbm: float = -25.0) -> dict:
    return {tone_dbm: {"im3_dbc": dbc, "im3_dbc_pep": None if dbc is None else dbc - 6.02}}


def test_imd_limit_judges_the_row_at_its_tone_level():
    assert judge({}, 2.4e9, 1e6, None, [IMD], levels=levels(-46.0)) == ("pass", "im3_dbc at -25.00 dBm per tone (limit 7): -46.00 dBc ok")
    verdict, detail = judge({}, 2.4e9, 1e6, None, [IMD, PEP], levels={-30.0: {"im3_dbc": -56.0}, **levels(-44.5)})
    assert verdict == "fail" and detail.startswith("im3_dbc at -25.00 dBm per tone (limit 7): -44.50 dBc above max -45.00")
    assert "im3_dbc_pep at -25.00 dBm per tone (limit 8): -50.52 dBc above max" in detail


def test_imd_limit_does_not_apply_without_a_row_at_its_level_or_outside_its_band():
    assert judge({}, 2.4e9, 1e6, None, [IMD], levels=levels(-40.0, tone_dbm=-20.0))[0] == "no-limit"
    assert judge({}, 2.6e9, 1e6, None, [IMD], levels=levels(-40.0))[0] == "no-limit"
    assert judge({}, 2.4e9, 1e6, None, [IMD])[0] == "no-limit"  # a result without per-level rows


def test_a_level_with_a_missing_product_fails_and_result_limits_still_count():
    assert judge({}, 2.4e9, 1e6, None, [IMD], levels=levels(None))[1] == "im3_dbc at -25.00 dBm per tone (limit 7): not measured"
    verdict, detail = judge({"iip3_dbm": None}, 2.4e9, 1e6, None, [IMD, IIP3], levels=levels(-50.0))
    assert verdict == "fail" and "iip3_dbm (limit 9): not measured" in detail and "-50.00 dBc ok" in detail
