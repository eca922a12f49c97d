"""Spec limits per part number, and the pass/fail verdict they give each stored result and each
measured sweet-spot finding.

A limit applies to a result when the result's device has the limit's part number, its center
frequency lies in the limit's frequency range, and (when the limit gives them) its spacing, bias
and chamber temperature lie in the limit's ranges; all ranges inclusive. A result fails when any
applicable limit is broken or its parameter was not measured (a refused fit cannot show the part
meets its limit), passes when all hold, and gets 'no-limit' when none applies.

Limits on IMD (LEVEL_PARAMETERS: IM3 in dBc, re one tone or re the PEP) are stated at a tone
level (tone_dbm, per tone at the DUT input) and judge a result's per-level rows
(store/models/levels.py): the limit applies when the result has a row within
TONE_MATCH_DB of that level (and its other ranges hold), and judges the worse of the two products.

Limits on the sweet spot, its window's width and the IIP3 there judge the two-tone finding of a
`bias search` study (at the study's centre frequency and chamber set point). The DC prediction
is not judged: it is a gate-plane estimate, not the part measured at its input.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass

import sqlalchemy as sa
from sqlalchemy.orm import Session
from sqlalchemy.orm.attributes import set_committed_value

from tonebench.errors import InputError
from tonebench.store.models import (
    FINDING_PARAMETERS,
    LEVEL_PARAMETERS,
    RESULT_PARAMETERS,
    SPEC_PARAMETERS,
    BiasFinding,
    BiasStudy,
    Device,
    LevelResult,
    Result,
    Run,
    SpecLimit,
    utc_now,
)

_BATCH = 2000  # results judged and updated per round trip
TONE_MATCH_DB = 0.005  # a per-level row is at a limit's tone level when this close (levels are rounded to 1e-6)


def parameter_unit(parameter: str) -> str:
    if parameter in LEVEL_PARAMETERS:
        return "dBc"
    if parameter.endswith("_v"):
        return "V"
    return "dBm" if parameter.endswith("_dbm") else "dB"


def format_limit_value(value: float, unit: str) -> str:
    return f"{value:.4f}" if unit == "V" else f"{value:+.2f}"


def add_limit(
    session: Session,
    part_number: str,
    parameter: str,
    *,
    freq_min_hz: float,
    freq_max_hz: float,
    min_value: float | None = None,
    max_value: float | None = None,
    spacing_min_hz: float | None = None,
    spacing_max_hz: float | None = None,
    bias_min_v: float | None = None,
    bias_max_v: float | None = None,
    temp_min_c: float | None = None,
    temp_max_c: float | None = None,
    tone_dbm: float | None = None,
    notes: str | None = None,
) -> SpecLimit:
    """Store a limit after checking it; values in the parameter's unit (dBm, dB or V)."""
    part_number = part_number.strip()
    if not part_number:
        raise InputError("limit part_number: empty; give the part number the limit is for")
    if parameter not in SPEC_PARAMETERS:
        raise InputError(f"limit parameter '{parameter}': unknown; allowed: {', '.join(SPEC_PARAMETERS)}")
    if min_value is None and max_value is None:
        raise InputError("limit: give a minimum, a maximum or both")
    if parameter in FINDING_PARAMETERS:
        given = [name for name, value in (("spacing", spacing_min_hz), ("spacing", spacing_max_hz),
                                          ("bias", bias_min_v), ("bias", bias_max_v)) if value is not None]
        if given:
            raise InputError(f"limit {parameter}: a sweet-spot finding has no single {given[0]}; "
                             "give its frequency and temperature ranges only")
    _check_tone_level(parameter, tone_dbm)
    values = dict(tone_dbm=tone_dbm, min_value=min_value, max_value=max_value, freq_min_hz=freq_min_hz,
                  freq_max_hz=freq_max_hz, spacing_min_hz=spacing_min_hz,
                  spacing_max_hz=spacing_max_hz, bias_min_v=bias_min_v, bias_max_v=bias_max_v,
                  temp_min_c=temp_min_c, temp_max_c=temp_max_c)
    for name, value in values.items():
        if value is not None and not math.isfinite(value):
            raise InputError(f"limit {name}: {value} is not a finite number")
    for low, high in (("min_value", "max_value"), ("freq_min_hz", "freq_max_hz"),
                      ("spacing_min_hz", "spacing_max_hz"), ("bias_min_v", "bias_max_v"),
                      ("temp_min_c", "temp_max_c")):
        if values[low] is not None and values[high] is not None and values[low] > values[high]:
            raise InputError(f"limit {low}={values[low]:g} is above {high}={values[high]:g}; give min <= max")
    if freq_min_hz <= 0:
        raise InputError(f"limit freq_min_hz={freq_min_hz:g}: must be above 0 Hz")
    limit = SpecLimit(part_number=part_number, parameter=parameter, notes=notes, created_at=utc_now(), **values)
    session.add(limit)
    session.flush()
    return limit


def _check_tone_level(parameter: str, tone_dbm: float | None) -> None:
    if parameter in LEVEL_PARAMETERS and tone_dbm is None:
        raise InputError(f"limit {parameter}: IMD is judged at a stated tone level; give its tone_dbm "
                         "(per tone at the DUT input)")
    if parameter not in LEVEL_PARAMETERS and tone_dbm is not None:
        raise InputError(f"limit {parameter}: only the IMD parameters ({', '.join(LEVEL_PARAMETERS)}) take a tone_dbm")


def list_limits(session: Session, part_number: str | None = None) -> list[SpecLimit]:
    query = sa.select(SpecLimit).order_by(SpecLimit.part_number, SpecLimit.parameter, SpecLimit.freq_min_hz, SpecLimit.id)
    if part_number:
        query = query.where(SpecLimit.part_number == part_number)
    return list(session.scalars(query))


def remove_limit(session: Session, limit_id: int) -> SpecLimit:
    limit = session.get(SpecLimit, limit_id)
    if limit is None:
        raise InputError(f"limit {limit_id}: no such limit (see `tonebench limit list`)")
    session.delete(limit)
    session.flush()
    return limit


@dataclass(frozen=True)
class LimitRule:
    """A limit detached from the session, so judging needs no database."""

    id: int
    parameter: str
    min_value: float | None
    max_value: float | None
    freq_min_hz: float
    freq_max_hz: float
    spacing_min_hz: float | None = None
    spacing_max_hz: float | None = None
    bias_min_v: float | None = None
    bias_max_v: float | None = None
    temp_min_c: float | None = None
    temp_max_c: float | None = None
    tone_dbm: float | None = None  # IMD limits only: the stated tone level

    @classmethod
    def of(cls, limit: SpecLimit) -> "LimitRule":
        return cls(limit.id, limit.parameter, limit.min_value, limit.max_value, limit.freq_min_hz,
                   limit.freq_max_hz, limit.spacing_min_hz, limit.spacing_max_hz, limit.bias_min_v,
                   limit.bias_max_v, limit.temp_min_c, limit.temp_max_c, limit.tone_dbm)

    def applies(self, center_hz: float | None, spacing_hz: float | None, bias_v: float | None,
                temperature_c: float | None = None) -> bool:
        """Whether every range the limit gives holds the condition; a condition not known (no
        bias, no chamber) is outside any range given for it."""
        ranges = ((center_hz, self.freq_min_hz, self.freq_max_hz),
                  (spacing_hz, self.spacing_min_hz, self.spacing_max_hz),
                  (bias_v, self.bias_min_v, self.bias_max_v),
                  (temperature_c, self.temp_min_c, self.temp_max_c))
        for value, low, high in ranges:
            if low is None and high is None:
                continue
            if value is None or (low is not None and value < low) or (high is not None and value > high):
                return False
        return True

    def level_value(self, levels: dict[float, dict[str, float | None]]) -> tuple[bool, float | None]:
        """(whether the result has a row at this limit's tone level, the parameter's value there)."""
        for tone_dbm, values in levels.items():
            if abs(tone_dbm - self.tone_dbm) <= TONE_MATCH_DB:
                return True, values.get(self.parameter)
        return False, None

    def check(self, value: float | None) -> tuple[bool, str]:
        """(holds, one phrase saying why) for the parameter's value."""
        unit = parameter_unit(self.parameter)
        at = "" if self.tone_dbm is None else f" at {self.tone_dbm:+.2f} dBm per tone"
        name = f"{self.parameter}{at} (limit {self.id})"
        if value is None:
            return False, f"{name}: not measured"
        if self.min_value is not None and value < self.min_value:
            return False, f"{name}: {format_limit_value(value, unit)} {unit} below min {format_limit_value(self.min_value, unit)}"
        if self.max_value is not None and value > self.max_value:
            return False, f"{name}: {format_limit_value(value, unit)} {unit} above max {format_limit_value(self.max_value, unit)}"
        return True, f"{name}: {format_limit_value(value, unit)} {unit} ok"


def judge(values: dict[str, float | None], center_hz: float | None, spacing_hz: float | None,
          bias_v: float | None, rules: list[LimitRule], temperature_c: float | None = None,
          levels: dict[float, dict[str, float | None]] | None = None) -> tuple[str, str]:
    """(verdict, detail) of one result or finding; values maps parameter names to its values.
    Only the rules on the parameters in `values` are considered, and the IMD rules when `levels`
    (tone level -> LEVEL_PARAMETERS values of the result's per-level rows) is given."""
    checks = [rule.check(values[rule.parameter]) for rule in rules
              if rule.parameter in values and rule.applies(center_hz, spacing_hz, bias_v, temperature_c)]
    for rule in rules:
        if levels and rule.parameter in LEVEL_PARAMETERS and rule.applies(center_hz, spacing_hz, bias_v, temperature_c):
            found, value = rule.level_value(levels)
            if found:
                checks.append(rule.check(value))
    if not checks:
        return "no-limit", "no spec limit covers this part at this frequency, spacing, bias and temperature"
    verdict = "pass" if all(ok for ok, _ in checks) else "fail"
    # Failures first: they are what a reader looks for.
    return verdict, "; ".join(text for ok, text in sorted(checks, key=lambda c: c[0]))


def _rules(session: Session) -> dict[str, list[LimitRule]]:
    rules: dict[str, list[LimitRule]] = {}
    for limit in session.scalars(sa.select(SpecLimit)):
        rules.setdefault(limit.part_number, []).append(LimitRule.of(limit))
    return rules


def apply_verdicts(session: Session, run_id: int | None = None, *, part_number: str | None = None,
                   run_ids: list[int] | None = None) -> Counter:
    """(Re)compute and store the verdict of every result (of one run, of these runs, of one part
    number, or all); returns the count per verdict.

    Works in the caller's transaction and does not commit. Results already loaded in the
    session get the new values too.
    """
    session.flush()
    rules = _rules(session)
    columns = [getattr(Result, name) for name in RESULT_PARAMETERS]
    query = (sa.select(Result.id, Device.part_number, Result.center_hz, Result.spacing_hz, Result.bias_v,
                       Result.temperature_c, *columns)
             .join(Run, Run.id == Result.run_id).outerjoin(Device, Device.id == Run.device_id)
             .order_by(Result.id).limit(_BATCH))
    if run_id is not None:
        query = query.where(Result.run_id == run_id)
    if run_ids is not None:
        query = query.where(Result.run_id.in_(run_ids))
    if part_number is not None:
        query = query.where(Device.part_number == part_number)
    update = (sa.update(Result.__table__).where(Result.__table__.c.id == sa.bindparam("result_id"))
              .values(verdict=sa.bindparam("new_verdict"), verdict_detail=sa.bindparam("new_detail")))
    counts: Counter = Counter()
    last_id = None
    imd_limits = any(rule.parameter in LEVEL_PARAMETERS for part in rules.values() for rule in part)
    while True:
        # Pages by id, each read in full before its update, so no read spans a write.
        page = session.execute(query if last_id is None else query.where(Result.id > last_id)).all()
        if not page:
            return counts
        # Per-level rows only where an IMD limit exists (most databases have none).
        levels = _page_levels(session, [row[0] for row in page]) if imd_limits else {}
        batch = []
        for result_id, part_number, center_hz, spacing_hz, bias_v, temperature_c, *values in page:
            verdict, detail = judge(dict(zip(RESULT_PARAMETERS, values)), center_hz, spacing_hz, bias_v,
                                    rules.get(part_number, []), temperature_c, levels.get(result_id))
            counts[verdict] += 1
            batch.append({"result_id": result_id, "new_verdict": verdict, "new_detail": detail})
        _write(session, update, batch)
        last_id = page[-1][0]


def _page_levels(session: Session, result_ids: list[int]) -> dict[int, dict[float, dict[str, float | None]]]:
    """Per result id, tone level -> the IMD values (LEVEL_PARAMETERS) of its per-level rows: the
    worse (higher) of the two products, re its tone and re the PEP."""
    columns = (LevelResult.result_id, LevelResult.tone_dbm, LevelResult.im3_lower_dbc, LevelResult.im3_upper_dbc,
               LevelResult.im3_lower_dbc_pep, LevelResult.im3_upper_dbc_pep)
    out: dict[int, dict[float, dict[str, float | None]]] = {}
    for result_id, tone_dbm, lower, upper, lower_pep, upper_pep in session.execute(
            sa.select(*columns).where(LevelResult.result_id.in_(result_ids))):
        out.setdefault(result_id, {})[tone_dbm] = {"im3_dbc": _worse(lower, upper), "im3_dbc_pep": _worse(lower_pep, upper_pep)}
    return out


def _worse(lower: float | None, upper: float | None) -> float | None:
    """The higher dBc of the two products; None when either is missing (not shown to hold)."""
    return None if lower is None or upper is None else max(lower, upper)


def finding_values(finding: BiasFinding) -> dict[str, float | None]:
    """The values the FINDING_PARAMETERS limits judge."""
    width_v = (None if finding.window_low_v is None or finding.window_high_v is None
               else finding.window_high_v - finding.window_low_v)
    return {"sweet_spot_v": finding.sweet_spot_v, "window_width_v": width_v,
            "sweet_spot_iip3_dbm": finding.peak_iip3_dbm}


def apply_finding_verdicts(session: Session, study_id: int | None = None, *,
                           part_number: str | None = None) -> Counter:
    """(Re)compute and store the verdict of every two-tone sweet-spot finding (of one study, of
    one part number, or all); returns the count per verdict. Like apply_verdicts, in the
    caller's transaction. Studies are few (one per device and temperature): read whole."""
    session.flush()
    rules = _rules(session)
    query = (sa.select(BiasFinding, BiasStudy, Device.part_number).join(BiasStudy, BiasFinding.study_id == BiasStudy.id)
             .join(Device, Device.id == BiasStudy.device_id).where(BiasFinding.kind == "two-tone"))
    if study_id is not None:
        query = query.where(BiasStudy.id == study_id)
    if part_number is not None:
        query = query.where(Device.part_number == part_number)
    counts: Counter = Counter()
    for finding, study, part in session.execute(query):
        finding.verdict, finding.verdict_detail = judge(finding_values(finding), study.center_hz, None, None,
                                                        rules.get(part, []), study.temperature_c)
        counts[finding.verdict] += 1
    session.flush()
    return counts


def _write(session: Session, update, batch: list[dict]) -> None:
    session.connection().execute(update, batch)
    for item in batch:
        loaded = session.identity_map.get(session.identity_key(Result, item["result_id"]))
        if loaded is not None:
            set_committed_value(loaded, "verdict", item["new_verdict"])
            set_committed_value(loaded, "verdict_detail", item["new_detail"])
