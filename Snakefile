# galdist: local galaxy survey catalogs -> corrected, calibrated, cross-checked distances.
# Read top to bottom as the DAG; each stage's rules live in workflow/rules/<stage>.smk.
from snakemake.utils import min_version

min_version("9.0")

# No `configfile:` directive: common.smk lays the user's config (--configfile, --config)
# over config/config.yaml itself, so that a user's `bands` replaces the default bands
# instead of being merged into them, and so it is found from any working directory.


include: "workflow/rules/common.smk"
include: "workflow/rules/demo.smk"
include: "workflow/rules/ingest.smk"
include: "workflow/rules/extinction.smk"
include: "workflow/rules/kcorr.smk"
include: "workflow/rules/redshift.smk"
include: "workflow/rules/methods.smk"
include: "workflow/rules/crosscheck.smk"
include: "workflow/rules/report.smk"
include: "workflow/rules/calibrate.smk"


rule all:
    input:
        PRODUCT_FILES,
        rules.assemble.output.summary,
        rules.plots.output,
        rules.run_report.output,
    default_target: True
