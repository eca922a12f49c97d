"""Open a tonebench database: check its URL, bring its schema to this code's revision.

Alembic is configured in code (there is no alembic.ini); the migration scripts live in the
project's migrations/ folder, or in tonebench/_data/migrations inside an installed wheel. Alembic
is imported only to migrate: the revisions are read from the scripts' own `revision =` lines and
the database's from its alembic_version table (a tenth of a second saved on every command).
"""

from __future__ import annotations

import functools
import re
import sqlite3
import time
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError, NoSuchModuleError
from sqlalchemy.orm import sessionmaker

from tonebench.errors import DatabaseError, InputError
from tonebench.packaged import data_dir
from tonebench.plan.axes import point_name_of_key

URL_EXAMPLES = "use e.g. sqlite:///path/to/file.db or postgresql+psycopg://user@host/dbname"
SQLITE_BUSY_TIMEOUT_MS = 10_000  # a second writer waits this long before "database is locked"


def default_db_url() -> str:
    """tonebench.db in the current directory."""
    return f"sqlite:///{Path.cwd() / 'tonebench.db'}"


DEFAULT_DB_URL = default_db_url()


def migrations_dir() -> Path:
    """Installed copy inside the package if present, else the source tree's migrations/."""
    return data_dir("migrations")


def alembic_config(connection: sa.Connection | None = None):
    """Alembic configuration for tonebench's migrations; env.py uses `connection` when given."""
    from alembic.config import Config

    config = Config()
    # ConfigParser interpolates '%', so a path holding one must be escaped.
    config.set_main_option("script_location", str(migrations_dir()).replace("%", "%%"))
    config.set_main_option("path_separator", "os")
    if connection is not None:
        config.attributes["connection"] = connection
    return config


_REVISION_LINE = re.compile(r"^(revision|down_revision)\s*=\s*(?:None|['\"]([^'\"]+)['\"])", re.MULTILINE)


@functools.cache
def _revisions() -> dict[str, str | None]:
    """revision -> the revision it follows, from the migration scripts."""
    revisions = {}
    for script in sorted((migrations_dir() / "versions").glob("*.py")):
        found = {name: value or None for name, value in _REVISION_LINE.findall(script.read_text(encoding="utf-8"))}
        if found.get("revision"):
            revisions[found["revision"]] = found.get("down_revision")
    return revisions


def schema_head() -> str:
    """The newest schema revision this code knows: the one no other script follows."""
    revisions = _revisions()
    heads = set(revisions) - set(revisions.values())
    if len(heads) != 1:
        raise DatabaseError(f"migration scripts in {migrations_dir()}: {len(heads)} heads; expected one")
    return heads.pop()


def database_revision(engine: sa.Engine) -> str | None:
    """Schema revision stamped in the database, None for a database tonebench never touched."""
    with engine.connect() as connection:
        if not sa.inspect(connection).has_table("alembic_version"):
            return None
        heads = connection.execute(sa.text("SELECT version_num FROM alembic_version")).scalars().all()
    return heads[0] if heads else None


def open_database(url: str, *, upgrade: bool = True, read_only: bool = False) -> sa.Engine:
    """Engine for `url`, its schema at this code's head.

    Raises InputError for a URL that cannot be used (unparseable, unknown dialect or driver,
    driver not installed, missing directory, unreachable server, in-memory SQLite) and
    DatabaseError for a schema newer than this code, or older when upgrade is False.
    read_only (the commands that only show what is stored): an SQLite file must exist already,
    never created by a mistyped path, and no migration runs (upgrade is False).
    """
    parsed = _parse_url(url)
    shown = parsed.render_as_string(hide_password=True)
    if read_only:
        upgrade = False
        _check_sqlite_exists(parsed, shown)
    engine = _create_engine(parsed, shown, foreign_keys=True)
    try:
        _check_reachable(engine, shown)
        current = database_revision(engine)
        head = schema_head()
        if current == head:
            return engine
        if current is not None and not _is_known(current):
            raise DatabaseError(
                f"database {shown} is at schema revision {current}, newer than this tonebench "
                f"(knows up to {head}); upgrade tonebench"
            )
        if not upgrade:
            raise DatabaseError(
                f"database {shown} is at schema revision {current or 'none'}, older than this "
                f"tonebench ({head}); run `tonebench db upgrade`"
            )
        _upgrade(parsed, shown)
        return engine
    except BaseException:
        engine.dispose()
        raise


def upgrade_database(url: str) -> str:
    """Bring the database at `url` to the newest schema; returns the revision it is now at."""
    engine = open_database(url, upgrade=True)
    try:
        revision = database_revision(engine)
    finally:
        engine.dispose()
    assert revision is not None
    return revision


def session_factory(engine: sa.Engine) -> sessionmaker:
    """Sessions whose objects stay readable after commit (the sequencer keeps using them)."""
    return sessionmaker(bind=engine, expire_on_commit=False)


def _bad_url(shown: str, reason: str) -> InputError:
    reason = " ".join(str(reason).split()) or "unknown error"
    return InputError(f"bad database URL '{shown}': {reason}; {URL_EXAMPLES}")


def _mask_password(text: str) -> str:
    """Best effort for strings that would not parse: hide what sits between user: and @."""
    return re.sub(r"(://[^/:@\s]*:)[^@\s]*@", r"\1***@", text)


def _parse_url(url: str) -> sa.URL:
    try:
        parsed = make_url(url)
    except (ArgumentError, ValueError, TypeError) as exc:
        raise _bad_url(_mask_password(str(url)), f"not a URL ({exc})") from None
    shown = parsed.render_as_string(hide_password=True)
    try:
        parsed.get_dialect()
    except NoSuchModuleError:
        raise _bad_url(shown, f"unknown database kind or driver '{parsed.drivername}'") from None
    if parsed.get_backend_name() == "sqlite":
        _check_sqlite_path(parsed, shown)
    return parsed


def _check_sqlite_path(parsed: sa.URL, shown: str) -> None:
    # SQLite creates the file on connect but never its folder; check first so a typo leaves
    # nothing behind.
    database = parsed.database
    if not database or database == ":memory:" or "mode=memory" in database or parsed.query.get("mode") == "memory":
        # Each connection would get its own empty database, gone with the process: a run's
        # record must outlive it.
        raise _bad_url(shown, "an in-memory SQLite database does not outlive the process; give a file")
    if database.startswith("file:"):
        return
    path = Path(database).expanduser()
    if path.is_dir():
        raise _bad_url(shown, f"{path} is a directory, not a database file")
    if not path.parent.is_dir():
        raise _bad_url(shown, f"directory {path.parent} does not exist")


def _check_sqlite_exists(parsed: sa.URL, shown: str) -> None:
    database = parsed.database
    if parsed.get_backend_name() != "sqlite" or not database or database.startswith("file:"):
        return
    path = Path(database).expanduser()
    if not path.is_file():
        raise _bad_url(shown, f"no database file {path} (this command only reads; check the path, "
                              "or run or import something into it first)")


def _create_engine(parsed: sa.URL, shown: str, *, foreign_keys: bool) -> sa.Engine:
    try:
        engine = sa.create_engine(parsed)
    except ImportError as exc:
        reason = f"driver for '{parsed.drivername}' is not installed ({exc})"
        raise _bad_url(shown, reason) from None
    except (ArgumentError, NoSuchModuleError, TypeError, ValueError) as exc:
        raise _bad_url(shown, str(exc)) from None
    if engine.dialect.name == "sqlite":
        _add_sqlite_pragmas(engine, foreign_keys=foreign_keys)
    _report_disk_full(engine, shown)
    return engine


class DiskFull(DatabaseError):
    """The database could not be written for lack of space. point_key and run_id are set when it
    happened while a point was being stored (what a resume then measures again)."""

    def __init__(self, message: str, point_key: str | None = None, run_id: int | None = None):
        super().__init__(message)
        self.point_key = point_key
        self.run_id = run_id


SQLITE_FULL = 13  # sqlite3's result code for "database or disk is full"
POSTGRES_DISK_FULL = "53100"  # SQLSTATE disk_full


def is_disk_full(exc: BaseException) -> bool:
    orig = getattr(exc, "orig", exc)
    if getattr(orig, "sqlite_errorcode", None) == SQLITE_FULL or getattr(orig, "sqlstate", None) == POSTGRES_DISK_FULL:
        return True
    text = str(orig).lower()
    return "disk is full" in text or "no space left on device" in text


def _report_disk_full(engine: sa.Engine, shown: str) -> None:
    # Turned into one line where it happens, whoever writes (a point, an event, the heartbeat).
    # SQLite writes at COMMIT, where the statement is gone, so each connection remembers what
    # its transaction writes for a run (the point's key, the run's id) until the next begins.
    @event.listens_for(engine, "before_cursor_execute")
    def _remember(connection, cursor, statement, parameters, context, executemany):
        head = statement.lstrip()[:20].upper()
        if not head.startswith(("INSERT INTO POINTS", "INSERT INTO EVENTS", "UPDATE RUNS")):
            return
        params = context.compiled_parameters[0] if context is not None and context.compiled_parameters else {}
        run_id = params.get("run_id", params.get("runs_id", params.get("id_1")))
        writing = connection.info.setdefault("tonebench_writing", {})
        if run_id is not None:
            writing["run_id"] = run_id
        if head.startswith("INSERT INTO POINTS") and params.get("point_key"):
            writing["point_key"] = params["point_key"]

    @event.listens_for(engine, "begin")  # not at commit: that event comes before the commit's write
    def _forget(connection):
        connection.info.pop("tonebench_writing", None)

    @event.listens_for(engine, "handle_error")
    def _disk_full(context):
        if not is_disk_full(context.original_exception):
            return None
        connection = context.connection
        writing = dict(connection.info.get("tonebench_writing", {})) if connection is not None else {}
        point_key, run_id = writing.get("point_key"), writing.get("run_id")
        return DiskFull(_disk_full_message(engine, shown, point_key, run_id), point_key, run_id)


def _disk_full_message(engine: sa.Engine, shown: str, point_key: str | None, run_id: int | None) -> str:
    """The one line for a full disk: what was being stored and how far the run is stored. Its
    transaction is rolled back, so everything committed before is whole; reading still works
    on a full disk, so the run and its count come from a second connection."""
    nothing = (f"disk full while writing to database {shown}; the write was rolled back, nothing is "
               "half-written; free space and try again")
    if run_id is None:
        return nothing
    try:
        with engine.connect() as connection:
            guid = connection.execute(sa.text("SELECT guid FROM runs WHERE id = :id"), {"id": run_id}).scalar()
            stored = connection.execute(sa.text("SELECT count(*) FROM points WHERE run_id = :id"), {"id": run_id}).scalar()
    except Exception:  # noqa: BLE001 - the line is still given, only without the count
        guid, stored = "RUN", "its last committed one"
    if guid is None:  # the run's own first write: nothing of it is stored
        return nothing
    short = str(guid)[:8]
    what = f"point {point_name_of_key(point_key)} of run {short}" if point_key else f"run {short}"
    return (f"disk full while storing {what} (database {shown}); the run is stored up to point {stored}; "
            f"free space and `tonebench resume {short}`")


def _add_sqlite_pragmas(engine: sa.Engine, *, foreign_keys: bool) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, connection_record):
        # WAL lets reports read while a run writes; busy_timeout makes a second writer wait
        # instead of failing at once. Both need to be outside a transaction: on connect is.
        # busy_timeout first: switching a fresh file to WAL takes a lock another process may hold.
        cursor = dbapi_connection.cursor()
        cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
        _switch_to_wal(cursor)
        # The usual choice for an append-only log in WAL mode (SQLite's PRAGMA synchronous
        # documentation): a crashed process loses nothing committed; a power cut can lose the
        # last commits since the last checkpoint, never the file's consistency.
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute(f"PRAGMA foreign_keys={'ON' if foreign_keys else 'OFF'}")
        cursor.close()


def _switch_to_wal(cursor) -> None:
    """PRAGMA journal_mode=WAL, tried again once the process holding the lock it needs is done.

    On a fresh file that switch answers "database is locked" at once, without waiting out the
    busy timeout (SQLite's deadlock rule: it holds a read lock and wants the write lock); four
    processes opening one fresh file hit it about 1 open in 17 (measured, raw sqlite3). A write
    transaction begun with no lock held does wait (SQLite's busy handler, up to the busy
    timeout) until the other process has let go, so one is begun and ended before trying again."""
    deadline = time.monotonic() + SQLITE_BUSY_TIMEOUT_MS / 1000
    while True:
        try:
            cursor.execute("PRAGMA journal_mode=WAL")
            return
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) or time.monotonic() > deadline:
                raise
            cursor.execute("BEGIN IMMEDIATE")  # waits for the holder; "locked" after the busy timeout
            cursor.execute("ROLLBACK")


def _check_reachable(engine: sa.Engine, shown: str) -> None:
    try:
        with engine.connect() as connection:
            connection.exec_driver_sql("SELECT 1")
    except sa.exc.DBAPIError as exc:
        reason = str(exc.orig).strip() or type(exc.orig).__name__
        if "database is locked" in reason:  # the URL is fine: another process holds the file
            raise DatabaseError(f"database {shown} stayed locked by another process for "
                                f"{SQLITE_BUSY_TIMEOUT_MS // 1000} s; try again when it is done") from None
        raise _bad_url(shown, reason.splitlines()[0]) from None


def _is_known(revision: str) -> bool:
    return revision in _revisions()


def _upgrade(parsed: sa.URL, shown: str) -> None:
    # Migrations get their own engine: on SQLite foreign keys must be off while batch mode
    # copies and drops tables (a DROP would otherwise cascade into child rows), and the whole
    # upgrade runs in one explicit transaction so a crash leaves the old schema, not half of one.
    from alembic import command
    from alembic.runtime.migration import MigrationContext
    from alembic.util.exc import CommandError

    engine = _create_engine(parsed, shown, foreign_keys=False)
    if engine.dialect.name == "sqlite":
        _use_explicit_sqlite_transactions(engine)
    try:
        with engine.begin() as connection:
            _lock_for_migration(connection)
            # Another process may have migrated while this one waited for the lock.
            if MigrationContext.configure(connection).get_current_heads() == (schema_head(),):
                return
            command.upgrade(alembic_config(connection), "head")
            if connection.dialect.name == "sqlite":
                broken = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if broken:
                    raise DatabaseError(
                        f"upgrading {shown} left {len(broken)} rows with broken foreign keys "
                        f"(first: {tuple(broken[0])}); the upgrade was rolled back"
                    )
    except (CommandError, sa.exc.SQLAlchemyError) as exc:
        message = " ".join(str(exc).split())
        raise DatabaseError(f"cannot upgrade database {shown}: {message}") from None
    finally:
        engine.dispose()


# Any fixed number serves: it names tonebench's migration lock among the server's advisory locks.
POSTGRES_MIGRATION_LOCK = 0x746F6E65  # "tone"


def _lock_for_migration(connection: sa.Connection) -> None:
    """One process migrates at a time; the others wait here, then find the schema at head.

    SQLite: the transaction began with BEGIN IMMEDIATE (the write lock, waited for up to the busy
    timeout); a plain BEGIN takes a read lock first, and a reader that later wants to write while
    another process writes gets "database is locked" at once (SQLite's deadlock rule), which is
    what failed 3 of 4 processes opening a fresh file together. PostgreSQL: a transaction-scoped
    advisory lock, released at commit or rollback.
    """
    if connection.dialect.name == "postgresql":
        connection.exec_driver_sql(f"SELECT pg_advisory_xact_lock({POSTGRES_MIGRATION_LOCK})")


def _use_explicit_sqlite_transactions(engine: sa.Engine) -> None:
    # Python's sqlite3 module does not put DDL in a transaction by itself; take over BEGIN
    # (recipe from the SQLAlchemy SQLite dialect docs, "Serializable isolation / Savepoints /
    # Transactional DDL").
    @event.listens_for(engine, "connect")
    def _no_implicit_begin(dbapi_connection, connection_record):
        dbapi_connection.isolation_level = None

    @event.listens_for(engine, "begin")
    def _explicit_begin(connection):
        connection.exec_driver_sql("BEGIN IMMEDIATE")  # the write lock now: see _lock_for_migration
