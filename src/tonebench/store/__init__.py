"""The measurement store: the tables (models/, one module per table family), opening and migrating
a database (database), the point record (point_record) and its one writer (point_writer), a run's
lifecycle rows (records), run ownership and resuming (ownership), the bench lock (bench_lock) and
finding a run (lookups).

Imports only tonebench.errors and the package version: never the instruments, the analysis or
any layer above (calibration, catalog, results, report, run, queue, cli).
"""

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
