# The calibrate target (`snakemake calibrate`): fit a method's relation to the calibration
# sample of config `calibrate` (galdist.calibrate, galdist.relation_fit). The sample goes
# through the same ingest, extinction and K stages as the survey (the same rule scripts,
# one shard) and the method's own corrections; the fitted relation lands in
# <run>/calibrate/<name>.yaml, an ordinary calibration file for <method>.calibration.
from galdist import calibrate as gcalibrate

CALIBRATE = f"{RUN}/calibrate"
CALIBRATION_SAMPLE, CALIBRATION_SAMPLE_FORMAT = gcalibrate.sample_paths(config)
FITTED_NAME = gcalibrate.fitted_name(config)
CALIBRATION_SAMPLE_DIGEST = ("built by the workflow" if CALIBRATION_SAMPLE == [DEMO_CALIBRATION_SAMPLE]
                             else content_digest(CALIBRATION_SAMPLE))


if CALIBRATION_SAMPLE:

    rule demo_calibration_sample:
        output:
            DEMO_CALIBRATION_SAMPLE,
        params:
            seed=config["demo"]["seed"],
        log:
            "results/demo-input/demo_calibration_sample.log",
        shell:
            "python {workflow.basedir}/scripts/make_demo_survey.py {output} --calibration-sample "
            "--seed {params.seed} > {log} 2>&1"


    rule calibration_ingest:
        input:
            CALIBRATION_SAMPLE,
        output:
            shard=f"{CALIBRATE}/shards/ingest/part-00000.parquet",
            summary=f"{CALIBRATE}/ingest_summary.json",
        params:
            content=CALIBRATION_SAMPLE_DIGEST,
            calibrate=config["calibrate"],
            columns=config["columns"],
            units=config["units"],
            bands=BANDS,
        log:
            f"{LOGS}/calibrate/ingest.log",
        script:
            "../../scripts/rules/calibration_ingest.py"


    # the survey's own rule scripts on the sample's one shard
    rule calibration_extinction:
        input:
            shard=rules.calibration_ingest.output.shard,
            coefficients=rules.extinction_coefficients.output[0],
            maps=EXTINCTION_MAPS,
        output:
            f"{CALIBRATE}/shards/extinction/part-{{shard}}.parquet",
        wildcard_constraints:
            shard="00000",
        params:
            extinction=config["extinction"],
            bands=BANDS,
            content=MAPS_DIGEST,
        log:
            f"{LOGS}/calibrate/extinction-{{shard}}.log",
        script:
            "../../scripts/rules/extinction.py"


    rule calibration_kcorr:
        input:
            shard=rules.calibration_ingest.output.shard,
            grid=rules.kcorr_grid.output[0],
            extinction=f"{CALIBRATE}/shards/extinction/part-{{shard}}.parquet",
        output:
            f"{CALIBRATE}/shards/kcorr/part-{{shard}}.parquet",
        wildcard_constraints:
            shard="00000",
        params:
            kcorr=config["kcorr"],
        log:
            f"{LOGS}/calibrate/kcorr-{{shard}}.log",
        script:
            "../../scripts/rules/kcorr.py"


    rule calibration_fit:
        input:
            ingest=rules.calibration_ingest.output.shard,
            extinction=f"{CALIBRATE}/shards/extinction/part-00000.parquet",
            kcorr=f"{CALIBRATE}/shards/kcorr/part-00000.parquet",
            catalog=CALIBRATION_SAMPLE,
        output:
            calibration=f"{CALIBRATE}/{FITTED_NAME}.yaml",
            summary=f"{CALIBRATE}/fit_summary.json",
            galaxies=f"{CALIBRATE}/fit_galaxies.parquet",
            report=f"{CALIBRATE}/fit_report.png",
        params:
            content=CALIBRATION_SAMPLE_DIGEST,
            used=gcalibrate.used_config(config),
        log:
            f"{LOGS}/calibrate/fit.log",
        script:
            "../../scripts/rules/calibration_fit.py"


    rule calibrate:
        input:
            rules.calibration_fit.output,

else:

    rule calibrate:
        run:
            raise WorkflowError("the calibrate target needs a calibration sample: set config key "
                                "'calibrate.catalog' to its file(s) (see the README, 'Calibrating from your own sample')")
