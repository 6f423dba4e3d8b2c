# Galactic extinction: band coefficients once per configuration, then E(B-V), A_<band> and
# their errors per shard.


rule extinction_coefficients:
    input:
        table=EXTINCTION_TABLE or [],
    output:
        f"{GRIDS}/extinction_coefficients.json",
    params:
        extinction=config["extinction"],
        bands=config["bands"],
        content=[TABLE_DIGEST, FILTERS_DIGEST],
    log:
        f"{LOGS}/extinction_coefficients.log",
    benchmark:
        f"{BENCH}/extinction_coefficients.tsv"
    script:
        "../../scripts/rules/extinction_coefficients.py"


rule extinction:
    input:
        shard=shard_path,
        coefficients=rules.extinction_coefficients.output[0],
        maps=EXTINCTION_MAPS,
    output:
        stage_file(f"{SHARDS}/extinction/part-{{shard}}.parquet"),
    params:
        extinction=config["extinction"],
        bands=BANDS,
        content=MAPS_DIGEST,
    log:
        f"{LOGS}/extinction/part-{{shard}}.log",
    benchmark:
        f"{BENCH}/extinction/part-{{shard}}.tsv"
    script:
        "../../scripts/rules/extinction.py"
