"""Read a TOML file and validate it with a pydantic model, turning every failure into one line."""

from __future__ import annotations

import tomllib
import typing
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError, field_validator

from tonebench.config.quantities import with_units
from tonebench.errors import InputError

Model = TypeVar("Model", bound=BaseModel)


class StrictModel(BaseModel):
    """A table of a TOML file: an unknown key is an error (usually a typo), never ignored. A field
    whose name carries a unit (`_hz`, `_dbm`, ...) also takes a quantity such as "2.45 GHz"."""

    model_config = ConfigDict(extra="forbid")

    @field_validator("*", mode="before")
    @classmethod
    def _quantities(cls, value, info):
        return with_units(value, info.field_name)


def read_toml(path: Path, what: str) -> tuple[str, dict]:
    """Return the file's text and parsed table; InputError names the file on any failure."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{what} {path}: file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{what} {path}: cannot read ({exc})") from None
    return text, parse_toml(text, f"{what} {path}")


def parse_toml(text: str, origin: str) -> dict:
    """The parsed table of TOML text; InputError 'origin: not valid TOML (why, line n)'."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{origin}: not valid TOML ({exc})") from None


def validate(model: type[Model], data: dict, origin: str) -> Model:
    """Validate `data`; the first error becomes one line (describe_validation_error)."""
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InputError(describe_validation_error(exc, origin, lambda loc: known_keys(model, loc))) from None


def describe_validation_error(exc: ValidationError, origin: str,
                              allowed: Callable[[list[str]], list[str] | None] | None = None,
                              loc_of: Callable[[list[str]], list[str]] | None = None) -> str:
    """The one wording of a bad file's first error, naming the file (origin) and the field:
    "origin: field 'a.b' is missing", "...field 'a.b' is not a known setting; allowed: x, y",
    "...field 'a.b': why; got value" (a table's value is not repeated); a check of a whole table
    is "field '(top level)': why" unless why names the field; "(and n more)" when there are more.

    allowed(loc) lists the keys allowed beside an unknown one; loc_of rewrites a field path
    (a dialect's header keys live in its [dialect] table)."""
    errors = exc.errors()
    first = errors[0]
    loc = [str(part) for part in first["loc"]]
    if loc_of is not None:
        loc = loc_of(loc)
    field = ".".join(loc) or "(top level)"
    if first["type"] == "missing":
        line = f"field '{field}' is missing"
    elif first["type"] == "extra_forbidden":
        keys = allowed(loc) if allowed is not None else None
        line = f"field '{field}' is not a known setting" + (f"; allowed: {', '.join(keys)}" if keys else "")
    else:
        message = first["msg"].removeprefix("Value error, ")
        value = first.get("input")
        got = "" if isinstance(value, (dict, list)) else f"; got {value!r}"
        # A check of a whole table names its field itself, when it can.
        line = message if not loc and message.startswith("field '") else f"field '{field}': {message}{got}"
    more = f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""
    return f"{origin}: {line}{more}"


def _model_in(annotation) -> type[BaseModel] | None:
    """The pydantic model an annotation holds: itself, optional, or as list or dict items."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in typing.get_args(annotation):
        found = _model_in(arg)
        if found is not None:
            return found
    return None


def known_keys(model: type[BaseModel], loc: list[str]) -> list[str] | None:
    """The keys allowed in the table holding the last part of `loc`, or None if not a table of
    models (list indexes and dict keys on the way are stepped over)."""
    current: type[BaseModel] | None = model
    for part in loc[:-1]:
        fields = current.model_fields
        if part in fields:
            current = _model_in(fields[part].annotation)
            if current is None:
                return None
    return [field.alias or name for name, field in current.model_fields.items()]
