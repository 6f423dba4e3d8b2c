"""The benchmark's parts (``scripts/benchmark.py`` runs them): synthetic catalogs,
workflow runs, the I/O floor, profiles, the report. Speed and memory are measured here,
never asserted in tests."""
