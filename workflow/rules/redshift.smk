# Redshift distances: the mu(z) grid once per configuration, then CMB-frame z and mu_z per shard.


rule mu_grid:
    output:
        f"{GRIDS}/mu_grid.npz",
    params:
        redshift=config["redshift"],
    log:
        f"{LOGS}/mu_grid.log",
    benchmark:
        f"{BENCH}/mu_grid.tsv"
    script:
        "../../scripts/rules/mu_grid.py"


rule redshift:
    input:
        shard=shard_path,
        grid=rules.mu_grid.output[0],
    output:
        stage_file(f"{SHARDS}/redshift/part-{{shard}}.parquet"),
    params:
        redshift=config["redshift"],
    log:
        f"{LOGS}/redshift/part-{{shard}}.log",
    benchmark:
        f"{BENCH}/redshift/part-{{shard}}.tsv"
    script:
        "../../scripts/rules/redshift.py"
