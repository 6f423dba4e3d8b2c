# K-corrections: K(z) grids per band x template once per configuration, then per-galaxy K per shard.


rule kcorr_grid:
    input:
        templates=lambda w: [config["kcorr"]["templates"]] if config["kcorr"]["templates"] else [],
    output:
        f"{GRIDS}/kcorr_grid.npz",
    params:
        kcorr=config["kcorr"],
        bands=config["bands"],
        content=[TEMPLATES_DIGEST, FILTERS_DIGEST],
    log:
        f"{LOGS}/kcorr_grid.log",
    benchmark:
        f"{BENCH}/kcorr_grid.tsv"
    script:
        "../../scripts/rules/kcorr_grid.py"


rule kcorr:
    input:
        shard=shard_path,
        grid=rules.kcorr_grid.output[0],
        extinction=rules.extinction.output[0],
    output:
        stage_file(f"{SHARDS}/kcorr/part-{{shard}}.parquet"),
    params:
        kcorr=config["kcorr"],
    log:
        f"{LOGS}/kcorr/part-{{shard}}.log",
    benchmark:
        f"{BENCH}/kcorr/part-{{shard}}.tsv"
    script:
        "../../scripts/rules/kcorr.py"
