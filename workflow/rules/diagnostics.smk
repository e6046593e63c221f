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
    # Before the diagnostics, which become ready with them: the learning curve's summary waits for the last of
    # them, so the diagnostics' pictures are better drawn beside that summary than before it.
    priority: 1
    resources:
        mem_mb=4000,
        runtime=60,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)


# diagnostics: validation curves from the stored fits and the winner's out-of-fold confusion matrix and reliability
# curve (classification) or residuals (regression); numbers in diagnostics.json. It needs no learning-curve table,
# so it runs beside those jobs (its pictures take about two seconds).
rule diagnostics:
    input:
        choice=PLAN.path("choice.json"),
        dev=PLAN.path("dev.parquet"),
        fits=fits_of("fits"),
        oof=fits_of("oof"),
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
        learning=bool(learning_files()),
        ledger=LEDGER,
        code=code_hash("diagnostics"),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)


# learning_summary: the winner's learning curve over every learning-curve table (means and sds over folds) and its
# picture; only when the learning curve is on.
rule learning_summary:
    input:
        choice=PLAN.path("choice.json"),
        learning=learning_files(),
    output:
        summary=PLAN.path("diagnostics/learning.json"),
        picture=PLAN.path("diagnostics/learning.png"),
    log:
        PLAN.path("logs/learning_summary.log"),
    params:
        metrics=METRICS,
        unit=PLAN.config["data"].get("unit") or "",
        ledger=LEDGER,
        code=code_hash("learning_summary"),
    resources:
        mem_mb=1000,
        runtime=10,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
