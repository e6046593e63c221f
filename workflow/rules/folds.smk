# assign_folds: the stored fold table every candidate is scored on.
rule assign_folds:
    input:
        dev=PLAN.path("dev.parquet"),
    output:
        folds=PLAN.path("folds.parquet"),
        summary=PLAN.path("folds_summary.parquet"),
        leakage=PLAN.path("leakage.json"),
    log:
        PLAN.path("logs/assign_folds.log"),
    params:
        spec=SPEC,
        folds=json.dumps(PLAN.config["folds"], sort_keys=True),
        test=PLAN.path("sealed/test.parquet"),
        manifest=PLAN.path("sealed/manifest.json"),
        task=PLAN.config["task"],
        leakage=json.dumps(PLAN.config["leakage"], sort_keys=True),
        ledger=LEDGER,
        code=code_hash("assign_folds"),
    resources:
        mem_mb=PLAN.data_mem_mb(2000),
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
