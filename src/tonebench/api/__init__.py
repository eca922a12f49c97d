"""The Python API for notebooks and scripts (the names in tonebench.__all__): a database opened
read-only, its runs, points and results as pandas DataFrames, the same queries as `tonebench
find`, and the report's figures. The top layer beside cli/: it may import anything but cli/.
Nothing here writes unless the call says so (Database.analyze)."""
