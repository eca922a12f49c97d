"""SCPI dialect files: which command string each role operation sends, and how replies parse.

A dialect file (drivers/*.toml) has a [dialect] table (name, role, description), [io], [limits],
optional [performance] and [status], and [operations]. Each operation is a `command` (written,
no reply) or a `query` (written, one reply line parsed by `reply`). Templates are Python format
strings whose field names are fixed per operation, so a role driver can fill them without
knowing the instrument.
"""

from __future__ import annotations

import difflib
import math
import string
from pathlib import Path
from typing import Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    ValidationError,
    field_validator,
    model_validator,
)

from tonebench.config.instrument_keys import KNOWN_LIMITS, KNOWN_PERFORMANCE, KNOWN_STATUS
from tonebench.config.loading import describe_validation_error, read_toml
from tonebench.errors import InputError
from tonebench.packaged import data_dir

Role = Literal["source", "analyzer", "power_meter", "supply", "chamber"]
ReplyKind = Literal["text", "float", "int", "bool", "error"]

_COMMON_OPERATIONS = ("identify", "clear_status", "wait_complete", "next_error")

REQUIRED_OPERATIONS: dict[str, tuple[str, ...]] = {
    "source": _COMMON_OPERATIONS
    + ("set_frequency", "set_power", "rf_on", "rf_off", "read_rf"),
    "analyzer": _COMMON_OPERATIONS
    + (
        "single_sweep_mode",
        "set_center",
        "set_span",
        "set_rbw",
        "set_vbw",
        "set_attenuation",
        "set_ref_level",
        "read_sweep_time",
        "start_sweep",
        "set_marker_freq",
        "read_marker_power",
        "read_status",
    ),
    # configure: single measurements on INITiate; the reading is fetched after *OPC?.
    "power_meter": _COMMON_OPERATIONS
    + ("configure", "set_unit_dbm", "set_frequency", "start_measurement", "fetch_power"),
    # One output of a DC supply or SMU; read_tripped and enable_protection are optional (not
    # every instrument latches an over-current trip). Every template names the {channel}.
    "supply": _COMMON_OPERATIONS
    + ("set_voltage", "set_current_limit", "output_on", "output_off", "read_output",
       "measure_voltage", "measure_current"),
    # A thermal chamber: set point, its own air temperature, conditioning on and off.
    "chamber": _COMMON_OPERATIONS
    + ("set_temperature", "read_set_point", "measure_temperature", "conditioning_on", "conditioning_off"),
}

_NUMBER_TABLES = {"limits": KNOWN_LIMITS, "performance": KNOWN_PERFORMANCE, "status": KNOWN_STATUS}
# Status bits are bits of a 16-bit SCPI status register (SCPI-1999 vol 1 ch. 9, from memory).
STATUS_BITS = range(0, 16)

# Kept for callers that ask only for the required keys.
REQUIRED_LIMITS = {role: keys[0] for role, keys in KNOWN_LIMITS.items() if keys[0]}
REQUIRED_PERFORMANCE = {role: keys[0] for role, keys in KNOWN_PERFORMANCE.items()}
REQUIRED_STATUS = {role: keys[0] for role, keys in KNOWN_STATUS.items()}

# Template fields each operation may use; any operation not listed takes none.
TEMPLATE_FIELDS: dict[str, frozenset[str]] = {
    "set_frequency": frozenset({"freq_hz"}),
    "set_power": frozenset({"power_dbm"}),
    "set_center": frozenset({"freq_hz"}),
    "set_marker_freq": frozenset({"freq_hz"}),
    "set_span": frozenset({"span_hz"}),
    "set_rbw": frozenset({"rbw_hz"}),
    "set_vbw": frozenset({"vbw_hz"}),
    "set_attenuation": frozenset({"atten_db"}),
    "set_ref_level": frozenset({"ref_dbm"}),
    "set_average_count": frozenset({"count"}),  # optional analyzer operation (instruments/detector_setup.py)
    "set_voltage": frozenset({"channel", "voltage_v"}),
    "set_current_limit": frozenset({"channel", "current_a"}),
    "set_temperature": frozenset({"temp_c"}),
    **{op: frozenset({"channel"}) for op in (
        "enable_protection", "output_on", "output_off", "read_output", "measure_voltage",
        "measure_current", "read_tripped")},
}

# Keys of the [dialect] table; they are flattened into the model's top level.
_HEADER_KEYS = ("name", "role", "description")


# An ordinary query is answered in well under a second; sweeps get their own, derived wait.
MAX_QUERY_TIMEOUT_S = 600.0


def template_fields(template: str) -> set[str]:
    """Field names used in a format template ("" for a positional `{}`)."""
    return {field for _, field, _, _ in string.Formatter().parse(template) if field is not None}


def _nested_field(template: str) -> str | None:
    """The first replacement field whose format spec holds a field of its own, e.g. {freq_hz:{w}}."""
    for _, field, spec, _ in string.Formatter().parse(template):
        if field is not None and spec and "{" in spec:
            return f"{{{field}:{spec}}}"
    return None


class IoSettings(BaseModel):
    """Line terminations and the reply timeout (seconds) for ordinary queries."""

    model_config = ConfigDict(extra="forbid")

    read_termination: str = "\n"
    write_termination: str = "\n"
    query_timeout_s: float
    # Several operations of one step on one line, joined by ';' (IEEE 488.2 program message
    # units), their replies in one line: one round trip where there were several. Not every
    # instrument accepts it, so off unless the dialect says.
    one_line: bool = False

    @field_validator("query_timeout_s")
    @classmethod
    def _finite_timeout(cls, value: float) -> float:
        if not (math.isfinite(value) and 0.0 < value <= MAX_QUERY_TIMEOUT_S):
            raise ValueError(f"{value!r} s; allowed: a finite number of seconds, 0 < t <= {MAX_QUERY_TIMEOUT_S:g}")
        return value


class Operation(BaseModel):
    """One role operation: exactly one of `command` or `query`; a query names its reply kind."""

    model_config = ConfigDict(extra="forbid")

    command: str | None = None
    query: str | None = None
    reply: ReplyKind | None = None

    @model_validator(mode="after")
    def _one_kind(self) -> Operation:
        if (self.command is None) == (self.query is None):
            raise ValueError("needs exactly one of 'command' or 'query'")
        if self.query is not None and self.reply is None:
            raise ValueError("a query needs 'reply', one of text, float, int, bool, error")
        if self.command is not None and self.reply is not None:
            raise ValueError("a command has no reply; use 'query' to read one")
        return self

    @property
    def template(self) -> str:
        return self.command if self.command is not None else str(self.query)

    @property
    def is_query(self) -> bool:
        return self.query is not None


class Dialect(BaseModel):
    """A parsed, validated dialect file. Limits and performance carry units in their keys."""

    model_config = ConfigDict(extra="forbid")

    name: str
    role: Role
    description: str
    io: IoSettings
    limits: dict[str, float]
    performance: dict[str, float] = {}
    status: dict[str, int] = {}
    operations: dict[str, Operation]

    @model_validator(mode="after")
    def _fits_role(self) -> Dialect:
        for table, known in _NUMBER_TABLES.items():
            _check_numbers(table, getattr(self, table), self.role, known.get(self.role, ((), ())))
        _check_phase_noise(self.performance)
        present = self.operations
        required = REQUIRED_OPERATIONS[self.role]
        missing = [key for key in required if key not in present]
        if missing:
            raise ValueError(f"field 'operations.{missing[0]}' is missing; {_article(self.role)} dialect needs {', '.join(required)}")
        for op_name, op in self.operations.items():
            _check_template(op_name, op.template)
        return self


def _check_phase_noise(performance: dict[str, float]) -> None:
    """An LO phase-noise figure means nothing without the offset it is stated at."""
    given = [key for key in ("phase_noise_dbc_per_hz", "phase_noise_offset_hz") if key in performance]
    if len(given) == 1:
        raise ValueError(f"field 'performance.{given[0]}' needs its partner: give phase_noise_dbc_per_hz (dBc/Hz) "
                         "together with phase_noise_offset_hz (the offset it is stated at, Hz)")
    if given and performance["phase_noise_offset_hz"] <= 0:
        raise ValueError(f"field 'performance.phase_noise_offset_hz': {performance['phase_noise_offset_hz']!r} Hz; "
                         "the offset must be above 0 Hz")


def _article(role: str) -> str:
    return f"an {role}" if role[0] in "aeiou" else f"a {role}"


def _check_numbers(table: str, values: dict[str, float], role: str,
                   known: tuple[tuple[str, ...], tuple[str, ...]]) -> None:
    """Only known keys, finite values, every required key present; ValueError names the first fault."""
    required, optional = known
    allowed = (*required, *optional)
    allowed_text = ", ".join(allowed) or "none"
    for key, value in values.items():
        if key not in allowed:
            close = difflib.get_close_matches(key.lower(), allowed, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise ValueError(f"field '{table}.{key}' is not a known setting for {_article(role)} dialect; allowed: {allowed_text}{hint}")
        if not math.isfinite(value):
            raise ValueError(f"field '{table}.{key}': {value!r} is not a finite number; allowed keys: {allowed_text}")
        if table == "status" and value not in STATUS_BITS:
            raise ValueError(f"field '{table}.{key}': bit {value} outside 0..15 (a 16-bit status register)")
    missing = [key for key in required if key not in values]
    if missing:
        raise ValueError(f"field '{table}.{missing[0]}' is missing; {_article(role)} dialect needs {', '.join(required)}"
                         + (f" (optional: {', '.join(optional)})" if optional else ""))


def _check_template(op_name: str, template: str) -> None:
    """Known fields only, no nested fields, a format spec that formats a number."""
    allowed = TEMPLATE_FIELDS.get(op_name, frozenset())
    allowed_text = ", ".join(sorted(allowed)) or "none"
    try:
        used = template_fields(template)
        nested = _nested_field(template)
    except ValueError as exc:
        raise ValueError(f"field 'operations.{op_name}': bad template {template!r}: {exc}") from None
    if nested is not None:
        raise ValueError(f"field 'operations.{op_name}': nested field in {nested}: a format spec takes no "
                         f"fields of its own; allowed fields: {allowed_text}")
    unknown = sorted(used - allowed)
    if unknown:
        raise ValueError(f"field 'operations.{op_name}': unknown template field {{{unknown[0]}}}; allowed: {allowed_text}")
    # Catch a bad format spec (e.g. {freq_hz:.3q}) now rather than mid-run.
    try:
        template.format(**{field: 1.0 for field in used})
    except (ValueError, IndexError, KeyError, TypeError, AttributeError) as exc:
        raise ValueError(f"field 'operations.{op_name}': bad template {template!r}: {exc}") from None


def drivers_dirs() -> list[Path]:
    """Where named dialects live: the wheel's package data, else the source checkout's drivers/."""
    folder = data_dir("drivers")
    return [folder] if folder.is_dir() else []


def known_dialects() -> dict[str, Path]:
    """Dialect name (file stem) -> file, over drivers_dirs(); earlier directories win."""
    found: dict[str, Path] = {}
    for directory in drivers_dirs():
        for path in sorted(directory.glob("*.toml")):
            found.setdefault(path.stem, path)
    return found


def load_dialect(name_or_path: str) -> Dialect:
    """Load a dialect by name ("generic-analyzer") or by path to a .toml file."""
    if name_or_path.endswith(".toml") or "/" in name_or_path or "\\" in name_or_path:
        path = Path(name_or_path)
        if not path.is_file():
            raise InputError(f"dialect file {path} not found")
    else:
        known = known_dialects()
        if name_or_path not in known:
            raise InputError(
                f"unknown dialect '{name_or_path}'; known: {', '.join(sorted(known)) or 'none'}"
            )
        path = known[name_or_path]
    return _parse_file(path)


def _parse_file(path: Path) -> Dialect:
    data = read_toml(path, "dialect file")[1]

    header = data.pop("dialect", None)
    if not isinstance(header, dict):
        raise InputError(f"dialect file {path}: table [dialect] is missing; it needs name, role, description")
    extra = sorted(set(header) - set(_HEADER_KEYS))
    if extra:
        raise InputError(
            f"dialect file {path}: field 'dialect.{extra[0]}' is not a known setting; allowed: {', '.join(_HEADER_KEYS)}"
        )
    for key in _HEADER_KEYS:
        if key in data:
            raise InputError(f"dialect file {path}: field '{key}' belongs in the [dialect] table")
    try:
        return Dialect.model_validate({**header, **data})
    except ValidationError as exc:
        raise InputError(describe_validation_error(exc, f"dialect file {path}", _allowed_keys, _header_in_table)) from None


def _allowed_keys(loc: list[str]) -> list[str]:
    if loc[0] == "operations":
        return list(Operation.model_fields)
    if loc[0] == "io":
        return list(IoSettings.model_fields)
    return ["dialect", *(key for key in Dialect.model_fields if key not in _HEADER_KEYS)]


def _header_in_table(loc: list[str]) -> list[str]:
    """name, role and description are validated with the tables but written in [dialect]."""
    return ["dialect", *loc] if loc and loc[0] in _HEADER_KEYS else loc
