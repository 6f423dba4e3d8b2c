# Shared set-up: validate the configuration, the calibrations and the catalog's
# structure (and a sample of its rows) before any job runs, and name every path the
# rules use.
import sys
from pathlib import Path

sys.path.insert(0, str(Path(workflow.basedir) / "workflow"))

from snakemake.exceptions import WorkflowError

from galdist import config as gconfig
from galdist import integrity, preflight
from galdist import kcorr as gkcorr
from galdist.methods import REGISTRY, plot_names, prefixes

DEMO_CATALOG = "results/demo-input/corvid_reach_survey.parquet"
DEMO_CALIBRATION_SAMPLE = "results/demo-input/corvid_reach_calibration.parquet"

# the user's config (--configfile, --config) laid over config/config.yaml, then every
# check that can run before a job (galdist.preflight, the same as `galdist check`)
# (a job started on a cluster node parses this file again: it skips the row sample)
# (answers that need speclite or dust_extinction are remembered in the grid cache, GRID_CACHE)
_checked = preflight.check(dict(config), buildable=frozenset({DEMO_CATALOG, DEMO_CALIBRATION_SAMPLE}),
                           sample_rows=workflow.is_main_process, remember=True)
config.clear()
config.update(_checked.config)
try:
    _checked.raise_on_error()
except gconfig.ConfigError as exc:
    raise WorkflowError(f"galdist cannot start: fix these and run again:\n{exc}") from None
for _warning in (f for f in _checked.findings if f.level == "warning"):
    print(f"galdist: warning [{_warning.check}] {_warning.message}", file=sys.stderr)
CATALOG_PATHS, CATALOG_FORMAT = gconfig.catalog_spec(config)
CALIBRATIONS = _checked.calibrations
# galdist.grid_cache: the once-per-configuration grids and parse-time answers, shared by the runs
GRID_CACHE = str(preflight.cache_dir(config))
BANDS = list(config["bands"])
METHODS = list(config["methods"])

# the demo uses small shards; any other catalog the configured (default 10^6) size
SCHEMA_SHARD_ROWS = 1_000_000
SHARD_ROWS = (config["demo"]["shard_rows"]
              if CATALOG_PATHS == [DEMO_CATALOG] and config["shard_rows"] == SCHEMA_SHARD_ROWS
              else config["shard_rows"])

RUN = f"{config['output_dir']}/{config['run']}"
LOGS = f"{RUN}/logs"
BENCH = f"{RUN}/benchmarks"
SHARDS = f"{RUN}/shards"
# a per-shard stage file: kept, or removed once its readers ran (config keep_intermediates)
stage_file = (lambda path: path) if config["keep_intermediates"] else temp
GRIDS = f"{RUN}/grids"
EXTINCTION_MAPS = gconfig.extinction_map_files(config)
# Content, not modification times: the digest of every external input is a parameter of
# the rules that read it, so a changed file re-runs them even with an older time stamp.
_DIGEST_CACHE = f"{config['output_dir']}/.galdist-digests.json"


def content_digest(paths):
    return integrity.content_digest([p for p in paths if p], _DIGEST_CACHE)


CATALOG_DIGEST = ("built by the workflow" if CATALOG_PATHS == [DEMO_CATALOG]
                  else content_digest(CATALOG_PATHS))
TEMPLATES_DIGEST = content_digest([config["kcorr"]["templates"] or gkcorr.DEFAULT_TEMPLATE_FILE])
MAPS_DIGEST = content_digest(EXTINCTION_MAPS)
FILTERS_DIGEST = content_digest([b["filter"] for b in config["bands"].values() if Path(b["filter"]).is_file()])
# a missing, truncated or replaced ingest shard: ingest runs again, and everything after
# it. Snakemake alone would not notice a file missing inside the checkpoint's folder;
# galdist's content check decides, and back-dates ingest's own outputs to tell it.
if workflow.is_main_process:
    _damage = integrity.ingest_damage(f"{SHARDS}/ingest", f"{RUN}/ingest_summary.json")
    if _damage:
        print(f"galdist: {_damage}: ingest will run again", file=sys.stderr)
        integrity.mark_for_rerun([f"{RUN}/ingest_summary.json", f"{SHARDS}/ingest"])

# resolved files: a bare name in config is a calibration or table shipped with galdist
CALIBRATION_FILES = {m: cal.path for m, cal in CALIBRATIONS.items()}
EXTINCTION_TABLE = (str(gconfig.extinction_table_file(config))
                    if config["extinction"]["coefficients"] == "table" else None)
CALIBRATION_DIGESTS = {m: cal.sha256 for m, cal in CALIBRATIONS.items()}
# what each method's jobs read of the config, with its calibration's conventions applied to this run
METHOD_CONFIG = {m: REGISTRY[m].used_config(config, cal, cache_dir=GRID_CACHE) for m, cal in CALIBRATIONS.items()}
TABLE_DIGEST = content_digest([EXTINCTION_TABLE])


# each per-shard stage's file of shard {shard}; a method's are keyed by its calibration's
# name, so two calibrations never overwrite each other
STAGE_SHARDS = {stage: f"{SHARDS}/{stage}/part-{{shard}}.parquet" for stage in ("extinction", "kcorr", "redshift")}
METHOD_SHARDS = {m: f"{SHARDS}/{m}/{CALIBRATIONS[m].name}/part-{{shard}}.parquet" for m in METHODS}
# likelihoods.write: each method job writes the shard's eta-likelihood part beside its file
# (the rows whose likelihood is not the analytic Gaussian; galdist.likelihood)
LIKELIHOODS_WRITTEN = bool(config["likelihoods"]["write"])
METHOD_LIKELIHOODS = ({m: f"{SHARDS}/{m}/{CALIBRATIONS[m].name}/eta-like-{{shard}}.parquet" for m in METHODS}
                      if LIKELIHOODS_WRITTEN else {})


def shard_path(wildcards):
    """One ingest shard; known once the ingest checkpoint has run."""
    return f"{checkpoints.ingest.get().output.shards}/part-{wildcards.shard}.parquet"


def shard_ids():
    shard_dir = checkpoints.ingest.get().output.shards
    return sorted(p.name[len("part-"):-len(".parquet")] for p in Path(shard_dir).glob("part-*.parquet"))


def per_shard(pattern):
    """Input function: ``pattern`` (with {shard}) for every shard."""
    return lambda wildcards: [pattern.format(shard=s) for s in shard_ids()]
