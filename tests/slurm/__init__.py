"""Helpers for tests/test_slurm.py: a throw-away one-node SLURM cluster on localhost."""
