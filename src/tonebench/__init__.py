"""tonebench: two-tone intercept measurements on real or simulated benches."""

__version__ = "0.1.0"
