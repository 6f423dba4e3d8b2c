# Shared set-up: validate the configuration and the catalog's structure before any
# job runs, and name every path the rules use. Nothing here reads catalog rows.
import sys
from pathlib import Path

sys.path.insert(0, str(Path(workflow.basedir) / "workflow"))

from snakemake.exceptions import WorkflowError

from galdist import config as gconfig
from galdist import ingest as gingest

DEMO_CATALOG = "results/demo-input/corvid_reach_survey.parquet"

try:
    gconfig.validate(config)
    CATALOG_PATHS, CATALOG_FORMAT = gconfig.catalog_spec(config)
    gconfig.check_inputs_exist(CATALOG_PATHS, buildable={DEMO_CATALOG})
    gconfig.check_bands(config)
    BANDS = list(config["bands"])
    METHODS = list(config["methods"])
    if Path(CATALOG_PATHS[0]).exists():
        INGEST_PLAN = gingest.plan(CATALOG_PATHS, CATALOG_FORMAT, config["columns"], config["units"],
                                   BANDS, METHODS)
except (gconfig.ConfigError, gingest.IngestError, gingest.CatalogError) as exc:
    raise WorkflowError(f"galdist cannot start: {exc}") from None

RUN = f"results/{config['run']}"
LOGS = f"{RUN}/logs"
BENCH = f"{RUN}/benchmarks"
SHARDS = f"{RUN}/shards"


def shard_ids(wildcards=None):
    """Shard indices, known once the ingest checkpoint has run."""
    shard_dir = checkpoints.ingest.get().output.shards
    return sorted(p.name[len("part-"):-len(".parquet")] for p in Path(shard_dir).glob("part-*.parquet"))


def final_targets():
    return [f"{RUN}/ingest_summary.json"]
