"""The one way an HTML page is made and written: one stylesheet, one page shell (plotly.js embedded
once in the head, so a page opens on an offline lab PC), one checked and atomic file write."""

from __future__ import annotations

import html
import os
import stat
import tempfile
from pathlib import Path

from plotly.offline import get_plotlyjs

from tonebench.errors import InputError
from tonebench.files import replace_atomically

# Pages differ in width only (body class "wide": the comparison's many-column tables).
STYLE = """
body { font-family: system-ui, sans-serif; margin: 1.5rem auto; padding: 0 1rem; max-width: 72rem; color: #222; }
body.wide { max-width: 76rem; }
h1 { font-size: 1.4rem; margin-bottom: 0.5rem; }
h2 { font-size: 1.1rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
p.note { color: #555; font-size: 0.9rem; }
dl.summary { display: grid; grid-template-columns: max-content auto; gap: 0.2rem 1rem; }
dl.summary dt { font-weight: 600; }
dl.summary dd { margin: 0; font-family: ui-monospace, monospace; }
.figure, .sweep { margin: 1rem 0; border: 1px solid #e2e2e2; }
table { border-collapse: collapse; font-size: 0.85rem; width: 100%; }
th, td { border: 1px solid #d0d0d0; padding: 0.25rem 0.45rem; }
th { background: #f2f2f2; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
"""


def page_html(title: str, body: str, body_class: str | None = None) -> str:
    """A whole self-contained page: `title` is plain text (escaped here), `body` is HTML."""
    attribute = "" if body_class is None else f' class="{body_class}"'
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>{html.escape(title)}</title>
<style>{STYLE}</style>
<script type="text/javascript">{get_plotlyjs()}</script>
</head>
<body{attribute}>
{body}
</body>
</html>
"""


def check_report_path(path: Path, what: str = "report path") -> Path:
    """The file an HTML page may be written to, checked before anything is measured or written.

    A page is never written over a directory, a device, a FIFO or any other non-regular file
    (os.replace would swap /dev/null for a regular file); the folder must exist and take a new
    file (probed with a temporary file, which also catches read-only mounts and, for root,
    what permission bits alone would not show). A symlink is followed to the file it names.
    """
    path = Path(path)
    if path.is_symlink():
        path = path.resolve()
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        mode = None
    except OSError as exc:
        raise InputError(f"{what} {path}: cannot be checked ({exc.strerror or exc}); give an HTML file path") from None
    if mode is not None and stat.S_ISDIR(mode):
        raise InputError(f"{what} {path} is a directory; give a file path such as {path / 'report.html'}")
    if mode is not None and not stat.S_ISREG(mode):
        raise InputError(f"{what} {path} is not a regular file (a device, FIFO or socket); it is never "
                         "replaced: give a file path in a folder")
    folder = path.parent
    if not folder.is_dir():
        raise InputError(f"{what} {path}: directory {folder} does not exist; give a file in an existing directory")
    try:
        probe_fd, probe_name = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=".probe")
    except OSError as exc:
        raise InputError(f"{what} {path}: cannot create a file in {folder} ({exc.strerror or exc}); "
                         "give a file in a writable directory") from None
    os.close(probe_fd)
    os.unlink(probe_name)
    return path


def write_html_file(path: Path, page: str, what: str = "report path") -> Path:
    """Write `page` to `path`: checked (check_report_path), then written whole or not at all
    (tonebench.files.replace_atomically), so a reader never sees half a page."""
    path = check_report_path(path, what)
    return replace_atomically(path, lambda tmp_name: Path(tmp_name).write_text(page, encoding="utf-8"), what)

