# galdist: local galaxy survey catalogs -> corrected, calibrated, cross-checked distances.
# Read top to bottom as the DAG; each stage's rules live in workflow/rules/<stage>.smk.
from snakemake.utils import min_version

min_version("9.0")


configfile: "config/config.yaml"


include: "workflow/rules/common.smk"
include: "workflow/rules/demo.smk"
include: "workflow/rules/ingest.smk"


rule all:
    input:
        final_targets(),
    default_target: True
