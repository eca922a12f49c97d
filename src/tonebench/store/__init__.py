"""The measurement store: tables (models) and opening/migrating a database (database)."""

from tonebench.store.database import (
    DEFAULT_DB_URL,
    default_db_url,
    open_database,
    schema_head,
    session_factory,
    upgrade_database,
)
from tonebench.store.models import (
    Base,
    Bench,
    Device,
    Event,
    Instrument,
    Offset,
    Plan,
    Point,
    Result,
    Run,
    result_group_key,
)

__all__ = [
    "DEFAULT_DB_URL", "default_db_url", "open_database", "schema_head", "session_factory",
    "upgrade_database", "Base", "Bench", "Device", "Event", "Instrument", "Offset", "Plan",
    "Point", "Result", "Run", "result_group_key",
]
