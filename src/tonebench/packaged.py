"""Where the data folders (drivers/, migrations/, sample_runs/) are, installed or in a checkout.

A wheel carries copies under tonebench/_data/; a source checkout (editable install or tests run
from the tree) uses the folders at the project root.
"""

from __future__ import annotations

from pathlib import Path

_PACKAGE_DIR = Path(__file__).resolve().parent


def data_dir(name: str) -> Path:
    installed = _PACKAGE_DIR / "_data" / name
    if installed.is_dir():
        return installed
    return _PACKAGE_DIR.parent.parent / name
