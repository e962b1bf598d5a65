"""Acquisition: rig files, the sweep engine, the SQLite run log, the dashboard, the CLI."""

__version__ = "0.1.0"
