"""SCPI dialect files: which command string each role operation sends, and how replies parse.

A dialect file (drivers/*.toml) has a [dialect] table (name, role, description), [io], [limits],
optional [performance] and [status], and [operations]. Each operation is a `command` (written,
no reply) or a `query` (written, one reply line parsed by `reply`). Templates are Python format
strings whose field names are fixed per operation, so a role driver can fill them without
knowing the instrument.
"""

from __future__ import annotations

import string
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from tonebench.errors import InputError
from tonebench.packaged import data_dir

Role = Literal["source", "analyzer", "power_meter", "supply"]
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
    # No role driver exists yet for this one; it shares the common operations only.
    "supply": _COMMON_OPERATIONS,
}

# The role drivers read these numbers; a dialect without them could not be driven.
REQUIRED_LIMITS: dict[str, tuple[str, ...]] = {
    "source": ("min_power_dbm", "max_power_dbm", "min_freq_hz", "max_freq_hz"),
    "analyzer": ("min_freq_hz", "max_freq_hz", "min_atten_db", "max_atten_db"),
    "power_meter": ("min_power_dbm", "max_power_dbm", "min_freq_hz", "max_freq_hz"),
}
REQUIRED_PERFORMANCE: dict[str, tuple[str, ...]] = {
    "analyzer": ("mixer_toi_dbm", "danl_dbm_per_hz", "sweep_time_factor"),
}
REQUIRED_STATUS: dict[str, tuple[str, ...]] = {"analyzer": ("overload_bit",)}

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
}

# Keys of the [dialect] table; they are flattened into the model's top level.
_HEADER_KEYS = ("name", "role", "description")


def template_fields(template: str) -> set[str]:
    """Field names used in a format template ("" for a positional `{}`)."""
    return {field for _, field, _, _ in string.Formatter().parse(template) if field is not None}


class IoSettings(BaseModel):
    """Line terminations and the reply timeout (seconds) for ordinary queries."""

    model_config = ConfigDict(extra="forbid")

    read_termination: str = "\n"
    write_termination: str = "\n"
    query_timeout_s: float = Field(gt=0)


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
        for table, required in (
            ("operations", REQUIRED_OPERATIONS),
            ("limits", REQUIRED_LIMITS),
            ("performance", REQUIRED_PERFORMANCE),
            ("status", REQUIRED_STATUS),
        ):
            present = getattr(self, table)
            missing = [key for key in required.get(self.role, ()) if key not in present]
            if missing:
                raise ValueError(
                    f"{table}.{missing[0]}: missing; a {self.role} dialect needs "
                    f"{', '.join(required[self.role])}"
                )
        for op_name, op in self.operations.items():
            allowed = TEMPLATE_FIELDS.get(op_name, frozenset())
            try:
                used = template_fields(op.template)
            except ValueError as exc:
                raise ValueError(f"operations.{op_name}: bad template {op.template!r}: {exc}")
            unknown = sorted(used - allowed)
            if unknown:
                allowed_text = ", ".join(sorted(allowed)) or "none"
                raise ValueError(
                    f"operations.{op_name}: unknown template field {{{unknown[0]}}}; "
                    f"allowed: {allowed_text}"
                )
            # Catch a bad format spec (e.g. {freq_hz:.3q}) now rather than mid-run.
            try:
                op.template.format(**{field: 1.0 for field in used})
            except (ValueError, IndexError) as exc:
                raise ValueError(f"operations.{op_name}: bad template {op.template!r}: {exc}")
        return self


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
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: invalid TOML: {exc}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read: {exc}") from None

    header = data.pop("dialect", None)
    if not isinstance(header, dict):
        raise InputError(f"{path}: [dialect] table missing; it needs name, role, description")
    extra = sorted(set(header) - set(_HEADER_KEYS))
    if extra:
        raise InputError(
            f"{path}: dialect.{extra[0]}: unknown key; allowed: {', '.join(_HEADER_KEYS)}"
        )
    for key in _HEADER_KEYS:
        if key in data:
            raise InputError(f"{path}: {key}: belongs in the [dialect] table")
    try:
        return Dialect.model_validate({**header, **data})
    except ValidationError as exc:
        raise InputError(f"{path}: {_first_error(exc)}") from None


def _allowed_keys(loc: list[str]) -> str:
    if loc[0] == "operations":
        return ", ".join(Operation.model_fields)
    if loc[0] == "io":
        return ", ".join(IoSettings.model_fields)
    tables = [key for key in Dialect.model_fields if key not in _HEADER_KEYS]
    return ", ".join(["dialect", *tables])


def _first_error(exc: ValidationError) -> str:
    """One line for the first validation error, prefixed by its dotted field path."""
    errors = exc.errors()
    first = errors[0]
    loc = [str(part) for part in first["loc"]]
    if loc and loc[0] in _HEADER_KEYS:
        loc.insert(0, "dialect")
    message = first["msg"].removeprefix("Value error, ")
    if first["type"] == "missing":
        message = "missing"
    elif first["type"] == "extra_forbidden":
        message = f"unknown key; allowed: {_allowed_keys(loc)}"
    elif first["type"] == "literal_error":
        message = f"{message}, got {first['input']!r}"
    line = f"{'.'.join(loc)}: {message}" if loc else message
    if len(errors) > 1:
        line += f" (and {len(errors) - 1} more)"
    return line
