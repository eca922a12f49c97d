"""Finding stored things by what a user types: a run by its GUID or a unique prefix."""

from __future__ import annotations


from sqlalchemy import select
from sqlalchemy.orm import Session

from tonebench.errors import InputError
from tonebench.store.models import (
    Run,
)


def find_run(session: Session, ident: str) -> Run:
    """A run by its GUID or a unique GUID prefix (at least 4 characters)."""
    ident = ident.strip().lower()
    if len(ident) < 4:
        raise InputError(f"run '{ident}': give the run GUID or at least its first 4 characters")
    runs = session.scalars(select(Run).where(Run.guid.like(ident.replace("%", "").replace("_", "") + "%"))).all()
    if not runs:
        raise InputError(f"run '{ident}': no run with that GUID in this database (see `tonebench runs`)")
    if len(runs) > 1:
        raise InputError(f"run '{ident}': {len(runs)} runs start with that; give more of the GUID")
    return runs[0]
