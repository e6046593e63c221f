# learning_curve: the winner fitted on nested subsets of one training fold (one job per repeat x fold, in
# parallel). It follows every tally, but fits only when the winner, folds, rows or settings changed; otherwise it
# puts back the table it kept for them (see holdfast.learning).
rule learning_curve:
    input:
        dev=PLAN.path("dev.parquet"),
        folds=PLAN.path("folds.parquet"),
        choice=PLAN.path("choice.json"),
    output:
        learning=PLAN.path("diagnostics/learning/r{repeat}f{fold}.parquet"),
    log:
        PLAN.path("logs/learning_curve/r{repeat}f{fold}.log"),
    params:
        spec=SPEC,
        metrics=METRICS,
        task=PLAN.config["task"],
        curve=json.dumps(PLAN.config["diagnostics"]["learning_curve"], sort_keys=True),
        parts=PLAN.parts_json(),
        allowed=ALLOWED,
        ledger=LEDGER,
        code=code_hash("learning_curve"),
    threads: max_threads()
    resources:
        mem_mb=4000,
        runtime=60,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)


# diagnostics: validation curves from the stored fits, the learning curve, and the winner's out-of-fold confusion
# matrix and reliability curve (classification) or residuals (regression); numbers in diagnostics.json.
rule diagnostics:
    input:
        choice=PLAN.path("choice.json"),
        dev=PLAN.path("dev.parquet"),
        fits=fits_of("fits"),
        oof=fits_of("oof"),
        learning=learning_files(),
    output:
        diagnostics=PLAN.path("diagnostics/diagnostics.json"),
        plots=directory(PLAN.path("diagnostics/plots")),
    log:
        PLAN.path("logs/diagnostics.log"),
    params:
        spec=SPEC,
        metrics=METRICS,
        task=PLAN.config["task"],
        bins=PLAN.config["diagnostics"]["calibration_bins"],
        unit=PLAN.config["data"].get("unit") or "",
        ledger=LEDGER,
        code=code_hash("diagnostics"),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
