# K-corrections: K(z) grids per band x template once per configuration, then per-galaxy K per shard.


rule kcorrect_grid:
    input:
        templates=lambda w: [config["kcorrect"]["templates"]] if config["kcorrect"]["templates"] else [],
    output:
        f"{GRIDS}/kcorrect_grid.npz",
    params:
        kcorrect=config["kcorrect"],
        bands=config["bands"],
        content=[TEMPLATES_DIGEST, FILTERS_DIGEST],
    log:
        f"{LOGS}/kcorrect_grid.log",
    benchmark:
        f"{BENCH}/kcorrect_grid.tsv"
    script:
        "../../scripts/rules/kcorrect_grid.py"


rule kcorrect:
    input:
        shard=shard_path,
        grid=rules.kcorrect_grid.output[0],
        extinction=rules.extinction.output[0],
    output:
        f"{SHARDS}/kcorrect/part-{{shard}}.parquet",
    params:
        kcorrect=config["kcorrect"],
    log:
        f"{LOGS}/kcorrect/part-{{shard}}.log",
    benchmark:
        f"{BENCH}/kcorrect/part-{{shard}}.tsv"
    script:
        "../../scripts/rules/kcorrect.py"
