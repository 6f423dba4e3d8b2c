# Shared set-up: validate the configuration, the calibrations and the catalog's
# structure before any job runs, and name every path the rules use. Nothing here
# reads catalog rows.
import sys
from pathlib import Path

sys.path.insert(0, str(Path(workflow.basedir) / "workflow"))

from snakemake.exceptions import WorkflowError

from galdist import config as gconfig
from galdist import ingest as gingest
from galdist.calibration import CalibrationError

DEMO_CATALOG = "results/demo-input/corvid_reach_survey.parquet"

try:
    _user = dict(config)
    config.clear()
    config.update(gconfig.layered(_user, gconfig.load(gconfig.DEFAULT_CONFIG)))
    gconfig.validate(config)
    CATALOG_PATHS, CATALOG_FORMAT = gconfig.catalog_spec(config)
    gconfig.check_inputs_exist(CATALOG_PATHS, buildable={DEMO_CATALOG})
    gconfig.check_bands(config)
    CALIBRATIONS = gconfig.check_stages(config)
    BANDS = list(config["bands"])
    METHODS = list(config["methods"])
    if Path(CATALOG_PATHS[0]).exists():
        INGEST_PLAN = gingest.plan(CATALOG_PATHS, CATALOG_FORMAT, config["columns"], config["units"],
                                   BANDS, METHODS, gconfig.extra_required_columns(config))
except (gconfig.ConfigError, gingest.IngestError, gingest.CatalogError, CalibrationError) as exc:
    raise WorkflowError(f"galdist cannot start: {exc}") from None

# the demo uses small shards; any other catalog the configured (default 10^6) size
SCHEMA_SHARD_ROWS = 1_000_000
SHARD_ROWS = (config["demo"]["shard_rows"]
              if CATALOG_PATHS == [DEMO_CATALOG] and config["shard_rows"] == SCHEMA_SHARD_ROWS
              else config["shard_rows"])

RUN = f"{config['output_dir']}/{config['run']}"
LOGS = f"{RUN}/logs"
BENCH = f"{RUN}/benchmarks"
SHARDS = f"{RUN}/shards"
GRIDS = f"{RUN}/grids"
EXTINCTION_MAPS = gconfig.extinction_map_files(config)
SBF_CAL = CALIBRATIONS["sbf"].name if "sbf" in CALIBRATIONS else None
TF_CAL = CALIBRATIONS["tully_fisher"].name if "tully_fisher" in CALIBRATIONS else None
# resolved files: a bare name in config is a calibration or table shipped with galdist
CALIBRATION_FILES = {m: cal.path for m, cal in CALIBRATIONS.items()}
EXTINCTION_TABLE = (str(gconfig.extinction_table_file(config))
                    if config["extinction"]["coefficients"] == "table" else None)


def shard_path(wildcards):
    """One ingest shard; known once the ingest checkpoint has run."""
    return f"{checkpoints.ingest.get().output.shards}/part-{wildcards.shard}.parquet"


def shard_ids():
    shard_dir = checkpoints.ingest.get().output.shards
    return sorted(p.name[len("part-"):-len(".parquet")] for p in Path(shard_dir).glob("part-*.parquet"))


def per_shard(pattern):
    """Input function: ``pattern`` (with {shard}) for every shard."""
    return lambda wildcards: [pattern.format(shard=s) for s in shard_ids()]
