"""What every tonebench command shares: consoles, the --db option, one-line error handling."""

from __future__ import annotations

from contextlib import contextmanager
from typing import Annotated, Iterator

import typer
from rich.console import Console

from tonebench.errors import DatabaseError, InputError, TonebenchError

# soft_wrap: paths and one-line errors stay on one line whatever the terminal width.
out = Console(soft_wrap=True)
err = Console(stderr=True, soft_wrap=True)


def default_db() -> str:
    from tonebench.store.database import default_db_url

    return default_db_url()


DbOption = Annotated[
    str | None,
    typer.Option("--db", help="SQLAlchemy database URL (default: sqlite file tonebench.db in the current folder)."),
]


@contextmanager
def one_line_errors() -> Iterator[None]:
    """Bad input: one line and exit 2. Instrument or other tonebench failures: one line and exit 1."""
    try:
        yield
    except (InputError, DatabaseError) as exc:
        err.print(f"error: {exc}", markup=False, highlight=False)
        raise typer.Exit(2) from None
    except TonebenchError as exc:
        err.print(f"error: {exc}", markup=False, highlight=False)
        raise typer.Exit(1) from None
    except KeyboardInterrupt:
        err.print("interrupted: RF was switched off; the run is stored as aborted", markup=False)
        raise typer.Exit(130) from None


