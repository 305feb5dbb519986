"""The logbook: airframes, their runs (with each run's analysis) and which run is each airframe's
baseline, in SQLite (the embedded default) or PostgreSQL (a shop's shared logbook)."""
