"""End-to-end runs of the workflow on the demo survey and on a user catalog."""

from __future__ import annotations

import json

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import run_snakemake, small_catalog

pytestmark = pytest.mark.slow


def test_demo_end_to_end(workflow_copy):
    result = run_snakemake(workflow_copy, "--config", "demo={n_galaxies: 600}")
    assert result.returncode == 0, result.stderr[-3000:]
    run = workflow_copy / "results" / "demo"
    summary = json.loads((run / "ingest_summary.json").read_text())
    assert summary["rows_in"] == summary["rows_out"] == 600
    shards = sorted((run / "shards" / "ingest").glob("part-*.parquet"))
    assert sum(pq.read_metadata(s).num_rows for s in shards) == 600
    assert (run / "logs" / "ingest.log").read_text().count("done in") == 1
    # a second run has nothing to do
    again = run_snakemake(workflow_copy, "-n", "--config", "demo={n_galaxies: 600}")
    assert "Nothing to be done" in again.stdout + again.stderr


def test_user_catalog_by_name_on_the_command_line(workflow_copy):
    pq.write_table(pa.table(small_catalog(25)), workflow_copy / "my.parquet")
    result = run_snakemake(workflow_copy, "--config", "catalog=my.parquet", "run=mine")
    assert result.returncode == 0, result.stderr[-3000:]
    summary = json.loads((workflow_copy / "results" / "mine" / "ingest_summary.json").read_text())
    assert summary["rows_out"] == 25


def test_dry_run_shows_the_dag(workflow_copy):
    result = run_snakemake(workflow_copy, "-n")
    out = result.stdout + result.stderr
    assert result.returncode == 0, out[-2000:]
    assert "demo_catalog" in out and "ingest" in out
