# Tully-Fisher distances per shard. Outputs are keyed by the calibration's name, so a different
# calibration never overwrites another's results; a changed file or setting re-runs only these jobs.
# Defined only when tully_fisher is a configured method (a run may use one method).


if "tully_fisher" in METHODS:

    rule tully_fisher:
        input:
            shard=shard_path,
            calibration=CALIBRATION_FILES["tully_fisher"],
            coefficients=rules.extinction_coefficients.output[0],
            extinction=rules.extinction.output[0],
            kcorrect=rules.kcorrect.output[0],
        output:
            f"{SHARDS}/tully_fisher/{TF_CAL}/part-{{shard}}.parquet",
        params:
            tully_fisher=config["tully_fisher"],
            content=CALIBRATION_DIGESTS["tully_fisher"],  # an edited calibration re-runs, whatever its time stamp
            bands=config["bands"],
        log:
            f"{LOGS}/tully_fisher/{TF_CAL}/part-{{shard}}.log",
        benchmark:
            f"{BENCH}/tully_fisher/{TF_CAL}/part-{{shard}}.tsv"
        script:
            "../../scripts/rules/tully_fisher.py"
