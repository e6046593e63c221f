# seal: draw the sealed test partition once. The sealed file itself is not a declared
# output, so no Snakemake rerun or cleanup can ever delete or rewrite it.
rule seal:
    output:
        dev=PLAN.path("dev.parquet"),
        manifest=PLAN.path("sealed/manifest.json"),
    log:
        PLAN.path("logs/seal.log"),
    params:
        spec=SPEC,
        experiment=PLAN.config["experiment"],
    resources:
        mem_mb=PLAN.data_mem_mb(2000),
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
