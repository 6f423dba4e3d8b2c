"""Configuration errors stop the run before any job, naming the key (one test per kind)."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import REPO, run_snakemake, small_catalog
from galdist import config as gconfig


def base_config():
    return gconfig.load(REPO / "config" / "config.yaml")


def test_default_config_is_valid_and_defaults_fill_in():
    conf = base_config()
    conf.pop("shard_rows", None)
    gconfig.validate(conf)
    assert conf["shard_rows"] == 1_000_000  # schema default
    assert conf["bands"]["V"]["system"] == "Vega"


@pytest.mark.parametrize("mutate,pattern", [
    (lambda c: c.update(bogus=1), r"unknown config key 'bogus' at the top level; allowed keys: bands"),
    (lambda c: c["catalog"].update(formt="csv"), r"unknown config key 'formt' in 'catalog'"),
    (lambda c: c.update(shard_rows="many"), r"config key 'shard_rows': 'many' is not of type 'integer'"),
    (lambda c: c.update(shard_rows=10), r"config key 'shard_rows': 10 is less than the minimum of 100"),
    (lambda c: c["bands"]["V"].update(system="vega"), r"config key 'bands.V.system': 'vega' is not one of"),
    (lambda c: c["bands"]["V"].pop("filter"), r"config key 'bands.V' is missing a required entry: 'filter'"),
    (lambda c: c.update(methods=["tully_fisher", "cepheids"]), r"config key 'methods.1'"),
    (lambda c: c.update(run="../escape"), r"config key 'run'"),
])
def test_schema_errors_name_the_key(mutate, pattern):
    conf = base_config()
    mutate(conf)
    with pytest.raises(gconfig.ConfigError, match=pattern):
        gconfig.validate(conf)


def test_unknown_filter_names_the_band():
    conf = gconfig.validate(base_config())
    conf["bands"]["V"]["filter"] = "nosuch-V"
    with pytest.raises(gconfig.ConfigError, match=r"bands.V.filter.*'nosuch-V' is neither a speclite filter name"):
        gconfig.check_bands(conf)


def test_missing_input_file():
    with pytest.raises(gconfig.ConfigError, match=r"config key 'catalog': input file not found: nope.parquet"):
        gconfig.check_inputs_exist(["nope.parquet"])


# --- the same errors through snakemake itself: stop before any job -------------------

def _write_config(tmp_path, conf):
    path = tmp_path / "user.yaml"
    path.write_text(yaml.safe_dump(conf))
    return str(path)


@pytest.mark.parametrize("kind", ["unknown_key", "wrong_type", "missing_file", "band_without_filter",
                                  "missing_column"])
def test_snakemake_stops_before_any_job(workflow_copy, kind):
    conf = base_config()
    if kind == "unknown_key":
        conf["shardrows"] = 5000
        pattern = "unknown config key 'shardrows'"
    elif kind == "wrong_type":
        conf["methods"] = "tully_fisher"
        pattern = "config key 'methods': 'tully_fisher' is not of type 'array'"
    elif kind == "missing_file":
        conf["catalog"] = "does/not/exist.fits"
        pattern = "input file not found: does/not/exist.fits"
    elif kind == "band_without_filter":
        conf["bands"]["R"] = {"system": "Vega"}
        pattern = "config key 'bands.R' is missing a required entry: 'filter'"
    else:
        cols = small_catalog(5)
        del cols["sbf_color"]
        pq.write_table(pa.table(cols), workflow_copy / "mine.parquet")
        conf["catalog"] = "mine.parquet"
        pattern = "missing column 'sbf_color' for canonical 'sbf_color' (needed by method sbf"
    # replace the defaults rather than merge into them
    (workflow_copy / "config" / "config.yaml").write_text(yaml.safe_dump(conf))
    result = run_snakemake(workflow_copy, "-n")
    assert result.returncode != 0
    out = result.stdout + result.stderr
    assert pattern in out.replace("\n", " ") or pattern in out, out[-2000:]
    assert "galdist cannot start" in out
    assert not (workflow_copy / "results").exists()  # no job ran, nothing was written
