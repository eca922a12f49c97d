"""Alembic environment for tonebench.

tonebench configures Alembic in code (tonebench.store.database.alembic_config) and hands over an
open connection in config.attributes["connection"]; a "sqlalchemy.url" main option is used
instead when no connection is given. There is no offline (SQL script) mode.
"""

from alembic import context
from sqlalchemy import create_engine

from tonebench.store.models import Base

config = context.config
target_metadata = Base.metadata


def run_on(connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        # SQLite cannot ALTER most things; batch mode copies the table instead.
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        run_on(connection)
        return
    url = config.get_main_option("sqlalchemy.url")
    if not url:
        raise RuntimeError(
            "tonebench migrations need config.attributes['connection'] or a sqlalchemy.url option"
        )
    engine = create_engine(url)
    try:
        with engine.begin() as connection:
            run_on(connection)
    finally:
        engine.dispose()


if context.is_offline_mode():
    raise RuntimeError("tonebench migrations run online only (no SQL script mode)")
run_online()
