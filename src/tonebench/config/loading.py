"""Read a TOML file and validate it with a pydantic model, turning every failure into one line."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError

from tonebench.errors import InputError

Model = TypeVar("Model", bound=BaseModel)


class StrictModel(BaseModel):
    """A table of a TOML file: an unknown key is an error (usually a typo), never ignored."""

    model_config = ConfigDict(extra="forbid")


def read_toml(path: Path, what: str) -> tuple[str, dict]:
    """Return the file's text and parsed table; InputError names the file on any failure."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{what} {path}: file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{what} {path}: cannot read ({exc})") from None
    try:
        return text, tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{what} {path}: not valid TOML ({exc})") from None


def validate(model: type[Model], data: dict, origin: str) -> Model:
    """Validate `data`; the first error becomes 'origin: field.path: message (got value)'."""
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InputError(describe_validation_error(exc, origin)) from None


def describe_validation_error(exc: ValidationError, origin: str) -> str:
    first = exc.errors()[0]
    field = ".".join(str(part) for part in first["loc"]) or "(top level)"
    message = first["msg"]
    if first["type"] == "missing":
        return f"{origin}: field '{field}' is missing"
    if first["type"] == "extra_forbidden":
        return f"{origin}: field '{field}' is not a known setting"
    got = first.get("input")
    more = f" (and {len(exc.errors()) - 1} more)" if len(exc.errors()) > 1 else ""
    return f"{origin}: field '{field}': {message}; got {got!r}{more}"
