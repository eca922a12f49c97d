"""The version of tonebench, stored with every run (importable from any layer)."""

__version__ = "0.1.0"
