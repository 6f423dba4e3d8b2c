# SBF distances per shard. Outputs are keyed by the calibration's name, so a different
# calibration never overwrites another's results; a changed file or setting re-runs only these jobs.
# Defined only when sbf is a configured method (a run may use one method).


if "sbf" in METHODS:

    rule sbf:
        input:
            shard=shard_path,
            calibration=CALIBRATION_FILES["sbf"],
            coefficients=rules.extinction_coefficients.output[0],
            extinction=rules.extinction.output[0],
            kcorrect=rules.kcorrect.output[0],
        output:
            f"{SHARDS}/sbf/{SBF_CAL}/part-{{shard}}.parquet",
        params:
            sbf=config["sbf"],
            content=CALIBRATION_DIGESTS["sbf"],  # an edited calibration re-runs, whatever its time stamp
            bands=config["bands"],
        log:
            f"{LOGS}/sbf/{SBF_CAL}/part-{{shard}}.log",
        benchmark:
            f"{BENCH}/sbf/{SBF_CAL}/part-{{shard}}.tsv"
        script:
            "../../scripts/rules/sbf.py"
