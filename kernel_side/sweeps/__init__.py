"""Sweeps: the spec, one run, the SQLite results database and the chart data."""
