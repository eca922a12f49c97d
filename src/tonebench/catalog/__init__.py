"""The characterization catalog: device registry, spec limits and verdicts, result queries,
comparison reports, and moving runs between databases."""
