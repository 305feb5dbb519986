"""Offline analysis of captures, CSV files and tap sessions: frame modes from tap tests
(:mod:`.pencil`, :mod:`.taps`). Pure numpy/scipy; I/O stays in the CLI."""
