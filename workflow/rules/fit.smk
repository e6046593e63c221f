# fit_family: one job per family x (repeat, fold); every candidate of the family is fitted.
rule fit_family:
    input:
        dev=PLAN.path("dev.parquet"),
        folds=PLAN.path("folds.parquet"),
    output:
        fits=PLAN.path("fits/{family}/r{repeat}f{fold}.parquet"),
        oof=PLAN.path("oof/{family}/r{repeat}f{fold}.parquet"),
    log:
        PLAN.path("logs/fit_family/{family}/r{repeat}f{fold}.log"),
    params:
        family=family_json,
        spec=SPEC,
        metrics=METRICS,
        task=PLAN.config["task"],
        allowed=ALLOWED,
        ledger=LEDGER,
        code=code_hash("fit_family"),
    threads: family_threads
    priority: fit_priority
    resources:
        mem_mb=family_resource("mem_mb"),
        runtime=family_resource("runtime"),
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
