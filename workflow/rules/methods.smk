# Distance methods: one rule for every method of galdist.methods.REGISTRY that config
# `methods` names, one job per shard and method. A method reads the stage files its
# registry entry names; its outputs are keyed by the calibration's name, so a different
# calibration never overwrites another's results, and a changed calibration file or
# setting re-runs only that method's jobs. With likelihoods.write, each job also writes
# the shard's eta-likelihood part (its posterior or non-Gaussian Monte Carlo rows); the
# grid is in its params only where the job computes them (MethodSpec.used_config).
# No rule when no method is configured.


def method_inputs(wildcards):
    """The ingest shard, the calibration file and the stage files the method reads."""
    spec = REGISTRY[wildcards.method]
    stages = spec.job_stage_columns(config)  # mu_z too where the job computes eta likelihoods
    return {"ingest": shard_path(wildcards), "calibration": CALIBRATION_FILES[wildcards.method]} | {
        stage: STAGE_SHARDS[stage].format(shard=wildcards.shard) for stage in stages if stage != "ingest"}


if METHODS:

    rule distance:
        input:
            unpack(method_inputs),
        output:
            distances=stage_file(f"{SHARDS}/{{method}}/{{calibration}}/part-{{shard}}.parquet"),
            # the shard's eta-likelihood part (likelihoods.write; none otherwise)
            **({"likelihoods": stage_file(f"{SHARDS}/{{method}}/{{calibration}}/eta-like-{{shard}}.parquet")}
               if LIKELIHOODS_WRITTEN else {}),
        wildcard_constraints:
            method="|".join(METHODS),
            calibration="|".join(CALIBRATIONS[m].name for m in METHODS),
        params:
            method_config=lambda w: METHOD_CONFIG[w.method],  # its section, the bands, what it uses, conventions
            content=lambda w: CALIBRATION_DIGESTS[w.method],  # an edited calibration re-runs, whatever its time stamp
        log:
            f"{LOGS}/{{method}}/{{calibration}}/part-{{shard}}.log",
        benchmark:
            f"{BENCH}/{{method}}/{{calibration}}/part-{{shard}}.tsv"
        script:
            "../../scripts/rules/distance.py"
