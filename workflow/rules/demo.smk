# The invented demo survey, built when the configured catalog is its path and absent.


rule demo_catalog:
    output:
        DEMO_CATALOG,
    params:
        n=config["demo"]["n_galaxies"],
        seed=config["demo"]["seed"],
    log:
        "results/demo-input/demo_catalog.log",
    shell:
        "python {workflow.basedir}/scripts/make_demo_survey.py {output} --n {params.n} --seed {params.seed} "
        "> {log} 2>&1"
