"""Files written whole or not at all: into a temporary file beside the target, fsynced, then
renamed over it, so a reader never sees half a file and a failure leaves the old one."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path

from tonebench.errors import TonebenchError


def replace_atomically(path: Path, write: Callable[[str], None], what: str) -> Path:
    """Call write(temporary path), make the file readable by all (it is meant to be shared),
    fsync it and rename it over `path`. A disk failure is TonebenchError naming `what`."""
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        write(tmp_name)
        os.chmod(tmp_name, 0o644)  # mkstemp makes it private
        synced = os.open(tmp_name, os.O_RDONLY)
        try:
            os.fsync(synced)
        finally:
            os.close(synced)
        os.replace(tmp_name, path)
    except OSError as exc:
        Path(tmp_name).unlink(missing_ok=True)
        # The path was checked beforehand, so this is the disk (full, failing): exit 1.
        raise TonebenchError(f"{what} {path}: cannot be written ({exc.strerror or exc}); nothing was replaced") from None
    except BaseException:
        Path(tmp_name).unlink(missing_ok=True)
        raise
    return path
