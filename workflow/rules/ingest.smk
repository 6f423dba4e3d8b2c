# Ingest: validate the catalog, flag bad values, write shards of config shard_rows rows.
# A checkpoint, because the number of shards is known only after reading the catalog.


checkpoint ingest:
    input:
        CATALOG_PATHS,
    output:
        shards=directory(f"{SHARDS}/ingest"),
        summary=f"{RUN}/ingest_summary.json",
    params:
        content=CATALOG_DIGEST,  # re-run on a changed catalog whatever its time stamp
        fmt=CATALOG_FORMAT,
        columns=config["columns"],
        units=config["units"],
        bands=BANDS,
        methods=METHODS,
        keep=config["keep_columns"],
        shard_rows=SHARD_ROWS,
    log:
        f"{LOGS}/ingest.log",
    benchmark:
        f"{BENCH}/ingest.tsv"
    script:
        "../../scripts/rules/ingest.py"
