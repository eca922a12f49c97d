"""Move runs between databases: export to a portable file, import by run GUID without duplicates.

The file is gzip-compressed JSON lines, one record per line:
  {"kind": "header", "format": "tonebench-transfer", "version": 1, "schema": <revision>}
  {"kind": "bench" | "plan" | "device" | "calibration_set", ...}    shared records, once each
  {"kind": "run", ...}    a run with its instruments, offsets, events, points and results
  {"kind": "end", "records": <lines before this one>, "sha256": <hash of those lines>}
Records refer to each other by natural keys (bench name, plan sha256, device part number and
serial, calibration set name, run GUID), never by database ids, and every list is written in an
order that depends only on content. So the same runs always give the same bytes, and importing a
file and exporting the same runs again gives the identical file.

Import checks the hash and the version before writing anything, then adds every run whose GUID
the database lacks in one transaction; shared records already present (same key) are reused as
they are. Importing the same file twice adds nothing the second time.

The format lives in transfer_format.py, export in transfer_export.py, import in transfer_import.py.
"""

from tonebench.catalog.transfer_export import ExportSummary, export_runs
from tonebench.catalog.transfer_format import FORMAT, VERSION
from tonebench.catalog.transfer_import import ImportSummary, import_runs, verify

__all__ = ["FORMAT", "VERSION", "ExportSummary", "ImportSummary", "export_runs", "import_runs", "verify"]
