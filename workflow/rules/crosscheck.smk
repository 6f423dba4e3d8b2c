# Cross-check and product: statistics over all shards first (zero point, clipping),
# then the assembly, one job per shard, then summary.json (and the one product file), then the plots.

# every stage file the assembly joins to a shard, the methods' included
JOINED_SHARDS = STAGE_SHARDS | METHOD_SHARDS
# the plots follow the configured methods: a relation plot only for a method that ran,
# one panel per method in the others, none without a method (galdist.methods.plot_names)
PLOTS = plot_names(prefixes(METHODS))


def caption(plot):
    """The plot's caption file; a method's relation plot without its own has the generic one."""
    return plot if (Path(workflow.basedir) / "workflow" / "report" / f"{plot}.rst").exists() else "relation"


rule crosscheck_statistics:
    input:
        grid=rules.mu_grid.output[0],
        redshift=per_shard(STAGE_SHARDS["redshift"]),
        **{m: per_shard(METHOD_SHARDS[m]) for m in METHODS},
    output:
        f"{RUN}/crosscheck_statistics.json",
    params:
        crosscheck=config["crosscheck"],
        min_cz=config["redshift"]["min_cz_kms"],
        methods=METHODS,
    log:
        f"{LOGS}/crosscheck_statistics.log",
    benchmark:
        f"{BENCH}/crosscheck_statistics.tsv"
    script:
        "../../scripts/rules/crosscheck_statistics.py"


rule groups:
    input:
        shards=per_shard(f"{SHARDS}/ingest/part-{{shard}}.parquet"),
        grid=rules.mu_grid.output[0],
        calibrations=list(CALIBRATION_FILES.values()),
        redshift=per_shard(STAGE_SHARDS["redshift"]),
        **{m: per_shard(METHOD_SHARDS[m]) for m in METHODS},
    output:
        groups=update(f"{RUN}/groups.parquet"),
        summary=f"{RUN}/groups_summary.json",
        members=directory(f"{SHARDS}/groups"),
    params:
        groups=config["groups"],
        zero_point=config["zero_point"],
        methods=METHODS,
        calibrations=CALIBRATION_FILES,
        content=CALIBRATION_DIGESTS,
    log:
        f"{LOGS}/groups.log",
    benchmark:
        f"{BENCH}/groups.tsv"
    script:
        "../../scripts/rules/groups.py"


# the product: one part per shard, written in parallel (rule assemble_part); the parts are
# the product (product_layout parts: a Parquet dataset distances/) or are joined into one
# distances.parquet by the final step and then removed (file; galdist.config.product_layout)
PRODUCT_LAYOUT = gconfig.product_layout(config)
if PRODUCT_LAYOUT == "parts":
    PRODUCT = f"{RUN}/distances"
    PRODUCT_PART = f"{PRODUCT}/part-{{shard}}.parquet"
    LIKELIHOOD_PART = f"{RUN}/eta_likelihoods/part-{{shard}}.parquet"
    product_part = update  # the old part stays until the new one replaces it
else:
    PRODUCT = f"{RUN}/distances.parquet"
    PRODUCT_PART = f"{SHARDS}/assembly/part-{{shard}}.parquet"
    LIKELIHOOD_PART = f"{SHARDS}/assembly/eta-like-{{shard}}.parquet"
    product_part = temp  # removed once joined into the one file
PART_COUNTS = f"{SHARDS}/assembly/counts-{{shard}}.json"
PART_SAMPLE = f"{SHARDS}/assembly/sample-{{shard}}.parquet"
# the files the product is made of, for the rules that read it
PRODUCT_FILES = per_shard(PRODUCT_PART) if PRODUCT_LAYOUT == "parts" else [PRODUCT]


def assemble_part_inputs(wildcards):
    """The shard's ingest part, every stage's and method's file of it, its likelihood parts."""
    files = {stage: pattern.format(shard=wildcards.shard) for stage, pattern in JOINED_SHARDS.items()}
    return files | {"shard": shard_path(wildcards)} | {
        f"{m}_likelihood": pattern.format(shard=wildcards.shard) for m, pattern in METHOD_LIKELIHOODS.items()}


rule assemble_part:
    input:
        unpack(assemble_part_inputs),
        ingest_summary=rules.ingest.output.summary,
        statistics=rules.crosscheck_statistics.output[0],
        groups=rules.groups.output.summary,
        group_members=rules.groups.output.members,
        grid=rules.mu_grid.output[0],
        calibrations=list(CALIBRATION_FILES.values()),
    output:
        part=product_part(PRODUCT_PART),
        **({"likelihoods": product_part(LIKELIHOOD_PART)} if LIKELIHOODS_WRITTEN else {}),
        counts=PART_COUNTS,
        sample=PART_SAMPLE,
    params:
        crosscheck=config["crosscheck"],
        min_cz=config["redshift"]["min_cz_kms"],
        methods=METHODS,
        calibrations=CALIBRATION_FILES,
        content=CALIBRATION_DIGESTS,
        likelihoods=config["likelihoods"],
        copy_inputs=config["copy_inputs"],
    log:
        f"{LOGS}/assemble/part-{{shard}}.log",
    benchmark:
        f"{BENCH}/assemble_part/part-{{shard}}.tsv"
    script:
        "../../scripts/rules/assemble_part.py"


rule assemble:
    input:
        counts=per_shard(PART_COUNTS),
        samples=per_shard(PART_SAMPLE),
        parts=per_shard(PRODUCT_PART),
        likelihoods=per_shard(LIKELIHOOD_PART) if LIKELIHOODS_WRITTEN else [],
        ingest_summary=rules.ingest.output.summary,
        statistics=rules.crosscheck_statistics.output[0],
        groups=rules.groups.output.summary,
    output:
        # update(): Snakemake keeps the old product until the new one replaces it (and puts
        # it back if the job fails), instead of deleting it when the job starts
        summary=update(f"{RUN}/summary.json"),
        plot_sample=update(f"{RUN}/plot_sample.parquet"),
        columns=update(f"{RUN}/COLUMNS.md"),
        **({"distances": update(PRODUCT)} if PRODUCT_LAYOUT == "file" else {}),
        **({"likelihoods": update(f"{RUN}/eta_likelihoods.parquet")}
           if PRODUCT_LAYOUT == "file" and LIKELIHOODS_WRITTEN else {}),
    params:
        layout=PRODUCT_LAYOUT,
        run_dir=RUN,
        methods=METHODS,
        calibrations=CALIBRATION_FILES,
        content=CALIBRATION_DIGESTS,
        likelihoods=config["likelihoods"],
    log:
        f"{LOGS}/assemble.log",
    benchmark:
        f"{BENCH}/assemble.tsv"
    script:
        "../../scripts/rules/assemble.py"


rule plots:
    input:
        sample=rules.assemble.output.plot_sample,
        grid=rules.mu_grid.output[0],
    output:
        **{
            name: report(f"{RUN}/plots/{name}.png", caption=f"../report/{caption(name)}.rst", category="Distances")
            for name in PLOTS
        },
    params:
        methods=METHODS,
        calibrations=CALIBRATION_FILES,
        content=CALIBRATION_DIGESTS,
        min_cz=config["redshift"]["min_cz_kms"],
        # the user's band of each method, named in the axis labels
        bands=config["bands"],
        sections={m: config[m] for m in METHODS},
    threads: 2  # the plots are drawn in parallel processes
    log:
        f"{LOGS}/plots.log",
    benchmark:
        f"{BENCH}/plots.tsv"
    script:
        "../../scripts/rules/plots.py"
