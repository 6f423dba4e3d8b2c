"""galdist: pure, vectorised functions from survey catalog columns to distances.

Nothing in this package knows about Snakemake; the workflow's rule scripts call it.
"""

__version__ = "0.1.0"
