"""Which database a command uses, and the one way it is named to the user.

In order: the --db option, the TONEBENCH_DB environment variable, `database = "..."` in the
per-user config file (config.toml in the usual per-user config folder of the OS, from
platformdirs: ~/.config/tonebench on Linux, ~/Library/Application Support/tonebench on macOS,
%APPDATA%\\tonebench on Windows; TONEBENCH_CONFIG names another file), else tonebench.db in the
current folder. Each may be a SQLAlchemy URL (anything with "://") or a plain file path, which
means an SQLite file there. The URL itself is checked when the database is opened
(store/database.py), with its own one-line errors.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import platformdirs

from tonebench.errors import InputError

ENV_DB = "TONEBENCH_DB"
ENV_CONFIG = "TONEBENCH_CONFIG"
DEFAULT_FILE = "tonebench.db"


@dataclass(frozen=True)
class DatabaseChoice:
    url: str
    origin: str  # where it came from: "--db", "TONEBENCH_DB", "config file <path>", "default"


def url_of(value: str, origin: str) -> str:
    """A URL as it is; a plain path as the URL of an SQLite file there (made absolute, so the
    run's stored location does not depend on the folder a later command runs in)."""
    text = value.strip()
    if not text:
        raise InputError(f"{origin}: the database is empty; give a file path (tonebench.db) or a URL "
                         "(sqlite:///path/to/file.db, postgresql+psycopg://user@host/dbname)")
    if "://" in text:
        return text
    path = Path(text).expanduser()
    if path.is_dir():
        raise InputError(f"{origin}: {path} is a folder; give a database file in it, e.g. {path / DEFAULT_FILE}")
    return f"sqlite:///{path.resolve()}"


def config_path(environ: Mapping[str, str] = os.environ) -> Path:
    named = environ.get(ENV_CONFIG)
    return Path(named).expanduser() if named else platformdirs.user_config_path("tonebench") / "config.toml"


def _from_config(path: Path) -> str | None:
    if not path.is_file():
        return None
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"config file {path}: not readable TOML ({' '.join(str(exc).split())})") from None
    value = data.get("database")
    if value is not None and not isinstance(value, str):
        raise InputError(f"config file {path}: 'database' must be a string (a file path or a URL)")
    return value


def choose_database(option: str | None, environ: Mapping[str, str] = os.environ) -> DatabaseChoice:
    """The database a command uses (see the module docstring for the order)."""
    if option is not None:
        return DatabaseChoice(url_of(option, "--db"), "--db")
    if environ.get(ENV_DB) is not None:
        return DatabaseChoice(url_of(environ[ENV_DB], ENV_DB), ENV_DB)
    path = config_path(environ)
    configured = _from_config(path)
    if configured is not None:
        origin = f"config file {path}"
        return DatabaseChoice(url_of(configured, origin), origin)
    return DatabaseChoice(url_of(DEFAULT_FILE, "default"), "default")


def describe(url: str) -> str:
    """The location as every command prints it: the file of an SQLite database, else the URL
    with any password hidden."""
    from sqlalchemy.engine import make_url

    try:
        parsed = make_url(url)
    except Exception:  # noqa: BLE001 - an unparseable URL is shown as given; opening it says what is wrong
        return url
    if parsed.get_backend_name() == "sqlite" and parsed.database:
        return f"{parsed.database} (SQLite)"
    return parsed.render_as_string(hide_password=True)
