# The run report: one static, self-contained HTML page (galdist.report), built at the end of
# every run from summary.json, the product's provenance and the plots with their captions,
# and the calibration fit where config `calibrate` names a sample (calibrate.smk).


def calibration_fit_files(wildcards):
    """The calibrate target's summary and figure, where a calibration sample is configured."""
    if not CALIBRATION_SAMPLE:
        return {}
    return {"fit_summary": f"{CALIBRATE}/fit_summary.json", "fit_report": f"{CALIBRATE}/fit_report.png"}


rule run_report:
    input:
        unpack(calibration_fit_files),
        summary=rules.assemble.output.summary,
        distances=PRODUCT_FILES,
        plots=[f"{RUN}/plots/{name}.png" for name in PLOTS],
    output:
        f"{RUN}/report.html",
    params:
        run=config["run"],
        config_files=[Path(p).name for p in workflow.configfiles],  # names: the page is the same in any folder
        captions=[f"{workflow.basedir}/workflow/report/{caption(name)}.rst" for name in PLOTS],
    log:
        f"{LOGS}/run_report.log",
    benchmark:
        f"{BENCH}/run_report.tsv"
    script:
        "../../scripts/rules/run_report.py"
